"""The run folder's schema: where every file of a run lives, and the typed readers of its tables.

A run folder (written by `leafcv compare`, read by `leafcv.api.Run`, the report, `predict`, `simulate` and
the CLI) holds:

- ``manifest.json`` (written first, then on finishing), ``leaves.csv``, ``structures.txt``;
- ``ranking.csv``, ``ranking.txt``, ``pointwise.csv`` (when every structure has a result);
- ``results/<structure>.json``, ``fits/<structure>.nc``, ``predictions/<structure>-points.csv`` and
  ``-curves.csv`` per structure;
- ``tasks/`` (the task store and its ``journal.jsonl``), ``logs/compile.log``;
- ``report.html`` with ``tables/`` and ``figures/`` (by `leafcv report`), and ``simulation/`` (by
  `leafcv simulate`).

Every module names these files through `RunPaths`, and reads ``ranking.csv`` and ``pointwise.csv`` through
`read_ranking` and `read_pointwise`, so their types are the same wherever they are read.

Tests: tests/test_runfolder.py.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

#: The two files of a structure's held-out predictions: every point, and each leaf's predictive curves.
PREDICTION_PARTS = ("points", "curves")


@dataclass(frozen=True)
class RunPaths:
    """Every file of the run folder ``folder``."""

    folder: Path

    def __init__(self, folder: str | Path):
        object.__setattr__(self, "folder", Path(folder))

    @property
    def manifest(self) -> Path:
        return self.folder / "manifest.json"

    @property
    def leaves(self) -> Path:
        return self.folder / "leaves.csv"

    @property
    def structures_text(self) -> Path:
        return self.folder / "structures.txt"

    @property
    def ranking(self) -> Path:
        return self.folder / "ranking.csv"

    @property
    def ranking_text(self) -> Path:
        return self.folder / "ranking.txt"

    @property
    def pointwise(self) -> Path:
        return self.folder / "pointwise.csv"

    @property
    def results(self) -> Path:
        return self.folder / "results"

    @property
    def fits(self) -> Path:
        return self.folder / "fits"

    @property
    def predictions(self) -> Path:
        return self.folder / "predictions"

    @property
    def tasks(self) -> Path:
        return self.folder / "tasks"

    @property
    def journal(self) -> Path:
        return self.tasks / "journal.jsonl"

    @property
    def logs(self) -> Path:
        return self.folder / "logs"

    @property
    def compile_log(self) -> Path:
        return self.logs / "compile.log"

    @property
    def report(self) -> Path:
        return self.folder / "report.html"

    @property
    def tables(self) -> Path:
        return self.folder / "tables"

    @property
    def figures(self) -> Path:
        return self.folder / "figures"

    @property
    def simulation(self) -> Path:
        return self.folder / "simulation"

    def result(self, structure: str) -> Path:
        return self.results / f"{structure}.json"

    def fit(self, structure: str) -> Path:
        return self.fits / f"{structure}.nc"

    def prediction(self, structure: str, part: str) -> Path:
        """``part``: "points" or "curves" (`PREDICTION_PARTS`)."""
        if part not in PREDICTION_PARTS:
            raise ValueError(f"part must be one of {PREDICTION_PARTS}, not {part!r}")
        return self.predictions / f"{structure}-{part}.csv"


def is_finished(folder: str | Path) -> bool:
    """Whether the run in ``folder`` has finished: its ranking is written and its manifest says so."""
    paths = RunPaths(folder)
    if not paths.ranking.exists() or not paths.manifest.exists():
        return False
    return bool(json.loads(paths.manifest.read_text()).get("finished"))


def read_ranking(path: str | Path) -> pd.DataFrame:
    """ranking.csv with ``structure`` as text, ``rank`` as a nullable integer (missing where a structure is
    not ranked) and empty warnings as ""."""
    table = pd.read_csv(path, dtype={"warnings": object, "structure": str})
    table["rank"] = table["rank"].astype("Int64")
    if "warnings" in table:
        table["warnings"] = table["warnings"].fillna("").astype(str)
    return table


def read_pointwise(path: str | Path) -> pd.DataFrame:
    """pointwise.csv with the held-out unit (first column: ``leaf`` or the grouping) as text."""
    head = pd.read_csv(path, nrows=0)
    return pd.read_csv(path, dtype={head.columns[0]: str}) if len(head.columns) else pd.read_csv(path)
