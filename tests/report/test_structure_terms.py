"""Terms of each structure from its parameter record in the manifest (data, as ``compare.structure_record``
writes it; never from the words of structures.txt), and one-term differences in words."""
from __future__ import annotations

import json
from dataclasses import asdict

import pytest

from leafcv.report.terms import one_term_difference, one_term_pairs, structure_terms
from leafcv.spec import ModelOptions, ParamSpec, Structure

RATIO = {"jmax25": ParamSpec(ratio_to="vcmax25"), "rd25": ParamSpec(ratio_to="vcmax25")}
WIDE = Structure("wide", {
    "vcmax25": ParamSpec(fixed=("n_area", "month"), random=("leaf", "species"), centring={"leaf": "centred"},
                         slopes=(("n_area", "species"),)),
    "alpha": ParamSpec(split=(("chl", "species"),), random=("leaf",)), "theta": ParamSpec(), **RATIO})


def _record(st: Structure) -> dict:
    """The manifest's record of a structure, as `leafcv.compare.structure_record` writes it (through JSON, so
    tuples come back as lists)."""
    return json.loads(json.dumps({"origin": "", "model": asdict(st.options), "leaf_correlation": st.leaf_correlation,
                                  "priors": [], "params": {p: asdict(s) for p, s in st.params.items()}}))


def test_a_params_record_gives_every_term():
    terms = structure_terms({"structures": {"wide": _record(WIDE)}})["wide"]
    assert {k: v for k, v in terms.items() if k[0] != "model"} == {
        ("vcmax25", "n_area"): "fixed", ("vcmax25", "month"): "fixed", ("vcmax25", "leaf"): "random",
        ("vcmax25", "species"): "random", ("vcmax25", "n_area|species"): "slopes",
        ("alpha", "chl"): "split:species", ("alpha", "leaf"): "random",
        ("jmax25", "vcmax25"): "ratio", ("rd25", "vcmax25"): "ratio"}
    assert terms[("model", "student_t")] is False and terms[("model", "leaf_correlation")] is False


def test_a_record_without_params_is_left_out_and_the_words_are_not_read():
    # a record of a leafcv older than the report: no parameter record, so no terms, whatever structures.txt says
    old = {k: v for k, v in _record(WIDE).items() if k != "params"}
    assert structure_terms({"structures": {"wide": old, "other": _record(WIDE)}}) == {
        "other": structure_terms({"structures": {"other": _record(WIDE)}})["other"]}


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
    terms = structure_terms({"structures": {"A": _record(sa), "B": _record(sb)}})
    assert one_term_difference(terms["A"], terms["B"], "A", "B") == words


def test_a_model_option_is_a_term():
    shared = {"alpha": ParamSpec(), "theta": ParamSpec(), **RATIO}
    base = Structure("A", {"vcmax25": ParamSpec(), **shared})
    robust = Structure("B", {"vcmax25": ParamSpec(), **shared}, options=ModelOptions(student_t=True))
    both = Structure("C", {"vcmax25": ParamSpec(random=("leaf",)), **shared}, options=ModelOptions(student_t=True))
    recs = {s.name: _record(s) for s in (base, robust, both)}
    terms = structure_terms({"structures": recs})
    assert one_term_pairs(["A", "B", "C"], terms) == [
        ("A", "B", "normal likelihood in A, Student-t likelihood in B"), ("B", "C", "C adds leaf effects on vcmax25")]


def test_terms_record_themselves_and_a_smooth_is_a_term_of_its_own(quick_demo):
    # the manifest record compare writes carries each term as its term object records it; a smooth trend is
    # one term, so the smooth structure and month as fixed levels differ in two terms (no one-term contrast),
    # and dropping the smooth is one
    from dataclasses import replace

    from leafcv.compare import structure_record

    comparison, dataset, _ = quick_demo
    smooth = comparison.structure("traits-season-smooth")
    params = dict(smooth.params)
    params["vcmax25"] = replace(params["vcmax25"], smooth=())
    plain = replace(smooth, name="no-season", params=params)
    recs = {st.name: json.loads(json.dumps(structure_record(st, dataset, comparison)))
            for st in (smooth, plain, comparison.structure("traits-month-fixed"))}
    terms = structure_terms({"structures": recs})
    assert one_term_pairs(["traits-season-smooth", "no-season", "traits-month-fixed"], terms) == [
        ("traits-season-smooth", "no-season", "traits-season-smooth adds a smooth trend of vcmax25 over day_of_year"),
        ("no-season", "traits-month-fixed", "traits-month-fixed adds a fixed effect of campaign on vcmax25")]
    # the recorded terms are those the parameter specs give, term for term
    wide = json.loads(json.dumps(structure_record(comparison.structure("traits-month-random"), dataset, comparison)))
    legacy = {k: v for k, v in wide.items() if k != "terms"}
    got = structure_terms({"structures": {"new": wide, "old": legacy}})
    assert {k: getattr(v, "how", v) for k, v in got["new"].items()} == got["old"]
