"""Reading a comparison file as TOML: any failure becomes one `SpecError` that says where (line and
column, or the end of the file) and what to do."""
from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Any

from ..errors import Problem, SpecError

_TOML_POSITION_RE = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")
_TOML_END_RE = re.compile(r"\s*\(at end of document\)\s*$")


def read_toml(path: Path) -> dict[str, Any]:
    """The file's TOML tables; raises `SpecError` naming the file when it cannot be read or parsed."""
    try:
        blob = path.read_bytes()
    except OSError as exc:
        reason = exc.strerror or str(exc)
        raise SpecError(str(path), [Problem(f"cannot read the comparison file: {reason}", "unreadable-file",
                                            str(path))]) from None
    try:
        text = blob.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise SpecError(str(path), [Problem(f"the comparison file is not UTF-8 text (byte {exc.start}); save it "
                                            "as UTF-8", "not-utf8", f"byte {exc.start}")]) from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(str(path), [toml_error_problem(exc)]) from None


def toml_error_problem(exc: tomllib.TOMLDecodeError) -> Problem:
    """Say where tomllib found a syntax error: line and column, or the end of the file (code
    ``toml-syntax``; location ``line L, column C``, ``end of file`` or empty when tomllib gives none)."""
    # tomllib gives lineno/colno attributes from Python 3.14 (CPython gh-126175) and only inside its
    # message, as "(at line L, column C)" or "(at end of document)", before that.
    text = str(exc)
    lineno = getattr(exc, "lineno", None)
    colno = getattr(exc, "colno", None)
    if lineno is None:
        match = _TOML_POSITION_RE.search(text)
        if match:
            lineno, colno = int(match.group(1)), int(match.group(2))
    reason = _TOML_END_RE.sub("", _TOML_POSITION_RE.sub("", getattr(exc, "msg", text)))
    if lineno is not None:
        return Problem(f"TOML syntax error at line {lineno}, column {colno}: {reason}", "toml-syntax",
                       f"line {lineno}, column {colno}")
    if _TOML_END_RE.search(text):
        return Problem(f"TOML syntax error at the end of the file: {reason} (is a bracket or quote left open?)",
                       "toml-syntax", "end of file")
    return Problem(f"TOML syntax error: {text}", "toml-syntax")
