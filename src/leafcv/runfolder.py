"""The run folder's schema: where every file of a run lives, and the typed readers of its tables.

A run folder (written by `leafcv compare`, read by `leafcv.api.Run`, the report, `predict`, `simulate` and
the CLI) holds:

- ``manifest.json`` (written first, then on finishing), ``leaves.csv``, ``structures.txt``, ``study.json``
  (`StudyRecord`: what the run's readers need of the comparison file and the data);
- ``ranking.csv``, ``ranking.txt``, ``pointwise.csv`` (when every structure has a result);
- ``results/<structure>.json``, ``fits/<structure>.nc``, ``predictions/<structure>-points.csv`` and
  ``-curves.csv`` per structure;
- ``tasks/`` (the task store and its ``journal.jsonl``), ``logs/compile.log``;
- ``report.html`` with ``tables/`` and ``figures/`` (by `leafcv report`), and ``simulation/`` (by
  `leafcv simulate`).

Every module names these files through `RunPaths`, and reads ``ranking.csv`` and ``pointwise.csv`` through
`read_ranking` and `read_pointwise`, so their types are the same wherever they are read. ``study.json`` is
written by `write_study` (from the loaded comparison and data, when the run is made) and read by
`read_study`, so that no reader of a run re-reads its inputs or parses its words; a folder written before
study.json existed is read by `legacy_study`, the one place that still goes back to the input files.

Tests: tests/test_runfolder.py.
"""
from __future__ import annotations

import hashlib
import json
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

from .atomic import write_atomic
from .comparison.question import question_of, stated_question
from .comparison.summary import describe_param
from .data.roles import VARIABLE_OF
from .errors import UserInputError
from .jsonio import plain
from .spec import PARAMETERS, ParamSpec

if TYPE_CHECKING:
    from .data.dataset import Dataset
    from .spec import Comparison

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
    def study(self) -> Path:
        return self.folder / "study.json"

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


def file_hash(path: str | Path) -> str:
    """SHA-256 of a file, read in 1 MiB blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


#: Format of study.json; `read_study` refuses a later one.
STUDY_VERSION = 1


@dataclass(frozen=True, eq=False)
class StudyRecord:
    """What the readers of a run (the report) need of its comparison file and data, as data (study.json).

    question
        The question the comparison asks (`leafcv.comparison.question.stated_question`), or None.
    data_file
        The data file's name (without its folder).
    columns, groups, traits
        The data mapping: leafcv variable -> the user's column, and the leaf-level group and trait columns.
    leaves
        One row per leaf of the run, in the leaf table's order: ``leaf`` and every group column, as text
        (the values the run used); None when unknown (an older folder whose inputs are gone or changed).
    parameter_lines
        Per structure, how each parameter varies, in words (`leafcv.comparison.describe_param`), in the
        order of `leafcv.spec.PARAMETERS`: for showing, never for reading back.
    groups_note
        Where the leaves' groups come from, or why they are unknown, in words.
    notes
        Problems met reading a folder written before study.json existed (`legacy_study`), in words.
    """

    question: str | None = None
    data_file: str = ""
    columns: dict[str, str] = field(default_factory=dict)
    groups: tuple[str, ...] = ()
    traits: tuple[str, ...] = ()
    leaves: pd.DataFrame | None = None
    parameter_lines: dict[str, tuple[str, ...]] = field(default_factory=dict)
    groups_note: str = ""
    notes: tuple[str, ...] = ()


def _groups_note(data_file: str) -> str:
    return f"groups read from the data file {data_file}"


def study_record(comparison: "Comparison", dataset: "Dataset") -> StudyRecord:
    """The study record of a run of ``comparison`` on ``dataset`` (what `write_study` writes)."""
    data_file = Path(comparison.data.file).name
    groups = tuple(dataset.groups)
    leaves = dataset.leaves[["leaf", *groups]].astype(str).reset_index(drop=True)
    lines = {st.name: tuple(describe_param(p, st.params[p]) for p in PARAMETERS) for st in comparison.structures}
    return StudyRecord(stated_question(comparison), data_file, dict(comparison.data.columns), groups,
                       tuple(dataset.traits), leaves, lines, _groups_note(data_file))


def study_json(record: StudyRecord) -> str:
    """study.json's text (format `STUDY_VERSION`): ``question`` (null when none), ``data`` (``file``,
    ``columns``, ``groups``, ``traits``), ``leaves`` (column -> one value per leaf) and ``structures`` (name
    -> ``parameters``: the parameter lines)."""
    leaves = record.leaves if record.leaves is not None else pd.DataFrame(columns=["leaf"])
    return json.dumps(plain({
        "version": STUDY_VERSION, "question": record.question,
        "data": {"file": record.data_file, "columns": record.columns, "groups": record.groups,
                 "traits": record.traits},
        "leaves": {str(c): [str(v) for v in leaves[c]] for c in leaves.columns},
        "structures": {name: {"parameters": lines} for name, lines in record.parameter_lines.items()},
    }, strict=True), indent=1, ensure_ascii=False)


def write_study(folder: str | Path, comparison: "Comparison", dataset: "Dataset") -> Path:
    """Write ``folder/study.json`` from the loaded comparison and data (by `leafcv.compare`, when the run is
    made); returns its path."""
    path = RunPaths(folder).study
    write_atomic(path, study_json(study_record(comparison, dataset)))
    return path


def read_study(folder: str | Path, manifest: dict | None = None) -> StudyRecord:
    """The study record of the run in ``folder``: study.json, typed; for a folder written before study.json
    existed, `legacy_study` (``manifest``: the run's manifest, read here when not given).

    Raises a `UserInputError` naming the file when study.json is of a later format than this leafcv reads.
    """
    paths = RunPaths(folder)
    if not paths.study.exists():
        if manifest is None:
            manifest = json.loads(paths.manifest.read_text())
        return legacy_study(folder, manifest)
    d = json.loads(paths.study.read_text(encoding="utf-8"))
    if int(d.get("version", 0)) > STUDY_VERSION:
        raise UserInputError(str(paths.study), [
            f"format {d['version']} was written by a later leafcv (this one reads up to {STUDY_VERSION}): "
            "upgrade leafcv, or run `leafcv compare` again with this one"])
    data = d["data"]
    leaves = pd.DataFrame({c: pd.Series(v, dtype=object) for c, v in d["leaves"].items()}).astype(str)
    return StudyRecord(question=d.get("question"), data_file=str(data["file"]), columns=dict(data["columns"]),
                       groups=tuple(data["groups"]), traits=tuple(data["traits"]), leaves=leaves,
                       parameter_lines={n: tuple(s["parameters"]) for n, s in d["structures"].items()},
                       groups_note=_groups_note(str(data["file"])))


def _param_spec(record: dict) -> ParamSpec:
    """A parameter's record of the manifest (``asdict`` of a `ParamSpec`) as the ParamSpec again."""
    pairs = lambda key: tuple(tuple(x) for x in record.get(key, ()))     # noqa: E731
    return ParamSpec(fixed=tuple(record.get("fixed", ())), random=tuple(record.get("random", ())),
                     ratio_to=record.get("ratio_to"), centring=dict(record.get("centring", {})),
                     slopes=pairs("slopes"), split=pairs("split"))


def legacy_study(folder: str | Path, manifest: dict) -> StudyRecord:
    """The study record of a run folder written before study.json existed, read the way leafcv read it then:
    the question and the data mapping from the comparison file the manifest names, each leaf's groups from
    the data file it names (only when its SHA-256 still equals the manifest's), and the parameter lines from
    the manifest's parameter records. What cannot be read is said in ``notes`` and ``groups_note``;
    re-running `leafcv compare` (which reuses every finished result) writes study.json."""
    notes: list[str] = []
    lines = {name: tuple(describe_param(p, _param_spec(rec["params"][p])) for p in PARAMETERS if p in rec["params"])
             for name, rec in manifest.get("structures", {}).items() if "params" in rec}
    comparison = Path(manifest.get("comparison", ""))
    data = Path(manifest.get("data", ""))
    if not comparison.is_file():
        if manifest.get("comparison"):
            notes.append(f"the comparison file {comparison} named in the manifest is not there: the question is "
                         "not shown")
        return StudyRecord(parameter_lines=lines, notes=tuple(notes), data_file=data.name,
                           groups_note="the comparison file is not available, so the leaves' groups are unknown")
    text = comparison.read_text(encoding="utf-8-sig")
    record = StudyRecord(question=question_of(text), parameter_lines=lines, notes=tuple(notes), data_file=data.name)
    try:
        spec = tomllib.loads(text).get("data", {})
    except tomllib.TOMLDecodeError as exc:
        return replace(record, groups_note=f"the comparison file could not be read as TOML ({exc})")
    groups = tuple(str(g) for g in spec.get("leaf", {}).get("groups", []))
    traits = tuple(str(t) for t in spec.get("leaf", {}).get("traits", []))
    leaf_col = spec.get("columns", {}).get("leaf", "leaf")
    columns = {VARIABLE_OF.get(str(k), str(k)): str(v) for k, v in spec.get("columns", {}).items()}
    record = replace(record, columns=columns, groups=groups, traits=traits)
    if not data.is_file():
        return replace(record, groups_note=f"the data file {data} is not available, so the leaves' groups are unknown")
    if manifest.get("data_sha256") and file_hash(data) != manifest["data_sha256"]:
        return replace(record, groups_note=f"the data file {data} has changed since the run (its SHA-256 differs from "
                                         "the manifest's), so the leaves' groups are not shown")
    table = pd.read_csv(data, sep=None, engine="python", dtype=str)
    source = f"the data file {data.name}"
    absent = [c for c in [leaf_col, *groups] if c not in table.columns]
    if absent:
        return replace(record, groups_note=f"{source} has no column {', '.join(absent)}")
    table = table[[leaf_col, *groups]].drop_duplicates(leaf_col).rename(columns={leaf_col: "leaf"})
    table["leaf"] = table["leaf"].str.strip()
    return replace(record, leaves=table.reset_index(drop=True), groups_note=f"groups read from {source}")
