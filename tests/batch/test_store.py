"""The task store and the run lock (leafcv.batch.store)."""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from leafcv.batch.store import LOCK_NAME, RunLock, TaskStore
from leafcv.cv.tasks import Task, TaskOutput
from leafcv.errors import UserInputError
from leafcv.spec import Structure


def _task(key: str = "k1") -> Task:
    return Task(key, "score", Structure(name="s", params={}), "s: a task", {"leaves": [0, 1]})


def test_an_output_comes_back_exactly_as_stored(tmp_path):
    """Floats (NaN, infinities and values whose shortest decimal form has 17 digits) and arrays come
    back bit for bit: a re-run that reads the store computes what the first run computed."""
    store = TaskStore(tmp_path)
    rng = np.random.default_rng(1)
    record = {"elpd": [float(x) for x in rng.normal(size=5)] + [float("nan"), float("inf"), -float("inf")],
              "third": 1 / 3, "words": "leaf L001", "nested": {"a": [0.1 + 0.2]}}
    arrays = {"log_m": rng.normal(size=(40, 3)), "p/b0": rng.normal(size=(2, 20, 4))}
    assert not store.has("k1")
    back = store.put(_task(), TaskOutput(record, arrays))
    assert store.has("k1")
    assert np.array_equal(np.array(back.record["elpd"]), np.array(record["elpd"]), equal_nan=True)
    assert back.record["third"] == 1 / 3 and back.record["nested"]["a"][0] == 0.1 + 0.2
    for k, v in arrays.items():
        assert back.arrays[k].dtype == v.dtype and np.array_equal(back.arrays[k], v)
    assert store.get("k1").record == back.record


def test_a_task_counts_as_finished_only_once_its_record_is_written(tmp_path):
    """The arrays are written first and the record last, each atomically: arrays without a record (a run
    killed between the two) are not a finished task, and no temporary file is left behind."""
    store = TaskStore(tmp_path)
    store.put(_task("k2"), TaskOutput({"x": 1.0}, {"a": np.ones(3)}))
    (store.folder / "k2.json").unlink()
    assert not store.has("k2")
    assert not [p for p in store.folder.iterdir() if p.name.endswith(".tmp")]


def test_the_journal_logs_starts_and_finishes_and_skips_a_line_cut_by_a_kill(tmp_path):
    store = TaskStore(tmp_path)
    t = _task("k3")
    store.log("start", t, attempt=1)
    store.put(t, TaskOutput({"seconds": 2.5}))
    with open(store.journal_path, "a") as fh:
        fh.write('{"event": "start", "key": "k4", "ki')          # cut half-way
    events = [(e["event"], e.get("key")) for e in store.journal()]
    assert events == [("start", "k3"), ("done", "k3")]
    assert store.journal()[1]["seconds"] == 2.5 and store.journal()[0]["structure"] == "s"


HOLD = """
import sys, time
from pathlib import Path
from leafcv.batch.store import RunLock
with RunLock(Path(sys.argv[1])):
    print("held", flush=True)
    time.sleep(60)
"""


def test_a_second_compare_on_a_live_run_folder_is_refused_naming_the_holder(tmp_path):
    proc = subprocess.Popen([sys.executable, "-c", HOLD, str(tmp_path)], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "held"
        with pytest.raises(UserInputError) as err:
            with RunLock(tmp_path):
                pass
        message = str(err.value)
        assert f"pid {proc.pid}" in message and "another leafcv compare" in message and "--out" in message
    finally:
        proc.kill()
        proc.wait()


def test_a_lock_left_by_a_killed_run_does_not_block_the_next(tmp_path):
    """SIGKILL leaves the lock file with the dead holder's pid in it; the next run takes the lock."""
    proc = subprocess.Popen([sys.executable, "-c", HOLD, str(tmp_path)], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "held"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    assert json.loads((tmp_path / LOCK_NAME).read_text())["pid"] == proc.pid
    start = time.perf_counter()
    with RunLock(tmp_path):
        assert json.loads((tmp_path / LOCK_NAME).read_text())["pid"] == os.getpid()
    assert time.perf_counter() - start < 5
