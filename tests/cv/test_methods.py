"""Cross-validation logic (leafcv.cv.methods) without a sampler: fold assignment, targeted retries and the
draw count of a retried fit, and spot checks, with the fake engine of tests/fakes.py (draws = inits + small
noise, misbehaving on request). The K-fold path with the real sampler: tests/sampling/cv/test_methods.py."""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from leafcv.cv.methods import MAX_ATTEMPTS, cross_validate, folds_for, remedy
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec
from ..fakes import FakeEngine
from ..helpers import pooled_structure


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
    from leafcv.errors import Problem

    smp, new, cause = remedy((Problem("3 divergent transition(s)", "divergences"),), SamplerSpec(adapt_delta=0.8), st, 1)
    assert smp.adapt_delta == 0.95 and smp.draws == SamplerSpec().draws
    assert new.params["vcmax25"].centring["campaign"] == "noncentred"
    assert "leaf" not in new.params["vcmax25"].centring       # leaf effects keep their own choice
    smp2, _, _ = remedy((Problem("1 divergent transition(s)", "divergences"),), smp, new, 2)
    assert smp2.adapt_delta == 0.99
    smp3, _, cause3 = remedy((Problem("R-hat 1.030 > 1.01 (worst: b0[1])", "rhat", "b0[1]"),),
                             SamplerSpec(warmup=300, draws=400), st, 1)
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


def test_spot_checks_that_disagree_replace_psis_and_two_refit_every_leaf(quick_demo, monkeypatch):
    """PSIS made wrong on purpose (every leaf +1 nat): each spot check disagrees beyond
    max(0.1 nats, 3 x combined MCSE), raises a warning and takes the exact value, and with two or more
    disagreeing every leaf is refitted, so no PSIS value is left in the score."""
    import leafcv.cv.plan as plan

    real = plan.integrated_loo

    def off_by_one(log_m, chains=1):
        est = real(log_m, chains)
        return replace(est, elpd=est.elpd + 1.0, khat=np.zeros_like(est.khat))

    monkeypatch.setattr(plan, "integrated_loo", off_by_one)
    comparison, dataset, _ = quick_demo
    res, det = cross_validate(pooled_structure(comparison), dataset, comparison, method="auto", spot_checks=2,
                              engine=FakeEngine(), leaf_fits=fit_leaves(dataset),
                              sampler=SamplerSpec(chains=4, warmup=50, draws=200, seed=5))
    assert [s["disagree"] for s in det.spot_checks] == [True, True]
    assert all(abs(s["elpd_psis"] - s["elpd_exact"]) > s["tolerance"] for s in det.spot_checks)
    assert set(res.method_i) == {"refit"} and res.n_refits == dataset.n_leaves
    assert np.all(np.isnan(res.pareto_k))             # k-hat only for leaves scored by PSIS: none here
    assert any("disagree" in w for w in res.warnings) and any("every leaf was refitted" in w for w in res.warnings)


def test_seeds_near_the_top_of_the_range_wrap_instead_of_overflowing(quick_demo):
    # Stan's seeds are unsigned 32-bit integers (Stan Reference Manual, "random_seed"); the comparison
    # file accepts run seeds up to 2^32 - 1, so refit and retry offsets must wrap
    from leafcv.comparison import MAX_SEED

    comparison, dataset, _ = quick_demo
    sampler = SamplerSpec(chains=2, warmup=10, draws=150, seed=MAX_SEED)
    engine = FakeEngine(split_below=200)                    # the full fit fails once: a retry seed too
    _, det = cross_validate(pooled_structure(comparison), dataset, comparison, method="auto", spot_checks=2,
                            engine=engine, leaf_fits=fit_leaves(dataset), sampler=sampler)
    seeds = [f["seed"] for f in det.fits]
    assert len(seeds) >= 4 and all(0 <= s <= MAX_SEED for s in seeds)
    assert seeds[0] == MAX_SEED and seeds[1] == (MAX_SEED + 7919) % 2**32      # the retry of the full fit
