"""Tests of leafcv.comparison.checker: each check reports one Problem (text, code, location) and returns
what is usable, so a parser carries on and every problem of a file is reported at once."""
from __future__ import annotations

import math

import pytest

from leafcv.comparison.checker import Checker
from leafcv.errors import Problem


def only(check: Checker) -> Problem:
    """The one problem ``check`` holds."""
    assert len(check.problems) == 1, check.problems
    return check.problems[0]


def test_no_problem_leaves_the_checker_empty() -> None:
    check = Checker()
    assert check.integer(4, "sampler.chains", 1, None, "a positive integer") == 4
    assert check.number(0.9, "sampler.adapt_delta", lambda x: 0 < x < 1, "a number") == 0.9
    assert check.text("leaf", "cv.by") == "leaf"
    assert check.table({"a": 1}, "cv") == {"a": 1}
    assert check.flag(False, "model.tpu") is False
    assert check.choice("kfold", "cv.method", ("auto", "kfold"), "method") == "kfold"
    assert check.text_list(["a", "b"], "data.leaf.groups") == ["a", "b"]
    check.keys({"by": "leaf"}, ("by", "method"), "cv")
    assert not check and check.problems == []


def test_problem_and_extend_keep_code_and_location() -> None:
    check = Checker()
    check.problem("structure 'x': something", "some-code", "structure 'x'")
    check.extend([Problem("data.columns: other", "other-code", "data.columns.leaf")])
    assert check
    assert [(p, p.code, p.location) for p in check.problems] == [
        ("structure 'x': something", "some-code", "structure 'x'"),
        ("data.columns: other", "other-code", "data.columns.leaf"),
    ]


def test_unknown_keys_with_suggestion_and_location() -> None:
    check = Checker()
    check.keys({"by": "leaf", "methd": "auto"}, ("by", "method", "folds"), "cv")
    problem = only(check)
    assert problem == "cv: unknown key 'methd'; did you mean 'method'? valid keys: by, method, folds"
    assert (problem.code, problem.location) == ("unknown-key", "cv.methd")


def test_unknown_top_level_key_is_located_by_itself() -> None:
    check = Checker()
    check.keys({"zzz": 1}, ("format", "data"), "")
    problem = only(check)
    assert problem == "unknown key 'zzz'; valid keys: format, data"
    assert problem.location == "zzz"


def test_table_of_the_wrong_type_is_empty() -> None:
    check = Checker()
    assert check.table([1, 2], "sampler") == {}
    problem = only(check)
    assert problem == "sampler: expected a table, got a list"
    assert (problem.code, problem.location) == ("wrong-type", "sampler")


@pytest.mark.parametrize("value, text, code", [
    ("4", "sampler.chains: expected a positive integer, got a string ('4')", "wrong-type"),
    (True, "sampler.chains: expected a positive integer, got true/false (true)", "wrong-type"),
    (2.0, "sampler.chains: expected a positive integer, got a number (2)", "wrong-type"),
    (0, "sampler.chains: expected a positive integer, got 0", "out-of-range"),
])
def test_integer(value, text: str, code: str) -> None:
    check = Checker()
    assert check.integer(value, "sampler.chains", 1, None, "a positive integer") is None
    problem = only(check)
    assert (problem, problem.code, problem.location) == (text, code, "sampler.chains")


def test_integer_upper_limit() -> None:
    check = Checker()
    assert check.integer(20, "sampler.max_treedepth", 1, 20, "an integer from 1 to 20") == 20
    assert check.integer(21, "sampler.max_treedepth", 1, 20, "an integer from 1 to 20") is None
    assert only(check) == "sampler.max_treedepth: expected an integer from 1 to 20, got 21"


@pytest.mark.parametrize("value, text, code", [
    (-1, "x: expected a number > 0, got -1", "out-of-range"),
    ("1", "x: expected a number > 0, got a string ('1')", "wrong-type"),
])
def test_number(value, text: str, code: str) -> None:
    check = Checker()
    assert check.number(value, "x", lambda x: x > 0, "a number > 0") is None
    problem = only(check)
    assert (problem, problem.code) == (text, code)


@pytest.mark.parametrize("value, shown", [(math.nan, "nan"), (math.inf, "inf"), (-math.inf, "-inf")])
def test_number_not_finite_is_refused_whatever_the_rule(value: float, shown: str) -> None:
    # TOML writes nan and inf as floats (TOML 1.0, "Float"); a rule that accepts every number must not
    # let them through.
    check = Checker()
    assert check.number(value, "data.leaf.centre.n", lambda x: True, "a number") is None
    problem = only(check)
    assert (problem, problem.code) == (f"data.leaf.centre.n: expected a number, got {shown}", "out-of-range")


def test_number_returns_a_float() -> None:
    value = Checker().number(3, "x", lambda x: x > 0, "a number > 0")
    assert value == 3.0 and isinstance(value, float)


def test_flag() -> None:
    check = Checker()
    assert check.flag("yes", "model.tpu") is None
    problem = only(check)
    assert problem == "model.tpu: expected true or false, got a string ('yes')" and problem.code == "wrong-type"


@pytest.mark.parametrize("value, text, code", [
    (3, "data.file: expected a string, got an integer (3)", "wrong-type"),
    ("  ", "data.file: is empty", "empty-value"),
])
def test_text(value, text: str, code: str) -> None:
    check = Checker()
    assert check.text(value, "data.file") is None
    problem = only(check)
    assert (problem, problem.code, problem.location) == (text, code, "data.file")


def test_choice_unknown_word_and_wrong_type() -> None:
    check = Checker()
    assert check.choice("centered", "x.centring.leaf", ("auto", "centred", "noncentred"), "choice") is None
    assert check.choice(1, "x.centring.leaf", ("auto", "centred", "noncentred"), "choice") is None
    first, second = check.problems
    assert first == ("x.centring.leaf: unknown choice 'centered'; did you mean 'centred'? "
                     "valid choices: auto, centred, noncentred")
    assert first.code == "unknown-choice"
    assert second == "x.centring.leaf: expected one of auto, centred, noncentred, got an integer (1)"
    assert second.code == "wrong-type"


def test_text_list_reports_every_bad_entry_and_keeps_the_rest() -> None:
    check = Checker()
    kept = check.text_list(["a", 3, "", "b", "a"], "x.fixed")
    assert kept == ["a", "b"]
    assert [(p, p.code) for p in check.problems] == [
        ("x.fixed: entries must be strings, got an integer (3)", "wrong-type"),
        ("x.fixed: has an empty entry", "empty-value"),
        ("x.fixed: repeated entry 'a'; list each term once", "repeated-entry"),
    ]
    assert {p.location for p in check.problems} == {"x.fixed"}


def test_text_list_lone_string_is_reported_once_and_used() -> None:
    # A lone string is kept as a one-entry list, so later checks do not repeat the same mistake.
    check = Checker()
    assert check.text_list("species", "data.leaf.groups") == ["species"]
    problem = only(check)
    assert problem == 'data.leaf.groups: expected a list of strings, e.g. ["species"], got a string (\'species\')'
    assert problem.code == "wrong-type"
    other = Checker()
    assert other.text_list({"a": 1}, "data.leaf.groups") == []
    assert only(other) == "data.leaf.groups: expected a list of strings, got a table"
