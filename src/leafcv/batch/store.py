"""A run folder's task store and its lock.

``RUNDIR/tasks/<key>.json`` is a finished task's output record and ``<key>.npz`` its arrays (the draws
of a full-data fit, per-draw log marginals of a block of leaves); both are written atomically, arrays
first, so a task counts as finished exactly when its record exists, whatever moment a run was killed
at. ``tasks/journal.jsonl`` logs, one JSON line each, when a task was sent to a worker (``start``) and
when its output was stored (``done``), ``failed`` attempts, and the runs (``run``): what a reader (or a
test) needs to see that no finished task ran twice.

``RUNDIR/.leafcv-run.lock`` is held (``flock``) by the live ``compare`` writing the folder. The
operating system releases it when that process ends, however it ends, so a lock left by a killed run
never blocks the next one.
"""
from __future__ import annotations

import fcntl
import io
import json
import os
import socket
import sys
import time
from pathlib import Path

import numpy as np

from ..atomic import write_atomic
from ..cv.tasks import Task, TaskOutput, record_text
from ..errors import UserInputError
from ..runfolder import RunPaths

LOCK_NAME = ".leafcv-run.lock"


class TaskStore:
    """Finished task outputs of one run folder, keyed by task key."""

    def __init__(self, run_dir: Path):
        self.folder = RunPaths(run_dir).tasks
        self.folder.mkdir(parents=True, exist_ok=True)
        self.journal_path = self.folder / "journal.jsonl"

    def has(self, key: str) -> bool:
        return (self.folder / f"{key}.json").exists()

    def get(self, key: str) -> TaskOutput:
        record = json.loads((self.folder / f"{key}.json").read_text())
        arrays = {}
        if record.pop("_arrays", False):
            with np.load(self.folder / f"{key}.npz", allow_pickle=False) as z:
                arrays = {k: z[k] for k in z.files}
        return TaskOutput(record, arrays)

    def put(self, task: Task, output: TaskOutput) -> TaskOutput:
        """Store a finished output (arrays, then the record) and return it as a later run will read it."""
        if output.arrays:
            buf = io.BytesIO()
            np.savez(buf, **{k: np.asarray(v) for k, v in output.arrays.items()})
            write_atomic(self.folder / f"{task.key}.npz", buf.getvalue())
        write_atomic(self.folder / f"{task.key}.json", record_text({**output.record, "_arrays": bool(output.arrays)}))
        self.log("done", task, seconds=output.record.get("seconds"))
        return self.get(task.key)

    def log(self, event: str, task: Task | None = None, **extra) -> None:
        """Append one line to the journal (a single write of a short line: lines never interleave)."""
        entry = {"event": event, "time": time.strftime("%Y-%m-%dT%H:%M:%S"), "pid": os.getpid()}
        if task is not None:
            entry.update(key=task.key, kind=task.kind, structure=task.structure.name, label=task.label)
        entry.update({k: v for k, v in extra.items() if v is not None})
        with open(self.journal_path, "a") as fh:
            fh.write(json.dumps(entry) + "\n")

    def journal(self) -> list[dict]:
        if not self.journal_path.exists():
            return []
        out = []
        for line in self.journal_path.read_text().splitlines():
            try:
                out.append(json.loads(line))
            except ValueError:          # a line cut by a kill: not an event
                continue
        return out


class RunLock:
    """Held while a ``compare`` writes a run folder; a second one is refused, naming the holder."""

    def __init__(self, run_dir: Path):
        self.run_dir = Path(run_dir)
        self.path = self.run_dir / LOCK_NAME
        self._fh = None

    def __enter__(self) -> "RunLock":
        self.run_dir.mkdir(parents=True, exist_ok=True)
        fh = open(self.path, "a+")
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.seek(0)
            try:
                holder = json.loads(fh.read() or "{}")
            except ValueError:
                holder = {}
            fh.close()
            who = (f"pid {holder.get('pid', '?')} on {holder.get('host', '?')}, started {holder.get('started', '?')}"
                   if holder else "another process")
            raise UserInputError(str(self.run_dir), [
                f"another leafcv compare ({who}) is writing this run folder; wait for it to finish, stop it "
                f"(Ctrl-C keeps its finished tasks), or choose another folder with --out"]) from None
        fh.seek(0)
        fh.truncate()
        fh.write(json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                             "started": time.strftime("%Y-%m-%d %H:%M:%S"), "command": " ".join(sys.argv)}))
        fh.flush()
        self._fh = fh
        return self

    def __exit__(self, *exc) -> None:
        if self._fh is not None:
            fcntl.flock(self._fh, fcntl.LOCK_UN)
            self._fh.close()
            self._fh = None
