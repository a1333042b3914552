"""Terms of each structure read back from structures.txt (as leafcv writes it) and from a parameter record,
one-term differences in words, and the question of a comparison file."""
from __future__ import annotations

from dataclasses import asdict
from types import SimpleNamespace

import pytest

from leafcv.compare import structures_text
from leafcv.report.run import question_of
from leafcv.report.terms import one_term_difference, one_term_pairs, structure_terms, terms_from_text
from leafcv.spec import ModelOptions, ParamSpec, Structure

RATIO = {"jmax25": ParamSpec(ratio_to="vcmax25"), "rd25": ParamSpec(ratio_to="vcmax25")}
WIDE = Structure("wide", {
    "vcmax25": ParamSpec(fixed=("n_area", "month"), random=("leaf", "species"), centring={"leaf": "centred"},
                         slopes=(("n_area", "species"),)),
    "alpha": ParamSpec(split=(("chl", "species"),), random=("leaf",)), "theta": ParamSpec(), **RATIO})


def _record(st: Structure) -> dict:
    return {"origin": "", "model": asdict(st.options), "leaf_correlation": st.leaf_correlation, "priors": []}


def test_structures_txt_is_read_back_term_by_term():
    text = structures_text(SimpleNamespace(structures=[WIDE]), {"wide": _record(WIDE)})
    assert terms_from_text(text)["wide"] == {
        ("vcmax25", "n_area"): "fixed", ("vcmax25", "month"): "fixed", ("vcmax25", "leaf"): "random",
        ("vcmax25", "species"): "random", ("vcmax25", "n_area|species"): "slopes",
        ("alpha", "chl"): "split:species", ("alpha", "leaf"): "random",
        ("jmax25", "vcmax25"): "ratio", ("rd25", "vcmax25"): "ratio"}


def test_a_params_record_in_the_manifest_gives_the_same_terms_as_structures_txt():
    text = structures_text(SimpleNamespace(structures=[WIDE]), {"wide": _record(WIDE)})
    with_params = {"structures": {"wide": {**_record(WIDE), "params": {p: asdict(s) for p, s in WIDE.params.items()}}}}
    without = {"structures": {"wide": _record(WIDE)}}
    assert structure_terms(with_params, "") == structure_terms(without, text)


@pytest.mark.parametrize("a, b, words", [
    (ParamSpec(fixed=("n_area", "month")), ParamSpec(fixed=("n_area",), random=("month",)),
     "a fixed effect of month on vcmax25 in A, random month effects on vcmax25 in B"),
    (ParamSpec(random=("leaf",)), ParamSpec(), "A adds leaf effects on vcmax25"),
    (ParamSpec(), ParamSpec(fixed=("n_area",)), "B adds a fixed effect of n_area on vcmax25"),
    (ParamSpec(fixed=("n_area",)), ParamSpec(split=(("n_area", "species"),)),
     "a fixed effect of n_area on vcmax25 in A, separate within- and between-species slopes of vcmax25 on n_area in B"),
    (ParamSpec(fixed=("n_area", "chl")), ParamSpec(), None),                  # two terms
    (ParamSpec(fixed=("n_area",)), ParamSpec(fixed=("n_area",)), None),       # none
])
def test_one_term_differences_in_words(a, b, words):
    mk = lambda name, v: Structure(name, {"vcmax25": v, "alpha": ParamSpec(), "theta": ParamSpec(), **RATIO})  # noqa: E731
    sa, sb = mk("A", a), mk("B", b)
    text = structures_text(SimpleNamespace(structures=[sa, sb]), {"A": _record(sa), "B": _record(sb)})
    terms = structure_terms({"structures": {"A": _record(sa), "B": _record(sb)}}, text)
    assert one_term_difference(terms["A"], terms["B"], "A", "B") == words


def test_a_model_option_is_a_term():
    shared = {"alpha": ParamSpec(), "theta": ParamSpec(), **RATIO}
    base = Structure("A", {"vcmax25": ParamSpec(), **shared})
    robust = Structure("B", {"vcmax25": ParamSpec(), **shared}, options=ModelOptions(student_t=True))
    both = Structure("C", {"vcmax25": ParamSpec(random=("leaf",)), **shared}, options=ModelOptions(student_t=True))
    recs = {s.name: _record(s) for s in (base, robust, both)}
    terms = structure_terms({"structures": recs}, structures_text(SimpleNamespace(structures=[base, robust, both]), recs))
    assert one_term_pairs(["A", "B", "C"], terms) == [
        ("A", "B", "normal likelihood in A, Student-t likelihood in B"), ("B", "C", "C adds leaf effects on vcmax25")]


def test_the_question_of_a_comparison_file():
    key = 'question = "Does leaf N act alike within and across species?"\n# Question: not this one?\nformat = 2\n'
    assert question_of(key) == "Does leaf N act alike within and across species?"
    two_lines = "# intro\n# Question: which traits shift Vcmax25, and is month better\n# fixed or random? Read on.\n"
    assert question_of(two_lines) == "which traits shift Vcmax25, and is month better fixed or random?"
    assert question_of("# Question: is month needed?\n# next line\n") == "is month needed?"
    assert question_of("# Questions are welcome\nformat = 2\n") is None          # "Question" as a word only
    assert question_of("format = 2\n# no question here\n") is None
