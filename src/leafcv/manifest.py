"""Reading a run folder: its manifest.json (written first by `leafcv compare`, the one check that a folder
is a run), the numbers of its JSON files, and the SHA-256 of its inputs and outputs."""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

from .errors import UserInputError


def read_manifest(run_dir: str | Path) -> dict:
    """The manifest of a run folder; a `UserInputError` naming the folder when it has none."""
    path = Path(run_dir) / "manifest.json"
    if not path.exists():
        raise UserInputError(str(run_dir), ["no manifest.json here: give the run folder written by `leafcv compare`"])
    return json.loads(path.read_text())


def file_hash(path: str | Path) -> str:
    """SHA-256 of a file, read in 1 MiB blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def json_float(value: object) -> float:
    """One number of a run's JSON files read back: null as NaN, "inf"/"-inf" as infinities."""
    return float("nan") if value is None else float(value)
