"""Reading a run folder's manifest.json (written first by `leafcv compare`), the one check that a folder is a run."""
from __future__ import annotations

import json
from pathlib import Path

from .errors import UserInputError


def read_manifest(run_dir: str | Path) -> dict:
    """The manifest of a run folder; a `UserInputError` naming the folder when it has none."""
    path = Path(run_dir) / "manifest.json"
    if not path.exists():
        raise UserInputError(str(run_dir), ["no manifest.json here: give the run folder written by `leafcv compare`"])
    return json.loads(path.read_text())
