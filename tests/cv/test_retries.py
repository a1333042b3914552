"""Targeted retries, convergence grades and the draw count of a retried fit, with a fake engine (no
sampler): the engine returns each chain's inits plus small noise, and misbehaves on request."""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from leafcv.cv.methods import MAX_ATTEMPTS, cross_validate, remedy
from leafcv.diagnostics import Diagnostics, worst_grade
from leafcv.engines.base import SAMPLER_FIELDS, Draws
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec
from ..helpers import pooled_structure


class FakeEngine:
    """Draws = the first chain's inits + N(0, 0.01) noise, in every chain. ``split_below``: while settings.draws is below it, chain c is
    shifted by c (R-hat far above 1); ``divergent_below``: while adapt_delta is below it, 10 divergences."""

    name = "fake"

    def __init__(self, split_below: int = 0, divergent_below: float = 0.0):
        self.split_below, self.divergent_below = split_below, divergent_below
        self.calls: list[SamplerSpec] = []

    def fit(self, program, data, settings, seed, inits, progress=None):
        self.calls.append(settings)
        rng = np.random.default_rng(seed)
        C, D = settings.chains, settings.draws
        params = {}
        for name in inits[0]:
            arr = np.stack([np.asarray(inits[0][name], float)] * C)                      # (C, *shape)
            draws = arr[:, None, ...] + rng.normal(0, 0.01, (C, D) + arr.shape[1:])
            if D < self.split_below:
                draws = draws + np.arange(C).reshape((C, 1) + (1,) * (arr.ndim - 1))
            params[name] = draws
        sampler = {f: rng.normal(size=(C, D)) for f in SAMPLER_FIELDS}
        sampler["divergent__"] = np.zeros((C, D))
        if settings.adapt_delta < self.divergent_below:
            sampler["divergent__"][0, :10] = 1
        sampler["treedepth__"] = np.full((C, D), 3)
        return Draws(params, sampler, settings, seed, 0.1, "fake")


def test_a_retry_for_mixing_doubles_warmup_and_draws_and_the_result_counts_them(quick_demo):
    comparison, dataset, _ = quick_demo
    sampler = SamplerSpec(chains=4, warmup=50, draws=150, seed=3)
    engine = FakeEngine(split_below=200)
    res, det = cross_validate(pooled_structure(comparison), dataset, comparison, method="auto", spot_checks=0,
                              engine=engine, leaf_fits=fit_leaves(dataset), sampler=sampler)
    full = [f for f in det.fits if f["role"] == "full data"]
    assert [f["attempt"] for f in full] == [1, 2]
    assert full[0]["grade"] == "failed" and full[1]["grade"] == "converged"
    assert engine.calls[1].draws == 300 and engine.calls[1].warmup == 100
    assert "mixing" in full[1]["retry_cause"] and full[1]["seed"] != full[0]["seed"]
    assert res.n_draws == 4 * 300            # the draws behind the scores, not the settings asked for
    assert res.grade == "converged"


def test_divergences_raise_adapt_delta_and_switch_group_effects_to_noncentred(quick_demo):
    comparison, _, _ = quick_demo
    st = comparison.structure("traits-month-random")
    smp, new, cause = remedy(("3 divergent transition(s)",), SamplerSpec(adapt_delta=0.8), st, 1)
    assert smp.adapt_delta == 0.95 and smp.draws == SamplerSpec().draws
    assert new.params["vcmax25"].centring["campaign"] == "noncentred"
    assert "leaf" not in new.params["vcmax25"].centring       # leaf effects keep their own choice
    smp2, _, _ = remedy(("1 divergent transition(s)",), smp, new, 2)
    assert smp2.adapt_delta == 0.99
    smp3, _, cause3 = remedy(("R-hat 1.030 > 1.01 (worst: b0[1])",), SamplerSpec(warmup=300, draws=400), st, 1)
    assert (smp3.warmup, smp3.draws) == (600, 800) and "mixing" in cause3


def test_a_fit_that_keeps_failing_is_graded_failed_after_the_stated_attempts(quick_demo):
    comparison, dataset, _ = quick_demo
    engine = FakeEngine(divergent_below=1.0)          # divergences whatever adapt_delta
    res, det = cross_validate(pooled_structure(comparison), dataset, comparison, method="auto", spot_checks=0,
                              engine=engine, leaf_fits=fit_leaves(dataset),
                              sampler=SamplerSpec(chains=4, warmup=50, draws=200, seed=4))
    full = [f for f in det.fits if f["role"] == "full data"]
    assert len(full) == MAX_ATTEMPTS
    assert [round(c.adapt_delta, 2) for c in engine.calls[:MAX_ATTEMPTS]] == [0.8, 0.95, 0.99]
    assert all("divergences" in f["retry_cause"] for f in full[1:])
    assert res.grade == "failed" and not res.ranked_ok


@pytest.mark.parametrize("kw, grade", [
    ({}, "converged"),
    ({"max_rhat": 1.03, "problems": ("R-hat",)}, "marginal"),
    ({"divergences": 3, "problems": ("div",)}, "marginal"),
    ({"divergences": 6, "problems": ("div",)}, "failed"),
    ({"max_rhat": 1.06, "problems": ("R-hat",)}, "failed"),
    ({"min_ess_bulk": 90.0, "problems": ("ESS",)}, "failed"),
])
def test_grades(kw, grade):
    base = dict(max_rhat=1.005, min_ess_bulk=500.0, min_ess_tail=500.0, divergences=0, treedepth_hits=0,
                min_ebfmi=0.9, n_draws=500, chains=4, worst="", problems=())
    d = Diagnostics(**{**base, **kw})
    assert d.grade == grade
    assert worst_grade(["converged", grade, "converged"]) == grade


def test_spot_checks_that_disagree_replace_psis_and_two_refit_every_leaf(quick_demo, monkeypatch):
    """PSIS made wrong on purpose (every leaf +1 nat): each spot check disagrees beyond
    max(0.1 nats, 3 x combined MCSE), raises a warning and takes the exact value, and with two or more
    disagreeing every leaf is refitted, so no PSIS value is left in the score."""
    import leafcv.cv.methods as methods

    real = methods.integrated_loo

    def off_by_one(log_m, chains=1):
        est = real(log_m, chains)
        return replace(est, elpd=est.elpd + 1.0, khat=np.zeros_like(est.khat))

    monkeypatch.setattr(methods, "integrated_loo", off_by_one)
    comparison, dataset, _ = quick_demo
    res, det = cross_validate(pooled_structure(comparison), dataset, comparison, method="auto", spot_checks=2,
                              engine=FakeEngine(), leaf_fits=fit_leaves(dataset),
                              sampler=SamplerSpec(chains=4, warmup=50, draws=200, seed=5))
    assert [s["disagree"] for s in det.spot_checks] == [True, True]
    assert all(abs(s["elpd_psis"] - s["elpd_exact"]) > s["tolerance"] for s in det.spot_checks)
    assert set(res.method_i) == {"refit"} and res.n_refits == dataset.n_leaves
    assert np.all(np.isnan(res.pareto_k))             # k-hat only for leaves scored by PSIS: none here
    assert any("disagree" in w for w in res.warnings) and any("every leaf was refitted" in w for w in res.warnings)


def test_a_refit_is_scaled_by_the_full_fits_posterior_means_and_sds(quick_demo):
    # The scaling (stan/leafcv.stan, scale_offset / scale_mult) of a refit: each free parameter's
    # posterior mean and SD in the full-data fit (here the fake engine's draws: inits + N(0, 0.01)),
    # and offset 0, scale 1 for the held-out leaf's standard-normal effects, which no fit informs.
    from leafcv.design import FREE_BLOCKS, build_design
    from leafcv.fitting import fit_structure, warm_scaling

    comparison, dataset, _ = quick_demo
    leaf_fits = fit_leaves(dataset)
    st = comparison.structure("traits-month-fixed")
    sampler = SamplerSpec(chains=4, warmup=50, draws=300, seed=3)
    full = fit_structure(st, dataset, comparison.data, sampler, engine=FakeEngine(), leaf_fits=leaf_fits)
    train = np.ones(dataset.n_leaves, bool)
    train[3] = False
    refit = build_design(st, dataset, comparison.data, train_leaves=train, leaf_fits=leaf_fits)
    sc = warm_scaling(full, refit)
    d = refit.stan_data
    sizes = {"b0_free": len(refit.params), "beta": d["K"], "log_tau": d["R"], "u_c": d["Qc"], "u_v": d["Q"] - d["Qc"],
             "log_tau_leaf": d["Rl"], "eta_c": d["Mc"], "eta_z": d["Mn"], "log_sigma": d["S"]}
    at = np.cumsum([0] + [sizes[k] for k in FREE_BLOCKS])
    assert sc["n_scale"] == at[-1] == len(sc["scale_offset"]) == len(sc["scale_mult"])
    block = {k: slice(at[i], at[i + 1]) for i, k in enumerate(FREE_BLOCKS)}
    b0 = full.draws.params["b0"].reshape(-1, len(refit.params))      # no group terms: b0_free = b0
    np.testing.assert_allclose(sc["scale_offset"][block["b0_free"]], b0.mean(axis=0), atol=2e-3)
    np.testing.assert_allclose(sc["scale_mult"][block["b0_free"]], b0.std(axis=0), rtol=0.15)
    sigma = full.draws.params["sigma"].reshape(-1, d["S"])
    np.testing.assert_allclose(sc["scale_mult"][block["log_sigma"]], np.log(sigma).std(axis=0), rtol=0.15)
    held = (refit.nc_cells % dataset.n_leaves) == 3
    assert held.any()
    z = slice(at[FREE_BLOCKS.index("eta_z")], at[FREE_BLOCKS.index("eta_z") + 1])
    np.testing.assert_array_equal(sc["scale_offset"][z][held], 0.0)
    np.testing.assert_array_equal(sc["scale_mult"][z][held], 1.0)
    assert np.all(sc["scale_mult"][z][~held] != 1.0)
