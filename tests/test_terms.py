"""Term objects (leafcv.terms) placed on the quick demo's leaves, checked against the coding each term
claims: treatment contrasts, group-mean centring, random intercepts and slopes, leaf effects."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from leafcv.design import trait_transforms
from leafcv.parameters import parameters
from leafcv.priors import PriorSet
from leafcv.spec import ParamSpec
from leafcv.terms import (
    MIN_LEAVES_CENTRED_GROUP, GroupIntercept, LeafEffect, LevelContrasts, RandomSlope, SplitSlope, TermContext,
    TraitSlope,
)
from leafcv.term_kinds import terms_of


@pytest.fixture
def ctx(quick_demo):
    comparison, dataset, _ = quick_demo
    L = dataset.n_leaves
    st = comparison.structure("traits-month-fixed")
    return TermContext(st, dataset.leaves, trait_transforms(dataset, comparison.data), PriorSet(),
                       np.ones(L, bool), np.full(L, 12), None, {})


def test_level_contrasts_are_treatment_coded_against_the_first_level(ctx):
    cols = LevelContrasts("vcmax25", "campaign").columns(ctx)
    levels = sorted(ctx.leaves["campaign"].astype(str).unique())
    assert [c.label for c, _ in cols] == [f"campaign={lev}" for lev in levels[1:]]
    X = np.column_stack([x for _, x in cols])
    is_ref = (ctx.leaves["campaign"].astype(str) == levels[0]).to_numpy()
    assert np.all(X[is_ref] == 0) and np.all(X[~is_ref].sum(axis=1) == 1)


def test_a_split_slope_is_group_mean_centred(ctx):
    # group-mean centring (Enders & Tofighi 2007, from memory): within + between = the centred trait;
    # the between column is the group's mean, the within column sums to zero in each group
    (cw, within), (cb, between) = SplitSlope("alpha", "n_area", "taxon").columns(ctx)
    assert (cw.kind, cb.kind) == ("within", "between")
    np.testing.assert_allclose(within + between, ctx.scaled("n_area"), atol=1e-12)
    frame = pd.DataFrame({"g": ctx.leaves["taxon"].astype(str), "w": within, "b": between})
    np.testing.assert_allclose(frame.groupby("g")["w"].sum(), 0.0, atol=1e-12)
    assert (frame.groupby("g")["b"].nunique() == 1).all()


def test_a_trait_slope_acts_on_the_centred_and_scaled_trait(ctx):
    (coef, col), = TraitSlope("alpha", "chl_ug").columns(ctx)
    c, s = ctx.transforms["chl_ug"]
    assert (c, s) == (45.0, 10.0)               # the demo file's [data.leaf.centre] and [data.leaf.scale]
    np.testing.assert_allclose(col, (ctx.leaves["chl_ug"].to_numpy(float) - 45.0) / 10.0)
    assert coef.prior_sd == PriorSet().slope_sd_logit


def test_group_effects_are_centred_by_training_leaves_per_level(ctx):
    gi = GroupIntercept("vcmax25", "taxon").place(ctx, start=3, has_leaf_term=False)
    per_level = ctx.leaves["taxon"].astype(str).value_counts()
    assert gi.start == 3 and gi.levels == tuple(sorted(per_level.index))
    assert gi.centred == tuple(per_level[lev] >= 2 for lev in gi.levels)
    np.testing.assert_array_equal(gi.x, 1.0)
    with_leaf = GroupIntercept("vcmax25", "taxon").place(ctx, start=0, has_leaf_term=True)
    assert with_leaf.centred == tuple(per_level[lev] >= MIN_LEAVES_CENTRED_GROUP for lev in with_leaf.levels)
    rs = RandomSlope("alpha", "taxon", "chl_ug").place(ctx, start=0, has_leaf_term=False)
    assert rs.slope_of == "chl_ug" and rs.label == "taxon-specific slopes of alpha on chl_ug"
    np.testing.assert_allclose(rs.x, ctx.scaled("chl_ug"))
    np.testing.assert_array_equal(np.asarray(rs.levels)[rs.level_of_leaf], ctx.leaves["taxon"].astype(str))


def test_held_out_leaves_are_never_centred(ctx):
    train = np.ones(len(ctx.leaves), bool)
    train[:3] = False
    held = TermContext(ctx.structure, ctx.leaves, ctx.transforms, ctx.priors, train, np.where(train, 12, 0))
    lt = LeafEffect("vcmax25").place(held)
    assert not lt.centred[:3].any() and lt.centred[3:].all()
    assert "held-out leaves non-centred" in lt.reason


def test_terms_of_lists_each_parameters_terms_in_program_order(quick_demo):
    comparison, dataset, _ = quick_demo
    st = comparison.structure("traits-month-fixed")
    terms = terms_of(st, set(dataset.traits), parameters(tpu=False))
    assert terms["vcmax25"] == [TraitSlope("vcmax25", "n_area"), LevelContrasts("vcmax25", "campaign"),
                                LeafEffect("vcmax25")]
    assert terms["alpha"] == [TraitSlope("alpha", "chl_ug"), TraitSlope("alpha", "sla_m2kg"), LeafEffect("alpha")]
    assert terms["jmax25"] == [] and terms["theta"] == []
    st2 = type(st)(name="x", params={"vcmax25": ParamSpec(random=("leaf", "taxon"), slopes=(("n_area", "taxon"),))})
    t2 = terms_of(st2, set(dataset.traits), parameters(tpu=False))["vcmax25"]
    assert t2 == [LeafEffect("vcmax25"), GroupIntercept("vcmax25", "taxon"), RandomSlope("vcmax25", "taxon", "n_area")]
