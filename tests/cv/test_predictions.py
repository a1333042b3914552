"""Held-out predictions for the report (leafcv.cv.predictions): the interval of a new observation is the
quantile of a mixture of normals, checked against SciPy; the point table and the curves of a
cross-validation (fake engine, no sampler) agree with the scores and the data."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from leafcv.cv.plan import cross_validate
from leafcv.cv.predictions import GRID_POINTS, _mixture_quantile, leaf_grid
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec
from ..fakes import FakeEngine


def test_one_component_gives_the_normal_quantile():
    # closed form: the q quantile of N(m, s) is m + s Phi^-1(q) (scipy.stats.norm.ppf)
    loc, scale = np.array([[3.0, -2.0, 10.0]]), np.array([[0.5, 2.0, 1.5]])
    for q in (0.05, 0.5, 0.95):
        got = _mixture_quantile(q, np.array([1.0]), loc, scale, None)
        np.testing.assert_allclose(got, stats.norm.ppf(q, loc[0], scale[0]), atol=1e-9)


@pytest.mark.parametrize("nu", [None, np.array([4.0, 9.0, 30.0])])
def test_a_weighted_mixture_quantile_matches_a_root_of_its_cdf(nu):
    # reference: SciPy's brentq on the mixture CDF built from scipy.stats (normal or Student-t)
    w = np.array([0.2, 0.5, 0.3])
    loc = np.array([[1.0], [4.0], [6.0]])
    scale = np.array([[0.7], [1.2], [0.4]])
    dist = stats.norm if nu is None else None

    def cdf(y):
        z = (y - loc[:, 0]) / scale[:, 0]
        return float(w @ (dist.cdf(z) if nu is None else stats.t.cdf(z, nu)))

    for q in (0.05, 0.95):
        ref = optimize.brentq(lambda y: cdf(y) - q, -50, 50, xtol=1e-12)
        np.testing.assert_allclose(_mixture_quantile(q, w, loc, scale, nu), ref, atol=1e-8)


def test_cross_validation_keeps_every_points_prediction_and_each_leafs_curves(quick_demo):
    comparison, dataset, _ = quick_demo
    keep: dict = {}
    res, _ = cross_validate(comparison.structure("leaf-vcmax-alpha"), dataset, comparison, method="auto",
                            spot_checks=1, engine=FakeEngine(), leaf_fits=fit_leaves(dataset),
                            sampler=SamplerSpec(chains=2, warmup=20, draws=100, seed=2), keep=keep)
    points, curves = keep["points"], keep["curves"]
    assert len(points) == len(dataset.obs)
    np.testing.assert_allclose(np.sort(points["observed"]), np.sort(dataset.obs["a_net"]))
    # the held-out RMSE of the result is the RMSE of this table
    rmse = float(np.sqrt(np.mean((points["observed"] - points["predicted"]) ** 2)))
    assert rmse == pytest.approx(res.rmse["all"], rel=1e-12)
    assert set(curves["leaf"]) == set(dataset.leaves["leaf"].astype(str))
    for (leaf, kind), c in curves.groupby(["leaf", "curve_type"]):
        pts = dataset.obs[(dataset.obs["leaf"].astype(str) == leaf) & (dataset.obs["curve_type"] == kind)]
        varied = c["varied"].iloc[0]
        assert varied == {"aci": "ci", "aq": "ppfd"}[kind] and len(c) == GRID_POINTS
        assert c[varied].min() == pytest.approx(pts[varied].min()) and c[varied].max() == pytest.approx(pts[varied].max())
        assert np.all(c["q05"] < c["mean"]) and np.all(c["mean"] < c["q95"])


def test_a_leafs_grid_spans_each_of_its_curves(quick_demo):
    _, dataset, _ = quick_demo
    pts = dataset.obs[dataset.obs["leaf_index"] == 0]
    grid = leaf_grid(pts)
    for kind, g in grid.groupby("curve_type"):
        other = {"aci": "ppfd", "aq": "ci"}[kind]
        here = pts[pts["curve_type"] == kind]
        assert g[other].nunique() == 1 and g[other].iloc[0] == pytest.approx(here[other].median())
