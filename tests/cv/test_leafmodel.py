"""A held-out leaf's residual SD comes from the curve types of the training points (the design's
order), not from the curve types of the whole data set. No sampler: one random parameter point."""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from leafcv.cv.leafmodel import LeafModel, flatten_draws
from leafcv.design import build_design, leaf_link_values
from leafcv.errors import SpecError

from reference.programs import random_generic_point


def _only_leaf0_has_aci(dataset):
    obs = dataset.obs
    keep = (obs["curve_type"] == "aq") | (obs["leaf_index"] == 0)
    return replace(dataset, obs=obs[keep].reset_index(drop=True))


def test_residual_sd_of_a_held_out_leaf_follows_the_training_curve_types(quick_demo):
    comparison, dataset, _ = quick_demo
    ds = _only_leaf0_has_aci(dataset)
    st = comparison.structure("traits-month-fixed")
    st = replace(st, options=replace(st.options, sigma_by_curve=True))
    L = ds.n_leaves
    train = np.ones(L, bool)
    train[[0, 1]] = False                      # leaf 0 (the only one with A-Ci curves) and leaf 1 held out
    design = build_design(st, ds, comparison.data, train_leaves=train)
    assert design.sigma_kinds == ("aq",)       # training points have A-Q curves only: one residual SD
    point = random_generic_point(design, np.random.default_rng(5))
    point["sigma"] = np.array([0.37])
    draws = flatten_draws({k: np.asarray(v, float)[None, None, ...] for k, v in point.items()})
    lv = leaf_link_values(design, draws)
    lm = LeafModel(design, ds, draws, lv, 1)   # an A-Q-only leaf takes the A-Q residual SD
    np.testing.assert_allclose(lm.sigma, 0.37)
    with pytest.raises(SpecError) as err:      # an A-Ci leaf has no trained residual SD: refused, named
        LeafModel(design, ds, draws, lv, 0)
    text = str(err.value)
    assert "L001" in text and "aci" in text
