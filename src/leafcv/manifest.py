"""Reading a run folder: its manifest.json (written first by `leafcv compare`, the one check that a folder
is a run), the numbers of its JSON files, and the SHA-256 of its inputs and outputs (`file_hash`, kept with
the schema in `leafcv.runfolder` and named here too).

Tests: tests/report/test_report_page.py, tests/test_predict.py, tests/sampling/test_compare.py.
"""
from __future__ import annotations

import json
from pathlib import Path

from .errors import UserInputError
from .runfolder import RunPaths, file_hash


def read_manifest(run_dir: str | Path) -> dict:
    """The manifest of a run folder; a `UserInputError` naming the folder when it has none."""
    path = RunPaths(run_dir).manifest
    if not path.exists():
        raise UserInputError(str(run_dir), ["no manifest.json here: give the run folder written by `leafcv compare`"])
    return json.loads(path.read_text())


def run_inputs(run_dir: str | Path, structure: str | None, purpose: str):
    """(manifest, comparison, dataset, fit path) of a finished run, for a step that reads one structure's
    saved fit with the data it was made on (``purpose``: what needs them, in words, e.g. "predictions").

    Raises a `UserInputError` naming the folder or file when there is no manifest, no fit of
    ``structure`` (None: no fit is needed; the path returned is then None), or when the data file has
    changed since the run (its SHA-256 differs from the manifest's)."""
    from .comparison import load_comparison
    from .data import load_dataset

    run_dir = Path(run_dir)
    manifest = read_manifest(run_dir)
    fit_path = None
    if structure is not None:
        fit_path = RunPaths(run_dir).fit(structure)
        if not fit_path.exists():
            have = sorted(p.stem for p in fit_path.parent.glob("*.nc"))
            raise UserInputError(str(run_dir), [
                f"no fit of structure {structure!r} in {fit_path.parent}; fits there: "
                f"{', '.join(have) or 'none (the run has not finished a structure)'}"])
    comparison = load_comparison(Path(manifest["comparison"]))
    if file_hash(comparison.data.file) != manifest.get("data_sha256"):
        raise UserInputError(str(comparison.data.file), [
            f"the data file has changed since the run (its SHA-256 differs from the manifest's); {purpose} "
            "need the data the fit was made on: restore it, or run `leafcv compare` again"])
    return manifest, comparison, load_dataset(comparison.data), fit_path
