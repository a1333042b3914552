"""Fold assignment and the K-fold path of cross-validation."""
from __future__ import annotations

import numpy as np
import pytest

from leafcv.cv.methods import cross_validate, folds_for
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec


@pytest.mark.parametrize("by,method,k", [("leaf", "exact", 0), ("leaf", "kfold", 5), ("taxon", "exact", 0),
                                         ("campaign", "kfold", 2)])
def test_folds_partition_the_leaves(quick_demo, by, method, k):
    _, dataset, _ = quick_demo
    folds = folds_for(dataset, by, method, k, seed=4)
    allocated = np.sort(np.concatenate(folds))
    np.testing.assert_array_equal(allocated, np.arange(dataset.n_leaves))   # every leaf exactly once
    if by != "leaf":   # grouped folds never split a level of the grouping
        levels = dataset.leaves[by].astype(str).to_numpy()
        for f in folds:
            others = np.setdiff1d(np.arange(dataset.n_leaves), f)
            assert not set(levels[f]) & set(levels[others])
    if method == "kfold":
        assert len(folds) == k
        again = folds_for(dataset, by, method, k, seed=4)
        assert all(np.array_equal(a, b) for a, b in zip(folds, again))     # seeded


@pytest.mark.stan
def test_kfold_scores_every_leaf_once(quick_demo):
    comparison, dataset, _ = quick_demo
    sampler = SamplerSpec(chains=2, warmup=200, draws=200, seed=9)
    res, det = cross_validate(comparison.structure("leaf-vcmax-alpha"), dataset, comparison, method="kfold",
                              folds=2, leaf_fits=fit_leaves(dataset), sampler=sampler)
    assert res.method == "kfold" and res.n_refits == 2
    assert np.all(np.isfinite(res.elpd_i)) and len(res.elpd_i) == dataset.n_leaves
    # a held-out leaf is scored jointly over its 24 points: its elpd is a sum of 24 log densities
    # with residual SD near 0.5, so far below one point's best log density (~ -0.2)
    assert np.all(res.elpd_i < -5)
    assert set(res.rmse) == {"all", "aci", "aq"} and res.r2["all"] > 0.5
