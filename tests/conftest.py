"""Shared fixtures. Stan programs are compiled once per machine (httpstan caches them by program text)."""
from __future__ import annotations

from pathlib import Path

import pytest

TESTS = Path(__file__).resolve().parent


@pytest.fixture(scope="session")
def quick_demo(tmp_path_factory):
    """The quick demo scenario written to a temporary folder: (comparison, dataset, truth)."""
    import pandas as pd

    from leafcv.api import load
    from leafcv.demo import write_demo

    folder = tmp_path_factory.mktemp("quick-demo")
    path = write_demo(folder, quick=True)
    comparison, dataset = load(path)
    return comparison, dataset, pd.read_csv(folder / "truth.csv")
