"""Reading a run folder for the report: manifest, ranking, pointwise scores, results, and the study record
(the question, the data mapping, each leaf's groups and each structure's parameter lines). Nothing here
samples, fits or imports an engine.

What is read (all written by ``leafcv compare``): ``manifest.json``, ``ranking.csv``, ``pointwise.csv``,
``results/<structure>.json`` and ``study.json``, through `leafcv.runfolder`; neither the comparison file nor
the data file (a folder written before study.json existed is read by `leafcv.runfolder.legacy_study`).

Tests: tests/report/test_report_decision.py, tests/report/test_report_page.py, tests/test_runfolder.py.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..manifest import read_manifest
from ..runfolder import RunPaths, StudyRecord, read_pointwise, read_ranking, read_study


@dataclass
class RunFolder:
    """What the report knows of one run folder."""

    path: Path
    manifest: dict
    ranking: pd.DataFrame | None          # ranking.csv, or None when not written yet
    pointwise: pd.DataFrame | None        # pointwise.csv, or None
    results: dict[str, dict]              # structure -> its result file, manifest order
    structures: list[str]                 # every structure of the manifest, in its order
    missing: list[str]                    # structures of the manifest without a result file
    finished: bool
    unit: str                             # "leaf" or the grouping whose levels were held out
    question: str | None
    study: StudyRecord = field(default_factory=StudyRecord)    # study.json (`leafcv.runfolder.read_study`)
    notes: list[str] = field(default_factory=list)   # problems met while reading, in words

    @property
    def ranked(self) -> pd.DataFrame:
        """Rows of ranking.csv with a rank, best first (empty without a ranking)."""
        if self.ranking is None:
            return pd.DataFrame()
        return self.ranking[self.ranking["rank"].notna()].reset_index(drop=True)

    @property
    def unranked(self) -> pd.DataFrame:
        if self.ranking is None:
            return pd.DataFrame()
        return self.ranking[self.ranking["rank"].isna()].reset_index(drop=True)

    @property
    def paths(self) -> RunPaths:
        """Where each file of the run folder lives (`leafcv.runfolder`)."""
        return RunPaths(self.path)

    @property
    def best(self) -> str | None:
        ranked = self.ranked
        return None if ranked.empty else str(ranked.iloc[0]["structure"])


def load_run(rundir: Path) -> RunFolder:
    """Read a run folder; raise :class:`UserInputError` when it has no manifest."""
    rundir = Path(rundir)
    manifest = read_manifest(rundir)
    notes: list[str] = []
    structures = list(manifest.get("structures", {}))
    paths = RunPaths(rundir)
    results, missing = {}, []
    for name in structures:
        path = paths.result(name)
        if path.exists():
            results[name] = json.loads(path.read_text())
        else:
            missing.append(name)
    ranking = read_ranking(paths.ranking) if paths.ranking.exists() else None
    pointwise = read_pointwise(paths.pointwise) if paths.pointwise.exists() else None
    finished = "finished" in manifest
    if ranking is not None:
        listed = set(ranking["structure"])
        stale = sorted(listed - set(results))
        unlisted = [s for s in results if s not in listed]
        if stale or unlisted:
            notes.append("ranking.csv does not match the result files"
                         + (f" (it lists {', '.join(stale)}, which have no result)" if stale else "")
                         + (f" (it leaves out {', '.join(unlisted)})" if unlisted else "")
                         + ": it was written by an earlier run in this folder; `leafcv report` rewrites it "
                           "once the run has finished")
    unit = next((str(r.get("unit", "leaf")) for r in results.values()), "leaf")
    study = read_study(rundir, manifest)
    notes += study.notes
    return RunFolder(rundir, manifest, ranking, pointwise, results, structures, missing, finished, unit,
                     study.question, study, notes)


def leaf_groups(run: RunFolder) -> tuple[pd.DataFrame | None, list[str], str]:
    """Each leaf's group values (``leaf`` and the group columns, as text), the group columns, and a note on
    where they came from (or why they are unknown: then None), from the run's study record."""
    study = run.study
    return study.leaves, list(study.groups), study.groups_note
