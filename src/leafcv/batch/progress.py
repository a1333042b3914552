"""Progress over all tasks of a batch: a bar (tqdm) on a terminal, plain log lines for batch jobs, or quiet.

Counts are tasks: finished here, reused from the store, failed, and the total known so far (a
structure's refits are known once its fit is scored, so the total can grow). The ETA is tqdm's, from
the rate of finished tasks.
"""
from __future__ import annotations

import sys
import time
from typing import Callable

MODES = ("bar", "plain", "quiet")


def default_mode() -> str:
    """A bar on a terminal, plain lines otherwise (a log file, a batch system)."""
    return "bar" if sys.stderr.isatty() else "plain"


def _clock(seconds: float) -> str:
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    return f"{h}:{rest // 60:02d}:{rest % 60:02d}" if h else f"{rest // 60}:{rest % 60:02d}"


class Progress:
    """Callable the runner reports to: ``(event, task, counts)``."""

    def __init__(self, mode: str, log: Callable[[str], None]):
        if mode not in MODES:
            raise ValueError(f"progress mode {mode!r}: choose one of {', '.join(MODES)}")
        self.mode, self.log = mode, log
        self.start = time.perf_counter()
        self.bar = None
        self.lines: list[str] = []

    def __call__(self, event: str, task, counts: dict) -> None:
        finished = counts["done"] + counts["reused"] + counts["failed"]
        total = max(counts["total"], finished)
        if self.mode == "bar":
            self._bar(event, task, counts, finished, total)
        elif self.mode == "plain" and event in ("done", "failed", "retry"):
            elapsed = time.perf_counter() - self.start
            rate = counts["done"] / elapsed if counts["done"] else 0.0
            eta = f", ETA {_clock((total - finished) / rate)}" if rate > 0 and total > finished else ""
            what = {"done": f"{task.label if task else ''}",
                    "failed": f"FAILED twice: {task.label if task else ''}: {counts.get('error', '')}",
                    "retry": f"failed, sent again: {task.label if task else ''}: {counts.get('error', '')}"}[event]
            self.log(f"[{finished}/{total} tasks, {_clock(elapsed)} elapsed{eta}] {what}")
        elif self.mode == "quiet" and event in ("failed", "retry"):
            self.log(f"{'FAILED twice' if event == 'failed' else 'failed, sent again'}: "
                     f"{task.label if task else ''}: {counts.get('error', '')}")

    def _bar(self, event, task, counts, finished, total) -> None:
        from tqdm import tqdm

        if self.bar is None:
            self.bar = tqdm(total=total, unit="task", file=sys.stderr, dynamic_ncols=True, smoothing=0.05,
                            bar_format="{l_bar}{bar}| {n_fmt}/{total_fmt} tasks [{elapsed}<{remaining}] {postfix}")
        if self.bar.total != total:
            self.bar.total = total
        self.bar.n = finished
        if event in ("failed", "retry"):
            self.bar.write(f"{'FAILED twice' if event == 'failed' else 'failed, sent again'}: "
                           f"{task.label if task else ''}: {counts.get('error', '')}", file=sys.stderr)
        if event == "done" and task is not None:
            self.bar.set_postfix_str(task.label[:60], refresh=False)
        self.bar.refresh()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None
