"""Cross-validation logic (leafcv.cv.methods) without a sampler: fold assignment, targeted retries and the
draw count of a retried fit, and spot checks, with the fake engine of tests/fakes.py (draws = inits + small
noise, misbehaving on request). The K-fold path with the real sampler: tests/sampling/cv/test_methods.py."""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from leafcv.cv.methods import (MAX_ATTEMPTS, centring_of, folds_for, noncentred_weak_leaves, remedy, spot_tolerance,
                               with_centring)
from leafcv.cv.plan import cross_validate
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


def _fit_with_leaf_sds(design, taus):
    """A stand-in for a fit: its design and draws of the SDs of leaf effects (2 chains x 50 draws)."""
    from types import SimpleNamespace
    tau = np.broadcast_to(np.asarray(taus, float), (2, 50, len(taus))).copy()
    return SimpleNamespace(design=design, draws=SimpleNamespace(params={"tau_leaf": tau}))


def test_divergences_from_leaves_the_pilot_centred_too_eagerly_make_those_leaf_effects_noncentred(quick_demo):
    # A funnel (Betancourt & Girolami 2015, "Hamiltonian Monte Carlo for hierarchical models", sec. 4):
    # centred effects whose data are weak relative to their SD diverge as the SD shrinks. The automatic
    # rule centres a leaf when its least-squares SE < CENTRED_SE_FRACTION x the between-leaf SD; with the
    # fit's SD far below the pilot's, the same rule centres fewer leaves, so those effects go non-centred.
    from leafcv.design import build_design
    from leafcv.errors import Problem
    from leafcv.terms import CENTRED_SE_FRACTION
    comparison, dataset, _ = quick_demo
    st = comparison.structure("traits-month-fixed")
    leaf_fits = fit_leaves(dataset)
    design = build_design(st, dataset, comparison.data, leaf_fits=leaf_fits)
    assert [lt.param for lt in design.leaf_terms] == ["vcmax25", "alpha"]
    centred = design.leaf_terms[0].centred
    assert centred.any()                                 # the pilot centres leaves' Vcmax25 effects
    se = leaf_fits.link_se("vcmax25", False)[centred]
    wide = 10 * np.nanmax(se) / CENTRED_SE_FRACTION      # every centred leaf stays centred under the rule
    narrow = 0.5 * np.nanmin(se) / CENTRED_SE_FRACTION   # none does
    new, notes = noncentred_weak_leaves(st, _fit_with_leaf_sds(design, [narrow, 0.2]), leaf_fits)
    assert new.params["vcmax25"].centring["leaf"] == "noncentred"
    assert "leaf" not in new.params["alpha"].centring                 # alpha: no leaf was centred
    assert len(notes) == 1 and notes[0].startswith("leaf effects on vcmax25 non-centred")
    same, none = noncentred_weak_leaves(st, _fit_with_leaf_sds(design, [wide, 0.2]), leaf_fits)
    assert same == st and none == []
    # a user's own choice is left alone
    chosen = with_centring(st, {"vcmax25": {"leaf": "centred"}})
    kept, _ = noncentred_weak_leaves(chosen, _fit_with_leaf_sds(design, [narrow, 0.2]), leaf_fits)
    assert kept.params["vcmax25"].centring["leaf"] == "centred"
    # remedy applies it on divergences only, and the task record gives the structure back
    _, after, cause = remedy((Problem("5 divergent transition(s)", "divergences"),), SamplerSpec(), st, 1,
                             _fit_with_leaf_sds(design, [narrow, 0.2]), leaf_fits)
    assert after.params["vcmax25"].centring["leaf"] == "noncentred" and "leaf effects on vcmax25" in cause
    _, untouched, _ = remedy((Problem("R-hat 1.030 > 1.01 (worst: b0[1])", "rhat", "b0[1]"),), SamplerSpec(), st, 1,
                             _fit_with_leaf_sds(design, [narrow, 0.2]), leaf_fits)
    assert untouched == st
    assert with_centring(st, centring_of(after)) == after


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


def test_spot_tolerance_adds_both_quadrature_bounds():
    # max(0.1, 3 x hypot(0.03, 0.04)) = max(0.1, 3 x 0.05) = 0.15, plus 0.2 + 0.3 = 0.65
    assert spot_tolerance(0.03, 0.04, 0.2, 0.3) == pytest.approx(0.65)
    # the floor: max(0.1, 3 x 0.01) = 0.1, plus 0.05 + 0 = 0.15
    assert spot_tolerance(0.01, 0.0, 0.05, 0.0) == pytest.approx(0.15)
    # not computed (NaN) counts as 0
    assert spot_tolerance(np.nan, 0.04, np.nan, 0.3) == pytest.approx(max(0.1, 0.12) + 0.3)


def test_spot_checks_allow_for_both_leaves_quadrature_bounds(quick_demo, monkeypatch):
    """PSIS made wrong by 1 nat on every leaf while every leaf's quadrature bound is 0.75 nats (PSIS and refit
    alike). The fake engine's MCSE is tiny, so max(0.1, 3 x MCSE) alone would call each spot check a
    disagreement; with both bounds added (>= 0.1 + 0.75 + 0.75 = 1.6) the gap of about 1 nat is within the
    stated accuracy, and the PSIS values stay."""
    import leafcv.cv.methods as methods
    import leafcv.cv.plan as plan

    real_loo, real_score = plan.integrated_loo, methods.score_leaves

    def off(log_m, chains=1):
        est = real_loo(log_m, chains)
        return replace(est, elpd=est.elpd + 1.0, khat=np.zeros_like(est.khat))

    def loose(*args, **kwargs):
        sc = real_score(*args, **kwargs)
        return replace(sc, quad=[replace(q, bound=0.75) for q in sc.quad])

    monkeypatch.setattr(plan, "integrated_loo", off)
    monkeypatch.setattr(methods, "score_leaves", loose)
    comparison, dataset, _ = quick_demo
    res, det = cross_validate(pooled_structure(comparison), dataset, comparison, method="auto", spot_checks=2,
                              engine=FakeEngine(), leaf_fits=fit_leaves(dataset),
                              sampler=SamplerSpec(chains=4, warmup=50, draws=200, seed=5))
    assert len(det.spot_checks) == 2
    for s in det.spot_checks:
        assert s["bound_psis"] == 0.75 and s["bound_exact"] == 0.75
        without_bounds = max(0.1, 3 * np.hypot(s["mcse_psis"], s["mcse_exact"]))
        assert s["tolerance"] == pytest.approx(without_bounds + 1.5)
        assert without_bounds < abs(s["elpd_psis"] - s["elpd_exact"]) <= s["tolerance"]
        assert not s["disagree"]
    assert set(res.method_i) == {"psis"}                 # no spot check replaced a PSIS value


@pytest.mark.parametrize("method,by,folds", [("kfold", "leaf", 2), ("exact", "taxon", 0)])
def test_fold_and_level_results_count_the_draws_kept_after_a_retry(quick_demo, method, by, folds):
    # every refit's first attempt has split chains (150 draws < 200), so it is retried with twice the draws or
    # more (remedy: mixing): the result must record the draws behind its scores (the fewest of any fold's kept
    # fit), not the planned 2 x 150
    comparison, dataset, _ = quick_demo
    engine = FakeEngine(split_below=200)
    res, det = cross_validate(pooled_structure(comparison), dataset, comparison, method=method, by=by, folds=folds,
                              engine=engine, leaf_fits=fit_leaves(dataset),
                              sampler=SamplerSpec(chains=2, warmup=50, draws=150, seed=6))
    kept = [f for f in det.fits if f["kept"]]
    assert kept and all(f["attempt"] >= 2 and f["draws"] >= 300 for f in kept)
    assert res.n_draws == min(f["chains"] * f["draws"] for f in kept) >= 2 * 300
    # the k-hat threshold min(1 - 1/log10 S, 0.7) of the real S (Vehtari et al. 2024)
    assert res.khat_threshold == pytest.approx(min(1 - 1 / np.log10(res.n_draws), 0.7))
