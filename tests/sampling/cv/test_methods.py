"""Cross-validation (leafcv.cv.methods) with the sampler: the K-fold path scores every leaf once. The logic of
folds, retries and spot checks without a sampler: tests/cv/test_methods.py."""
from __future__ import annotations

import numpy as np

from leafcv.cv.plan import cross_validate
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec


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
