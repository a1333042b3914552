"""The list of term kinds (leafcv.term_kinds): program order, and the columns a structure's terms use."""
from __future__ import annotations

from leafcv.parameters import parameters
from leafcv.smooth import SmoothTrend
from leafcv.spec import ParamSpec, Structure
from leafcv.term_kinds import TERM_KINDS, columns_needed, terms_of
from leafcv.terms import GroupIntercept, LeafEffect, LevelContrasts, RandomSlope, SplitSlope, TraitSlope


def _structure(**vcmax):
    params = {p.name: ParamSpec() for p in parameters(tpu=False)}
    params["vcmax25"] = ParamSpec(**vcmax)
    return Structure("s", params)


def test_every_kind_is_made_in_program_order_with_a_new_kind_last():
    st = _structure(fixed=("month", "leaf_n"), random=("species", "leaf"), split=(("sla", "species"),),
                    slopes=(("leaf_n", "species"),), smooth=("doy",))
    got = terms_of(st, {"leaf_n", "sla", "doy"}, parameters(tpu=False))["vcmax25"]
    assert got == [LevelContrasts("vcmax25", "month"), TraitSlope("vcmax25", "leaf_n"),
                   SplitSlope("vcmax25", "sla", "species"), LeafEffect("vcmax25"),
                   GroupIntercept("vcmax25", "species"), RandomSlope("vcmax25", "species", "leaf_n"),
                   SmoothTrend("vcmax25", "doy")]
    assert TERM_KINDS[-1] == SmoothTrend.of_spec
    assert terms_of(st, {"leaf_n", "sla", "doy"}, parameters(tpu=False))["alpha"] == []


def test_the_columns_a_structure_needs_come_from_its_terms():
    st = _structure(fixed=("month", "leaf_n"), random=("leaf", "site"), smooth=("doy",))
    need = columns_needed(terms_of(st, {"leaf_n", "doy"}, parameters(tpu=False)))
    assert need == {"traits": {"leaf_n", "doy"}, "groups": {"month", "site"}, "fixed_groups": {"month"}}
    assert st.params["vcmax25"].columns_used() == {"month", "leaf_n", "leaf", "site", "doy"}
