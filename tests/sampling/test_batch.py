"""Batches with real Stan fits on a tiny scenario (8 leaves, one structure, short chains): a run killed
with SIGKILL during a full fit, during scoring and during refits, then stopped by Ctrl-C during another
refit, and started again each time, leaves no process behind, keeps every finished task, runs no finished
task twice and ends with the uninterrupted run's ranking, byte for byte; a two-worker Dask LocalCluster
gives the same ranking too."""
from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import psutil
import pytest

TINY_LEAVES = 8


@pytest.fixture(scope="module")
def tiny(tmp_path_factory) -> Path:
    """The quick demo cut to its first 8 leaves and its first structure, with short chains."""
    from leafcv.demo import write_demo

    folder = tmp_path_factory.mktemp("tiny")
    path = write_demo(folder, quick=True)
    obs = pd.read_csv(folder / "observations.csv", dtype=str)
    keep = sorted(obs["plant_leaf"].unique())[:TINY_LEAVES]
    obs[obs["plant_leaf"].isin(keep)].to_csv(folder / "observations.csv", index=False)
    text = path.read_text()
    head, first, _ = re.split(r"(?m)^(?=\[\[structure\]\])", text, maxsplit=2)
    head = re.sub(r"(?m)^chains = \d+", "chains = 2", head)
    head = re.sub(r"(?m)^warmup = \d+", "warmup = 200", head)
    head = re.sub(r"(?m)^draws = \d+", "draws = 200", head)
    path.write_text(head + first)
    return path


def _default_sigint() -> None:
    # a test run started in the background of a non-interactive shell inherits SIGINT ignored, and so
    # would the run under test: give it the default disposition, as a terminal's foreground job has
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _compare(path: Path, out: Path, *extra: str, **popen) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "leafcv.cli", "compare", str(path), "--out", str(out),
                             "--progress", "plain", *extra], stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True, preexec_fn=_default_sigint, **popen)


def _finish(proc: subprocess.Popen) -> str:
    out, _ = proc.communicate(timeout=900)
    assert proc.returncode == 0, out
    return out


def _journal(out: Path) -> list[dict]:
    path = out / "tasks" / "journal.jsonl"
    if not path.exists():
        return []
    events = []
    for line in path.read_text().splitlines():
        try:
            events.append(json.loads(line))
        except ValueError:
            pass
    return events


@pytest.fixture(scope="module")
def uninterrupted(tiny, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("whole") / "run"
    _finish(_compare(tiny, out, "--workers", "1"))
    return out


def _kill_when(tiny: Path, out: Path, kind: str, sig: int = signal.SIGKILL) -> str:
    """Start a compare in its own session; send ``sig`` to its whole process group while a task of
    ``kind`` runs (SIGKILL; or SIGINT, as a terminal's Ctrl-C does). Returns that task's key after
    checking that it had not finished and that no process is left."""
    before = len(_journal(out))          # events of earlier runs: a task they left unfinished is not this one's
    proc = _compare(tiny, out, "--workers", "1", start_new_session=True)
    deadline = time.time() + 600
    key = None
    while time.time() < deadline and proc.poll() is None:
        events = _journal(out)[before:]
        done = {e["key"] for e in events if e["event"] == "done"}
        running = [e for e in events if e["event"] == "start" and e["kind"] == kind and e["key"] not in done]
        if running:
            key = running[-1]["key"]
            time.sleep(0.3)
            break
        time.sleep(0.05)
    assert key is not None, f"no {kind} task started before the run ended"
    os.killpg(proc.pid, sig)
    output, _ = proc.communicate(timeout=60)
    if sig == signal.SIGINT:
        assert proc.returncode == 130 and "finished tasks are kept" in output, output
    assert key not in {e["key"] for e in _journal(out) if e["event"] == "done"}, \
        f"the {kind} task finished before the kill: the kill did not land during it"
    time.sleep(0.5)
    # a killed process whose parent died too waits, dead, as a zombie until the container's init reaps it
    left = [p for p in psutil.process_iter(["pid", "name", "status"])
            if _session(p.pid) == proc.pid and p.info["status"] != psutil.STATUS_ZOMBIE]
    assert not left, f"processes left running after SIGKILL of the run's process group: {left}"
    return key


def _session(pid: int) -> int | None:
    try:
        return os.getsid(pid)
    except OSError:
        return None


def test_a_run_killed_at_three_moments_and_restarted_ends_with_the_uninterrupted_ranking(tiny, uninterrupted, tmp_path):
    out = tmp_path / "run"
    killed = [_kill_when(tiny, out, kind) for kind in ("full", "score", "refit")]
    stored = {e["key"] for e in _journal(out) if e["event"] == "done"}
    killed.append(_kill_when(tiny, out, "refit", signal.SIGINT))       # Ctrl-C: stops cleanly
    after = {e["key"] for e in _journal(out) if e["event"] == "done"}
    assert stored <= after and all((out / "tasks" / f"{k}.json").exists() for k in after)
    _finish(_compare(tiny, out, "--workers", "1"))
    events = _journal(out)
    done = [e["key"] for e in events if e["event"] == "done"]
    assert len(done) == len(set(done)), "a finished task ran twice"
    for i, e in enumerate(events):
        if e["event"] == "start":
            assert e["key"] not in {d["key"] for d in events[:i] if d["event"] == "done"}, \
                f"{e['label']} was started again after it had finished"
    assert all(k in done for k in killed)         # each killed task ran again and finished
    assert (out / "ranking.csv").read_bytes() == (uninterrupted / "ranking.csv").read_bytes()
    assert (out / "pointwise.csv").read_bytes() == (uninterrupted / "pointwise.csv").read_bytes()


def test_a_two_worker_dask_local_cluster_gives_the_local_ranking(tiny, uninterrupted, tmp_path):
    pytest.importorskip("distributed")
    out = tmp_path / "run"
    log = _finish(_compare(tiny, out, "--scheduler", "local", "--workers", "2"))
    assert "dask: 2 worker(s)" in log
    assert (out / "ranking.csv").read_bytes() == (uninterrupted / "ranking.csv").read_bytes()
    assert (out / "pointwise.csv").read_bytes() == (uninterrupted / "pointwise.csv").read_bytes()
