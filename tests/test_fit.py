"""Real short fits of the generic program on the quick demo scenario."""
from __future__ import annotations

import numpy as np
import pytest

from leafcv.demo import GEN, N_CENTRE
from leafcv.fitting import fit_structure, format_fit
from leafcv.inits import fit_leaves
from .helpers import pooled_structure

pytestmark = pytest.mark.stan


@pytest.fixture(scope="module")
def leaf_fits(quick_demo):
    return fit_leaves(quick_demo[1])


@pytest.fixture(scope="module")
def generating_fit(quick_demo, leaf_fits):
    comparison, dataset, _ = quick_demo
    return fit_structure(comparison.structure("traits-month-fixed"), dataset, comparison.data,
                         comparison.sampler, leaf_fits=leaf_fits)


def _interval(fit, name, index, transform=lambda x: x, level=0.90):
    x = transform(fit.draws.params[name][..., index].reshape(-1))
    lo, hi = np.quantile(x, [(1 - level) / 2, (1 + level) / 2])
    return lo, hi


def test_recovers_generating_vcmax25_and_n_slope(generating_fit, quick_demo):
    # The demo simulates log Vcmax25 = log(55) + 0.35 (N - 2) + ...; traits are centred at N_CENTRE = 2
    # in the comparison file, so b0[1] estimates log(GEN['vcmax25_ref']) and beta[1] the N slope.
    comparison = quick_demo[0]
    assert comparison.data.centre["n_area"] == N_CENTRE
    fit = generating_fit
    assert fit.design.coefficients[0].term == "n_area"
    lo, hi = _interval(fit, "b0", 0, np.exp)
    assert lo < GEN["vcmax25_ref"] < hi, (lo, hi)
    lo, hi = _interval(fit, "beta", 0)
    assert lo < GEN["n_slope"] < hi, (lo, hi)
    assert fit.diagnostics.divergences == 0
    assert fit.diagnostics.max_rhat < 1.05


def test_fit_report_names_parameters_priors_and_verdict(generating_fit):
    text = format_fit(generating_fit, "traits-month-fixed")
    assert "vcmax25 at reference" in text and "slope of log vcmax25 on n_area" in text
    assert "lognormal, median 60" in text          # the stated prior of Vcmax25
    assert "verdict:" in text and "E-BFMI" in text
    assert "leaf effects on vcmax25" in text       # the centring choice is reported


def test_second_structure_compiles_nothing(generating_fit, quick_demo, leaf_fits):
    # httpstan keeps one compiled extension module per program text; a new structure is only new data.
    from httpstan.cache import list_model_names

    comparison, dataset, _ = quick_demo
    before = sorted(list_model_names())
    sampler = type(comparison.sampler)(chains=2, warmup=150, draws=100, seed=5)
    fit = fit_structure(comparison.structure("traits-month-random"), dataset, comparison.data, sampler,
                        leaf_fits=leaf_fits)
    assert sorted(list_model_names()) == before
    assert fit.draws.params["tau"].shape == (2, 100, 1)   # the campaign random term exists in this fit
    assert fit.draws.params["beta"].shape == (2, 100, 3)  # n_area, chl_ug, sla_m2kg


def test_same_seed_same_draws_after_cache_deletion(quick_demo, leaf_fits):
    # Reproducibility: same data, seed and settings give the same draws, even though every fit is
    # deleted from httpstan's fit cache after reading (so this is a real second run, not a cached one).
    comparison, dataset, _ = quick_demo
    sampler = type(comparison.sampler)(chains=2, warmup=100, draws=50, seed=11)
    s = pooled_structure(comparison)
    a = fit_structure(s, dataset, comparison.data, sampler, leaf_fits=leaf_fits)
    b = fit_structure(s, dataset, comparison.data, sampler, leaf_fits=leaf_fits)
    np.testing.assert_array_equal(a.draws.params["b0"], b.draws.params["b0"])
    assert b.draws.sampling_seconds > 0.05
