"""The coordinator (leafcv.batch.runner) through run_comparison, with the fake engine: results do not
depend on the number of workers, finished tasks never run again, failures are retried once and then
recorded while the batch goes on, and a lost worker process is replaced."""
from __future__ import annotations

import json
import os
from dataclasses import replace
from pathlib import Path

import pytest

from leafcv.compare import BatchIncomplete, run_comparison
from leafcv.spec import SamplerSpec

from ..fakes import FakeEngine

SAMPLER = SamplerSpec(chains=2, warmup=10, draws=60, seed=3)
NAMES = ("leaf-vcmax-alpha", "traits-month-fixed")


def _comparison(quick_demo, names=NAMES):
    """The quick demo's first 6 leaves (every campaign and species still present) and two structures."""
    import pandas as pd

    from leafcv.data.reading import load_dataset

    comparison, dataset, _ = quick_demo
    table = pd.read_csv(comparison.data.file, dtype=str)
    column = comparison.data.columns["leaf"]
    table = table[table[column].isin(sorted(table[column].unique())[:6])]
    small = load_dataset(comparison.data, table=table)
    return replace(comparison, structures=tuple(comparison.structure(n) for n in names)), small


def _run(comp, dataset, out: Path, engine=None, **kwargs):
    logs: list[str] = []
    run_comparison(comp, dataset, out, engine=engine or FakeEngine(), spot_checks=1, sampler=SAMPLER,
                   log=logs.append, progress="plain", **kwargs)
    return logs


def _files(out: Path) -> dict[str, bytes]:
    names = ["ranking.csv", "pointwise.csv"] + [f"predictions/{n}-{p}.csv" for n in NAMES for p in ("points", "curves")]
    return {n: (out / n).read_bytes() for n in names}


def _events(out: Path) -> list[dict]:
    return [json.loads(line) for line in (out / "tasks" / "journal.jsonl").read_text().splitlines()]


class FlakyEngine(FakeEngine):
    """Raises on its first ``fail`` calls, then samples as the fake engine does."""

    def __init__(self, fail: int = 1):
        super().__init__()
        self.fail = fail

    def fit(self, *args, **kwargs):
        if self.fail > 0:
            self.fail -= 1
            raise RuntimeError("a worker's disk filled up")
        return super().fit(*args, **kwargs)


class DyingEngine(FakeEngine):
    """Ends its process (as the kernel's out-of-memory killer would) on the first call anywhere: the
    marker file tells later calls, in the replacement worker, that it happened."""

    def __init__(self, marker: str):
        super().__init__()
        self.marker = marker

    def fit(self, *args, **kwargs):
        if not os.path.exists(self.marker):
            Path(self.marker).write_text("died once")
            os._exit(1)
        return super().fit(*args, **kwargs)


@pytest.fixture(scope="module")
def serial_run(quick_demo, tmp_path_factory):
    comp, dataset = _comparison(quick_demo)
    out = tmp_path_factory.mktemp("serial") / "run"
    _run(comp, dataset, out, workers=1)
    return comp, dataset, out


def test_two_worker_processes_give_exactly_the_in_process_results(serial_run, tmp_path):
    comp, dataset, out = serial_run
    two = tmp_path / "run"
    logs = _run(comp, dataset, two, workers=2)
    assert any("local processes: 2 worker(s), 1 chain(s) at once" in m for m in logs)
    assert _files(two) == _files(out)


def test_a_rerun_runs_no_finished_task_and_rebuilds_the_same_files_from_the_store(serial_run, tmp_path):
    import shutil

    comp, dataset, out = serial_run
    copy = tmp_path / "run"
    shutil.copytree(out, copy)
    for name in ["ranking.csv", "pointwise.csv", "results", "predictions", "fits"]:
        p = copy / name
        shutil.rmtree(p) if p.is_dir() else p.unlink()
    engine = FakeEngine()
    _run(comp, dataset, copy, engine=engine, workers=1)
    assert engine.calls == []
    assert _files(copy) == _files(out)
    events = _events(copy)
    last_run = max(i for i, e in enumerate(events) if e["event"] == "run")
    assert not [e for e in events[last_run:] if e["event"] in ("start", "done")]


def test_a_task_that_fails_is_sent_again_once_with_the_same_seed(serial_run, tmp_path):
    comp, dataset, out = serial_run
    flaky = tmp_path / "run"
    logs = _run(comp, dataset, flaky, engine=FlakyEngine(fail=1), workers=1)
    assert any("failed, sent again" in m and "disk filled up" in m for m in logs)
    events = _events(flaky)
    failed = [e for e in events if e["event"] == "failed"]
    assert len(failed) == 1
    assert [e["attempt"] for e in events if e["event"] == "start" and e["key"] == failed[0]["key"]] == [1, 2]
    assert _files(flaky) == _files(out)


def test_a_task_that_fails_twice_is_recorded_and_the_other_structures_are_ranked(quick_demo, tmp_path, monkeypatch):
    import leafcv.cv.plan as plan

    real = plan.execute

    def broken(ctx, task, inputs):
        if task.structure.name == NAMES[1]:
            raise ValueError("quadrature ran out of memory")
        return real(ctx, task, inputs)

    monkeypatch.setattr(plan, "execute", broken)
    comp, dataset = _comparison(quick_demo)
    out = tmp_path / "run"
    with pytest.raises(BatchIncomplete) as err:
        _run(comp, dataset, out, workers=1)
    assert NAMES[1] in str(err.value) and "quadrature ran out of memory" in str(err.value)
    assert "Traceback" in err.value.engine_messages
    manifest = json.loads((out / "manifest.json").read_text())
    assert list(manifest["results"]) == [NAMES[0]] and NAMES[1] in manifest["failed"]
    ranking = (out / "ranking.csv").read_text()
    assert NAMES[0] in ranking and NAMES[1] not in ranking
    assert (out / "report.html").exists()


def test_a_lost_worker_process_is_replaced_and_its_task_sent_again(serial_run, tmp_path):
    comp, dataset, out = serial_run
    lost = tmp_path / "run"
    logs = _run(comp, dataset, lost, engine=DyingEngine(str(tmp_path / "died")), workers=2)
    assert (tmp_path / "died").exists()
    assert any("sent again" in m for m in logs)
    assert _files(lost) == _files(out)


def test_in_process_each_task_is_stored_as_it_finishes(quick_demo, tmp_path, monkeypatch):
    """With --workers 1 the tasks of one step (a structure's refits) run one by one, and each is in the
    store before the next starts: Ctrl-C between two refits keeps the first."""
    import leafcv.cv.plan as plan

    real = plan.execute
    out = tmp_path / "run"
    seen: list[tuple[str, int]] = []

    def watched(ctx, task, inputs):
        stored = len(list((out / "tasks").glob("*.json")))
        seen.append((task.kind, stored))
        return real(ctx, task, inputs)

    monkeypatch.setattr(plan, "execute", watched)
    comp, dataset = _comparison(quick_demo, NAMES[:1])
    _run(comp, dataset, out, workers=1)
    assert [k for k, _ in seen].count("refit") >= 2
    assert [n for _, n in seen] == list(range(len(seen)))      # task i starts with i tasks stored


def test_a_run_folder_moved_with_its_data_keeps_every_finished_task(serial_run, tmp_path):
    """Task keys hash the data's content and how it is read, not where the file is."""
    import shutil

    comp, dataset, out = serial_run
    data = tmp_path / "moved" / Path(comp.data.file).name
    data.parent.mkdir()
    shutil.copy(comp.data.file, data)
    moved = replace(comp, data=replace(comp.data, file=data))
    copy = tmp_path / "moved" / "run"
    shutil.copytree(out, copy)
    shutil.rmtree(copy / "results")
    engine = FakeEngine()
    _run(moved, dataset, copy, engine=engine, workers=1)
    assert engine.calls == []
    assert _files(copy) == _files(out)
