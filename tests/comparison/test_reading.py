"""Tests of leafcv.comparison.reading: the TOML file and where its syntax errors are.

Outside reference: Python's own TOML reader (tomllib, PEP 680) and the positions it reports."""
from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from leafcv.comparison import load_comparison
from leafcv.errors import SpecError

from .common import problems_of


def test_toml_syntax_error_names_line(tmp_path: Path) -> None:
    # tomllib reports the position of a syntax error; the message passes its line on.
    text = 'format = 1\n[sampler]\nchains = \n'
    problems = problems_of(tmp_path, text)
    assert len(problems) == 1
    assert problems[0].startswith("TOML syntax error at line 3, column")
    with pytest.raises(tomllib.TOMLDecodeError, match="line 3"):
        tomllib.loads(text)

    assert problems[0].code == "toml-syntax" and problems[0].location.startswith("line 3, column ")


def test_toml_error_at_end_of_file(tmp_path: Path) -> None:
    # tomllib (Python 3.11) reports an unclosed list as "Invalid value (at end of document)".
    problems = problems_of(tmp_path, 'format = 1\ngroups = ["a",\n')
    assert len(problems) == 1
    assert problems[0].startswith("TOML syntax error at the end of the file: Invalid value")

    assert problems[0].code == "toml-syntax" and problems[0].location == "end of file"


def test_missing_comparison_file(tmp_path: Path) -> None:
    path = tmp_path / "absent.toml"
    with pytest.raises(SpecError) as info:
        load_comparison(path)
    assert info.value.source == str(path)
    assert info.value.problems[0].startswith("cannot read the comparison file")

    assert info.value.problems[0].code == "unreadable-file"


def test_comparison_file_not_utf8(tmp_path: Path) -> None:
    # b"\xff" cannot start a UTF-8 sequence (RFC 3629), so decoding stops at byte 10.
    path = tmp_path / "latin.toml"
    path.write_bytes(b"format = 1\xff\n")
    with pytest.raises(SpecError) as info:
        load_comparison(path)
    (problem,) = info.value.problems
    assert problem == "the comparison file is not UTF-8 text (byte 10); save it as UTF-8"
    assert problem.code == "not-utf8" and problem.location == "byte 10"
