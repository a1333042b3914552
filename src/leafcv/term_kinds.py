"""Every kind of term a structure can have, in program order, and `terms_of`, which makes them.

One line per kind: the function that reads that kind's terms off one parameter's `leafcv.spec.ParamSpec`.
The order is the order terms are placed in the design (fixed columns as listed, within/between splits,
the leaf effect, random intercepts, random slopes, smooth trends), so a new kind goes at the end and never
moves an existing structure's columns.

Tests: tests/test_term_kinds.py.
"""
from __future__ import annotations

from .parameters import Parameter
from .smooth import SmoothTrend
from .spec import Structure
from .terms import FixedTerm, GroupIntercept, LeafEffect, RandomSlope, SplitSlope

TERM_KINDS = (
    FixedTerm.of_spec,          # trait slopes and level contrasts (leafcv.terms)
    SplitSlope.of_spec,         # within/between slopes
    LeafEffect.of_spec,         # leaf effects
    GroupIntercept.of_spec,     # random intercepts of groupings
    RandomSlope.of_spec,        # random slopes
    SmoothTrend.of_spec,        # penalised splines over a leaf covariate (leafcv.smooth)
)


def terms_of(structure: Structure, traits, params: tuple[Parameter, ...]) -> dict[str, list]:
    """Every term of ``structure`` per parameter, in program order."""
    out: dict[str, list] = {}
    for p in params:
        spec = structure.params.get(p.name)
        out[p.name] = [t for kind in TERM_KINDS for t in kind(p.name, spec, traits)] if spec is not None else []
    return out


def columns_needed(terms: dict[str, list]) -> dict[str, set[str]]:
    """The data columns the terms use: {"traits": ..., "groups": ..., "fixed_groups": ...}."""
    out: dict[str, set[str]] = {"traits": set(), "groups": set(), "fixed_groups": set()}
    for ts in terms.values():
        for t in ts:
            for role, names in t.needs().items():
                out[role] |= names
    return out
