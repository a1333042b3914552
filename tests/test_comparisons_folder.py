"""Every ready-made comparison file in comparisons/ is valid against the demo data."""
from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from leafcv.api import load
from leafcv.demo import write_demo

FILES = sorted((Path(__file__).resolve().parents[1] / "comparisons").glob("*.toml"))


def test_there_are_ready_made_comparisons():
    assert len(FILES) >= 3


@pytest.mark.parametrize("path", FILES, ids=lambda p: p.name)
def test_ready_made_comparison_checks_on_demo_data(path, tmp_path):
    write_demo(tmp_path, quick=True)
    target = tmp_path / path.name
    shutil.copy(path, target)
    text = path.read_text()
    assert text.startswith("# Question:")      # each file states its question first
    comparison, dataset = load(target)         # raises on any problem
    assert len(comparison.structures) >= 2
    assert dataset.n_leaves == 16
