"""The cross-validation result type: defaults, validation, totals and their errors, comparability.

Outside references: the SE of a total elpd with the sample variance, sqrt(G · var(elpd_i, ddof=1))
(Vehtari, Gelman & Gabry 2017, Stat Comput 27:1413-1432, eq. 23, recalled from memory), checked
against hand computations written out beside each check; the k-hat threshold
min(1 - 1/log10 S, 0.7) (Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25(72)); Monte Carlo
variances of independent estimates add, so the MCSE of a sum is the root sum of squares
(variance of a sum of independent variables, any probability textbook); ArviZ 0.23's ``loo``, called
directly on a simulated log likelihood, for the total, its SE and the k-hat threshold.
"""
from __future__ import annotations

from arviz_base import from_dict
from arviz_stats import loo as arviz_loo
import numpy as np
import pytest

from leafcv.cv.result import CVResult, check_comparable

LEAVES = ("L1", "L2", "L3", "L4")
ELPD = np.array([-10.0, -14.0, -12.0, -12.0])
G = 30
LEAVES_G = tuple(f"leaf{i:02d}" for i in range(G))
DDOF1 = np.sqrt(G / (G - 1))     # sample SD / population SD: sqrt(G / (G - 1))


def make(name: str = "s", elpd_i=ELPD, **kwargs) -> CVResult:
    """A result over four leaves with method auto and 1000 draws unless told otherwise."""
    kwargs.setdefault("method", "auto")
    kwargs.setdefault("n_draws", 1000)
    return CVResult(structure=name, leaves=kwargs.pop("leaves", LEAVES), elpd_i=elpd_i, **kwargs)


def test_defaults_keep_old_call_sites_working():
    res = CVResult("s", "auto", LEAVES, ELPD, 1000)
    assert res.method_i == ("psis",) * 4 and res.grade == "converged" and res.unit == "leaf" and res.unscored == ""
    assert np.isnan(res.mcse_i).all() and np.isnan(res.quad_bound_i).all() and np.isnan(res.pareto_k).all()
    assert make(method="exact").method_i == ("exact",) * 4
    assert make(method="kfold").method_i == ("kfold",) * 4
    assert np.isnan(res.mcse) and np.isnan(res.max_khat) and res.n_psis_high == 0


def test_se_uses_the_sample_variance():
    # elpd_i = (-10, -14, -12, -12): mean -12, deviations (2, -2, 0, 0), sum of squares 8,
    # var (ddof=1) = 8/3, SE = sqrt(4 * 8/3) = sqrt(32/3) = 3.266; with ddof=0 it would be sqrt(8) = 2.828
    assert make().se == pytest.approx(np.sqrt(32 / 3), rel=1e-12)
    assert np.isnan(make(leaves=("L1",), elpd_i=[-3.0]).se)     # one unit: no variance


def test_mcse_is_the_root_sum_of_squares():
    # sqrt(0.03^2 + 0.04^2 + 0^2 + 0.12^2) = sqrt(0.0009 + 0.0016 + 0.0144) = sqrt(0.0169) = 0.13
    assert make(mcse_i=[0.03, 0.04, 0.0, 0.12]).mcse == pytest.approx(0.13, rel=1e-12)
    assert np.isnan(make(mcse_i=[0.03, np.nan, 0.0, 0.12]).mcse)      # one entry not computed
    assert make(mcse_i=[0.03, np.inf, 0.0, 0.12]).mcse == np.inf      # one entry without a usable MCSE


def test_grades_and_ranked_ok():
    assert make().converged and make().ranked_ok
    marginal = make(grade="marginal")
    assert not marginal.converged and marginal.ranked_ok
    failed = make(grade="failed")
    assert not failed.converged and not failed.ranked_ok
    unscored = make(unscored="quadrature did not converge for leaf L3")
    assert unscored.converged and not unscored.ranked_ok


def test_khat_summaries_use_psis_entries_only():
    # S = 100 draws: threshold min(1 - 1/log10 100, 0.7) = 0.5 (Vehtari et al. 2024)
    res = make(n_draws=100, method_i=("refit", "psis", "psis", "psis"), pareto_k=[np.nan, 0.3, 0.62, 0.51])
    assert res.khat_threshold == pytest.approx(0.5)
    assert res.max_khat == 0.62 and res.n_psis_high == 2


@pytest.mark.parametrize("kwargs,message", [
    ({"grade": "ok"}, "grade 'ok' is not one of converged, marginal, failed"),
    ({"method_i": ("psis",) * 3}, "method_i has 3 values for 4 entries"),
    ({"method_i": ("psis", "exact", "psis", "psis")}, "'exact' are not allowed for method auto"),
    ({"method": "exact", "method_i": ("refit",) * 4}, "'refit' are not allowed for method exact"),
    ({"mcse_i": [0.1, 0.1]}, "mcse_i has 2 values for 4 entries"),
    ({"mcse_i": [0.1, -0.1, 0.1, 0.1]}, "mcse_i must be NaN"),
    ({"quad_bound_i": [0.1, -np.inf, 0.1, 0.1]}, "quad_bound_i must be NaN"),
    ({"quad_bound_i": [0.1] * 5}, "quad_bound_i has 5 values"),
    ({"pareto_k": [0.1, 0.2, 0.3]}, "pareto_k has 3 values"),
    ({"method_i": ("refit", "psis", "psis", "psis"), "pareto_k": [0.9, 0.2, 0.3, 0.1]},
     "pareto_k must be NaN for entries not scored by PSIS"),
    ({"unit": ""}, "unit must be a non-empty name"),
    ({"leaves": ("L1", "L1", "L2", "L3")}, "leaf ids are not unique"),
])
def test_invalid_fields_are_refused_naming_the_structure(kwargs, message):
    with pytest.raises(ValueError) as caught:
        make("odd", **kwargs)
    assert str(caught.value).startswith("odd: ") and message in str(caught.value)


def test_arrays_are_read_only():
    res = make(mcse_i=[0.1] * 4)
    for arr in (res.elpd_i, res.mcse_i, res.quad_bound_i, res.pareto_k):
        with pytest.raises(ValueError):
            arr[0] = 1.0


def test_auto_and_exact_results_are_comparable():
    mixed = make("a", method_i=("refit", "psis", "psis", "psis"))
    check_comparable([mixed, make("b", method="exact")])


def test_kfold_and_leave_one_out_are_not_comparable():
    with pytest.raises(ValueError, match=r"K-fold results \(k1, k2\) cannot be compared with leave-one-out "
                                         r"results \(a \(auto\), e \(exact\)\)"):
        check_comparable([make("a"), make("k1", method="kfold"), make("e", method="exact"), make("k2", method="kfold")])
    check_comparable([make("k1", method="kfold"), make("k2", method="kfold")])


def test_units_must_match():
    with pytest.raises(ValueError, match=r"held-out unit differs from 'a' \(leaf\) in: b \(species\)"):
        check_comparable([make("a"), make("b", unit="species")])
    with pytest.raises(ValueError, match="ids \\(or their order\\) differ .* in: c"):
        check_comparable([make("a"), make("c", leaves=("L1", "L2", "L4", "L3"))])


def test_non_finite_elpd_only_refused_where_the_structure_would_be_ranked():
    broken = [-10.0, np.nan, -12.0, -12.0]
    check_comparable([make("a"), make("q", broken, unscored="quadrature did not converge for leaf L2")])
    check_comparable([make("a"), make("f", broken, grade="failed")])
    with pytest.raises(ValueError, match="per-leaf elpd is not finite in: m"):
        check_comparable([make("a"), make("m", broken, grade="marginal")])


def test_se_and_elpd_match_arviz_loo():
    rng = np.random.default_rng(5)
    log_lik = rng.normal(-20.0, 1.0, size=(1, 1000, G)) + rng.normal(0.0, 2.0, size=(1, 1, G))
    tree = from_dict({"log_likelihood": {"y": log_lik}})
    loo = arviz_loo(tree, pointwise=True, reff=1.0)
    res = make("m", loo.elpd_i.values, pareto_k=loo.pareto_k.values, n_draws=1000, leaves=LEAVES_G)
    assert res.elpd == pytest.approx(float(loo.elpd), rel=1e-12)
    # arviz-stats: se = sqrt(n * var(elpd_i)) with ddof=0; leafcv uses ddof=1
    assert res.se == pytest.approx(float(loo.se) * DDOF1, rel=1e-12)
    assert res.khat_threshold == pytest.approx(float(loo.good_k), rel=1e-12)


def test_result_rejects_inconsistent_shapes():
    with pytest.raises(ValueError, match="elpd_i has 3 values"):
        make("m", [1.0, 2.0, 3.0], leaves=LEAVES_G)
    with pytest.raises(ValueError, match="method"):
        make("m", np.zeros(G), method="loo", leaves=LEAVES_G)
