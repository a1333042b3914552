"""No warning reaches the user (DESIGN.md "Engines": "no deprecation warning reaches the user"): ``leafcv
check``, a short ``leafcv fit`` and ``leafcv report`` run as a user runs them, in fresh processes with
Python's default warning filters, print no warning on stderr; and with warnings raised in leafcv's own
modules turned into errors (``-W error::Warning:leafcv``), each still succeeds."""
from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]


def _leafcv(*args: str) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONWARNINGS"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), str(ROOT), env.get("PYTHONPATH", "")])
    return subprocess.run([sys.executable, "-W", "error::Warning:leafcv", "-m", "leafcv.cli", *args],
                          capture_output=True, text=True, env=env, timeout=900)


def _assert_quiet(done: subprocess.CompletedProcess) -> None:
    assert done.returncode == 0, done.stderr
    assert not re.search(r"warn", done.stderr, re.IGNORECASE), done.stderr


@pytest.fixture(scope="module")
def short_file(quick_demo) -> Path:
    """The quick demo's comparison file beside its data, with short chains (2 x 100 warm-up, 100 draws)."""
    comp = quick_demo[0]
    text = comp.path.read_text()
    text = re.sub(r"(?m)^chains = \d+$", "chains = 2", text)
    text = re.sub(r"(?m)^warmup = \d+$", "warmup = 100", text)
    text = re.sub(r"(?m)^draws = \d+$", "draws = 100", text)
    assert "draws = 100" in text
    path = comp.path.parent / "short.toml"
    path.write_text(text)
    return path


def test_check_prints_no_warning(short_file):
    _assert_quiet(_leafcv("check", str(short_file)))


def test_a_short_fit_prints_no_warning(short_file, tmp_path):
    done = _leafcv("fit", str(short_file), "--structure", "leaf-vcmax-alpha", "--save", str(tmp_path / "fit.nc"))
    _assert_quiet(done)
    assert (tmp_path / "fit.nc").exists() and "vcmax25" in done.stdout


def test_report_prints_no_warning(demo_run, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(demo_run[2], run)
    done = _leafcv("report", str(run))
    _assert_quiet(done)
    assert (run / "report.html").exists()
