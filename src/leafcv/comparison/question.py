"""The question a comparison asks, in the user's words: its top-level ``question`` key, else a comment line
of the file starting "Question". Read when a run is made (`leafcv.runfolder.study_record`) and, for a run
folder written before study.json existed, by `leafcv.runfolder.legacy_study`.

Tests: tests/comparison/test_question.py.
"""
from __future__ import annotations

import re
import tomllib
from pathlib import Path

from ..spec import Comparison


def question_in_comments(text: str) -> str | None:
    """The question stated in the comments of a comparison file's text.

    The first comment line whose text starts "Question", continued over the following comment lines
    until the sentence that holds the first "?" ends (a question written over two comment lines is read
    whole, and what follows its "?" on the same line is left out). None when no comment states one.
    """
    lines = text.splitlines()
    for k, line in enumerate(lines):
        body = line.strip().lstrip("#").strip()
        if not (line.strip().startswith("#") and re.match(r"question\b", body, flags=re.IGNORECASE)):
            continue
        body = re.sub(r"^question\b\s*[:\-]?\s*", "", body, flags=re.IGNORECASE)
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


def question_of(text: str) -> str | None:
    """The question of a comparison file's text: a top-level ``question`` key (TOML) wins, its whitespace
    collapsed; else `question_in_comments`. None when the file states no question."""
    try:
        top = tomllib.loads(text).get("question")
    except tomllib.TOMLDecodeError:
        top = None
    if isinstance(top, str) and top.strip():
        return " ".join(top.split())
    return question_in_comments(text)


def stated_question(comparison: Comparison) -> str | None:
    """The question of a loaded comparison: its ``question`` key (whitespace collapsed), else the question in
    the comments of its file (read again for them: the TOML reader drops comments). None when neither."""
    if comparison.question.strip():
        return " ".join(comparison.question.split())
    path = Path(comparison.path)
    return question_in_comments(path.read_text(encoding="utf-8-sig")) if path.is_file() else None
