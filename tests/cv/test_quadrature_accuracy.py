"""Every escalation level of the held-out quadrature against closed-form normal-normal marginals.

Model (Gelman et al. 2013, Bayesian Data Analysis 3rd ed., ch. 5 and ch. 14, conjugate normal):
the leaf's d effects b ~ N(mu_s, diag(tau_s^2)) and n_j points per effect, y_jk ~ N(b_j, s_j^2).
Then y ~ N(X mu_s, diag(s^2) + X diag(tau_s^2) X') with X the 0/1 map of points to effects, so
log m_s has a closed form (SciPy's multivariate normal). The noise s_j is set so that the leaf's
posterior SD of b_j, (n_j / s_j^2 + 1 / tau^2)^(-1/2), is a chosen fraction of the population SD
tau: 1/50 (a well-measured leaf, the case an unplaced grid gets wrong by several nats) to ~1 (a
leaf whose data say almost nothing).

The integrand is Gaussian, so every rule placed at the conditional mode must be exact up to
rounding; the tolerance asked of leafcv is 0.01 nats per cell and for the summed elpd.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import logsumexp

from leafcv.cv.quadrature import GH_LEVELS, MAX_TENSOR_DIM, leaf_log_marginal

RATIOS = (1 / 50, 1 / 10, 1 / 2, 0.999)   # leaf posterior SD / population SD
N_PER_EFFECT = 6
BRUTE_DRAWS = 20


def _case(d: int, ratio: float, seed: int, S: int = 120):
    rng = np.random.default_rng([d, int(1000 * ratio), seed])
    tau = 1.0
    # posterior sd^2 = 1 / (n / s^2 + 1 / tau^2) = (ratio tau)^2  =>  s^2 = n / (1 / (ratio tau)^2 - 1 / tau^2)
    s = np.sqrt(N_PER_EFFECT / (1 / (ratio * tau) ** 2 - 1 / tau**2))
    X = np.kron(np.eye(d), np.ones((N_PER_EFFECT, 1)))
    b_true = rng.normal(0.0, tau, d)
    y = X @ b_true + rng.normal(0, s, len(X))
    mean = rng.normal(0.0, 0.3, (S, d))
    sd = tau * rng.uniform(0.8, 1.2, (S, d))

    def rows_fn(rows):
        def ll(b):
            return stats.norm.logpdf(y, np.einsum("sqd,nd->sqn", b, X), s).sum(-1)
        return ll

    exact = np.array([stats.multivariate_normal.logpdf(y, X @ mean[k], s**2 * np.eye(len(y)) + X @ np.diag(sd[k] ** 2) @ X.T)
                      for k in range(S)])
    return rows_fn, mean, sd, exact


@pytest.mark.parametrize("d", [1, 2, 3, 4])
def test_every_level_is_exact_on_normal_normal_leaves(d):
    """Levels 0..2 (and the brute-force trapezoid, level 3, up to MAX_TENSOR_DIM dimensions) each give
    log m within 0.01 nats on every cell, from a poor start (5 population SDs away from every mode)."""
    levels = list(range(len(GH_LEVELS))) + ([len(GH_LEVELS)] if d <= MAX_TENSOR_DIM else [])
    S = 120 if d <= 2 else 30
    for ratio in RATIOS:
        rows_fn, mean, sd, exact = _case(d, ratio, 0, S)
        poor = np.full((S, d), 5.0)
        total_err = []
        for level in levels:
            n = S if level < len(GH_LEVELS) else BRUTE_DRAWS    # brute force is slow: fewer cells
            lm, info = leaf_log_marginal(rows_fn, mean[:n], sd[:n], poor[:n], first_level=level)
            err = np.abs(lm - exact[:n])
            assert np.max(err) < 0.01, (d, ratio, level, np.max(err))
            assert info.bound < 0.01          # the stated bound (share-weighted rule gaps)
            total_err.append(abs(logsumexp(lm) - logsumexp(exact[:n])))
        assert max(total_err) < 0.01


def test_first_level_needs_no_escalation_when_the_integrand_is_gaussian():
    rows_fn, mean, sd, exact = _case(2, 1 / 50, 1)
    lm, info = leaf_log_marginal(rows_fn, mean, sd, np.zeros((len(mean), 2)))
    assert info.n_escalated == 0 and info.n_brute == 0
    assert np.max(np.abs(lm - exact)) < 1e-6


def test_a_grid_placed_from_the_population_would_fail_this_check():
    """The defect this module replaces: one fixed grid at the least-squares point with 1.5 x the
    population SD, for a leaf whose posterior SD is 1/50 of it. Shown so that the tests above have teeth."""
    from leafcv.cv.quadrature import _rule_log_m, gh_grid

    rows_fn, mean, sd, exact = _case(2, 1 / 50, 2)
    S = len(mean)
    centre = np.zeros((S, 2))
    chol = np.broadcast_to(1.5 * np.eye(2), (S, 2, 2)).copy()
    lm = _rule_log_m(rows_fn, np.arange(S), mean, sd, centre, chol, gh_grid(21, 2))
    assert np.max(np.abs(lm - exact)) > 0.5
