"""Progress over a batch's tasks (leafcv.batch.progress): plain lines with counts, elapsed time and ETA;
a tqdm bar; quiet mode that only reports problems."""
from __future__ import annotations

import re

import pytest

from leafcv.batch.progress import Progress
from leafcv.cv.tasks import Task
from leafcv.spec import Structure


def _task(label: str) -> Task:
    return Task(label, "refit", Structure(name="s", params={}), label)


def _feed(progress: Progress) -> None:
    counts = {"done": 0, "reused": 2, "failed": 0, "total": 6}
    progress("reused", _task("s: full data fit"), dict(counts))
    for i in range(2):
        counts["done"] += 1
        progress("done", _task(f"s: refit without L00{i + 1}"), dict(counts))
    progress("retry", _task("s: refit without L003"), {**counts, "error": "RuntimeError: disk full"})


def test_plain_lines_count_tasks_and_give_an_eta():
    lines: list[str] = []
    _feed(Progress("plain", lines.append))
    assert len(lines) == 3
    assert re.match(r"\[3/6 tasks, 0:00 elapsed, ETA \d+:\d\d\] s: refit without L001$", lines[0])
    assert lines[1].startswith("[4/6 tasks") and lines[1].endswith("s: refit without L002")
    assert "failed, sent again: s: refit without L003: RuntimeError: disk full" in lines[2]


def test_quiet_reports_only_problems():
    lines: list[str] = []
    _feed(Progress("quiet", lines.append))
    assert lines == ["failed, sent again: s: refit without L003: RuntimeError: disk full"]


def test_the_bar_shows_counts_on_standard_error(capsys):
    p = Progress("bar", lambda m: None)
    _feed(p)
    p.close()
    err = capsys.readouterr().err
    assert "4/6 tasks" in err and "failed, sent again" in err


def test_an_unknown_mode_is_refused():
    with pytest.raises(ValueError, match="bar, plain, quiet"):
        Progress("loud", print)
