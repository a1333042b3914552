"""Reading a run folder for the report: manifest, ranking, pointwise scores, results, the question
and the leaves' groups. Nothing here samples, fits or imports an engine.

What is read (all written by ``leafcv compare``): ``manifest.json``, ``ranking.csv``,
``pointwise.csv``, ``results/<structure>.json``, ``structures.txt``; besides the run folder only the
comparison file named in the manifest (for the question and the data mapping) and the data file it
names (for each leaf's group values, used only when its SHA-256 equals the manifest's).

Tests: tests/report/test_report_decision.py, tests/report/test_structure_terms.py,
tests/report/test_report_page.py.
"""
from __future__ import annotations

import json
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..manifest import file_hash
from ..runfolder import RunPaths, read_pointwise, read_ranking


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
    structures_text: str = ""
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


def question_of(comparison_text: str) -> str | None:
    """The question a comparison file asks.

    A top-level ``question`` key (TOML) wins; else the first comment line whose text starts
    "Question", continued over the following comment lines until the sentence that holds the first
    "?" ends (a question written over two comment lines is read whole, and what follows its "?" on
    the same line is left out). None when the file states no question.
    """
    try:
        top = tomllib.loads(comparison_text).get("question")
    except tomllib.TOMLDecodeError:
        top = None
    if isinstance(top, str) and top.strip():
        return " ".join(top.split())
    lines = comparison_text.splitlines()
    for k, line in enumerate(lines):
        text = line.strip().lstrip("#").strip()
        if not (line.strip().startswith("#") and re.match(r"question\b", text, flags=re.IGNORECASE)):
            continue
        body = re.sub(r"^question\b\s*[:\-]?\s*", "", text, flags=re.IGNORECASE)
        parts = [body]
        for nxt in lines[k + 1:]:
            if "?" in " ".join(parts) or not nxt.strip().startswith("#"):
                break
            parts.append(nxt.strip().lstrip("#").strip())
        joined = " ".join(p for p in parts if p)
        if "?" in joined:
            joined = joined[:joined.index("?") + 1]
        else:
            joined = body
        return joined or None
    return None


def load_run(rundir: Path) -> RunFolder:
    """Read a run folder; raise :class:`UserInputError` when it has no manifest."""
    from ..manifest import read_manifest

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
    question = None
    comparison = Path(manifest.get("comparison", ""))
    if comparison.is_file():
        question = question_of(comparison.read_text(encoding="utf-8-sig"))
    elif manifest.get("comparison"):
        notes.append(f"the comparison file {comparison} named in the manifest is not there: the question is not shown")
    text = paths.structures_text.read_text() if paths.structures_text.exists() else ""
    return RunFolder(rundir, manifest, ranking, pointwise, results, structures, missing, finished, unit,
                     question, text, notes)


def leaf_groups(run: RunFolder) -> tuple[pd.DataFrame | None, list[str], str]:
    """Each held-out leaf's group values, the group columns, and a note on where they came from.

    Read from the data file named in the manifest, with the leaf column and group columns of the
    comparison file (``[data.columns] leaf`` and ``[data.leaf] groups``). The data file is used only when its SHA-256 equals the
    manifest's ``data_sha256`` (otherwise the groups might not be the run's). Returns (None, [],
    reason) when the groups cannot be read.
    """
    comparison = Path(run.manifest.get("comparison", ""))
    if not comparison.is_file():
        return None, [], "the comparison file is not available, so the leaves' groups are unknown"
    try:
        spec = tomllib.loads(comparison.read_text(encoding="utf-8-sig")).get("data", {})
    except tomllib.TOMLDecodeError as exc:
        return None, [], f"the comparison file could not be read as TOML ({exc})"
    groups = [str(g) for g in spec.get("leaf", {}).get("groups", [])]
    leaf_col = spec.get("columns", {}).get("leaf", "leaf")
    data = Path(run.manifest.get("data", ""))
    if not data.is_file():
        return None, groups, f"the data file {data} is not available, so the leaves' groups are unknown"
    if run.manifest.get("data_sha256") and file_hash(data) != run.manifest["data_sha256"]:
        return None, groups, (f"the data file {data} has changed since the run (its SHA-256 differs from the "
                              "manifest's), so the leaves' groups are not shown")
    table = pd.read_csv(data, sep=None, engine="python", dtype=str)
    source = f"the data file {data.name}"
    absent = [c for c in [leaf_col, *groups] if c not in table.columns]
    if absent:
        return None, groups, f"{source} has no column {', '.join(absent)}"
    table = table[[leaf_col, *groups]].drop_duplicates(leaf_col).rename(columns={leaf_col: "leaf"})
    table["leaf"] = table["leaf"].str.strip()
    return table.reset_index(drop=True), groups, f"groups read from {source}"
