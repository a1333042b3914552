"""Stan program text: the one text step leafcv allows is inlining `#include`d files.

PyStan 3 takes program text without include paths, so `#include NAME` lines are replaced by the
file NAME from the same folder. cmdstanpy can include the files itself.

Tests: tests/sampling/stan/test_leafcv.py, tests/sampling/stan/test_fvcb_functions.py.
"""
from __future__ import annotations

import re
from pathlib import Path

STAN_DIR = Path(__file__).resolve().parent.parent / "stan"
_INCLUDE = re.compile(r"^\s*#include\s+[<\"]?([\w./-]+)[>\"]?\s*$", re.MULTILINE)


def program_path(name: str = "leafcv") -> Path:
    """Path of a Stan program shipped with leafcv (``name`` without ``.stan``)."""
    return STAN_DIR / f"{name}.stan"


def inline_includes(text: str, folder: Path, _depth: int = 0) -> str:
    """Replace every ``#include FILE`` line by the text of FILE (relative to ``folder``)."""
    if _depth > 5:
        raise ValueError("#include nested more than 5 deep")

    def repl(match: re.Match[str]) -> str:
        path = folder / match.group(1)
        if not path.is_file():
            raise FileNotFoundError(f"#include {match.group(1)}: no file {path}")
        return inline_includes(path.read_text(), path.parent, _depth + 1)

    return _INCLUDE.sub(repl, text)


def program_text(path: Path | str | None = None) -> str:
    """Full text of a Stan program with its includes inlined (default: leafcv's generic program)."""
    path = Path(path) if path is not None else program_path()
    return inline_includes(path.read_text(), path.parent)
