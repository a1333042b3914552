"""Tests of leafcv.comparison.load: the whole file (top-level keys, format, at least one structure), and
every problem of a file reported in one SpecError."""
from __future__ import annotations

from pathlib import Path

import pytest

from .common import CV, SAMPLER, STRUCTURE, assert_bad_case, compose, problems_of


BAD_CASES = {
    "unknown top-level key with suggestion": (
        compose(extra="samplr = 3\n"),
        ["unknown key 'samplr'; did you mean 'sampler'? valid keys: format, question, data, sampler, cv, model, priors, structure, grid"],
        "unknown-key",
    ),
    "format missing": (
        compose(fmt=""),
        ["format is missing; add `format = 2`"],
        "missing-key",
    ),
    "format 3": (
        compose(fmt="format = 3\n"),
        ["format = 3 is not supported", "reads formats 1, 2"],
        "unsupported-format",
    ),
    "format-2 keys in a format-1 file": (
        compose(extra='[model]\ntpu = true\n'),
        ["format 1 has no model; set `format = 2`"],
        "needs-format-2",
    ),
    "no structure": (
        compose(structures=""),
        ["no [[structure]] or [[grid]] found"],
        "no-structure",
    ),
}


@pytest.mark.parametrize("case", list(BAD_CASES))
def test_bad_file(tmp_path: Path, case: str) -> None:
    # Rules of the comparison file as agreed (task brief; comparison-example.toml), and the code of each.
    text, fragments, code = BAD_CASES[case]
    assert_bad_case(tmp_path, case, text, fragments, code)


def test_several_problems_reported_together(tmp_path: Path) -> None:
    # One SpecError lists every problem, so one run of `leafcv check` shows them all.
    text = compose(
        fmt="",
        sampler=SAMPLER.replace("chains = 2", "chains = 2.5"),
        cv=CV.replace('"auto"', '"fast"'),
        structures=STRUCTURE.replace('["leaf_n"]', '["nitrogen"]') + 'alpha = { ratio_to = "vcmax25" }\n',
    )
    problems = problems_of(tmp_path, text)
    expected = [
        "format is missing",
        "sampler.chains: expected a positive integer, got a number (2.5)",
        "cv.method: unknown method 'fast'",
        "structure 'traits', vcmax25.fixed: unknown term 'nitrogen'",
        "structure 'traits', alpha.ratio_to:",
    ]
    assert len(problems) == len(expected)
    for fragment in expected:
        assert sum(fragment in p for p in problems) == 1, fragment


def test_problems_carry_their_locations(tmp_path: Path) -> None:
    # The same file as above: callers act on codes and locations, never on the words.
    text = compose(
        fmt="",
        sampler=SAMPLER.replace("chains = 2", "chains = 2.5"),
        cv=CV.replace('"auto"', '"fast"'),
        structures=STRUCTURE.replace('["leaf_n"]', '["nitrogen"]') + 'alpha = { ratio_to = "vcmax25" }\n',
    )
    found = {(p.code, p.location) for p in problems_of(tmp_path, text)}
    assert found == {
        ("missing-key", "format"),
        ("wrong-type", "sampler.chains"),
        ("unknown-choice", "cv.method"),
        ("unknown-term", "structure 'traits', vcmax25.fixed"),
        ("ratio-not-allowed", "structure 'traits', alpha.ratio_to"),
    }


def test_a_question_key_is_kept_and_must_be_text(tmp_path):
    from leafcv.comparison import load_comparison

    from .common import write

    c = load_comparison(write(tmp_path, compose(extra='question = "is month better fixed or random?"\n')))
    assert c.question == "is month better fixed or random?"
    problems = problems_of(tmp_path, compose(extra="question = 3\n"))
    assert any(p.code == "wrong-type" and p.location == "question" for p in problems)
