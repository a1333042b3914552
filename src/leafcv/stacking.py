"""Stacking weights of predictive distributions, independent of ArviZ: the ranking's cross-check of the
weights ArviZ's ``compare`` gives (:mod:`leafcv.cv.arviz_bridge`); re-exported by :mod:`leafcv.ranking`.

Tests: tests/test_ranking.py.
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import minimize
from scipy.special import logsumexp


def _negative_mean_log_score(z: np.ndarray, elpd: np.ndarray) -> tuple[float, np.ndarray]:
    """Objective −(1/G) Σ_g log Σ_k w_k exp(elpd_gk), w = softmax(z), and its gradient in z.

    With responsibilities p_gk = w_k exp(elpd_gk) / Σ_j w_j exp(elpd_gj) and P_k = Σ_g p_gk,
    ∂/∂z_k of the unscaled objective is G w_k − P_k (chain rule through log-softmax).
    """
    n_leaves = elpd.shape[0]
    log_w = z - logsumexp(z)
    joint = elpd + log_w[np.newaxis, :]
    per_leaf = logsumexp(joint, axis=1)
    resp = np.exp(joint - per_leaf[:, np.newaxis])
    grad = (n_leaves * np.exp(log_w) - resp.sum(axis=0)) / n_leaves
    return float(-per_leaf.mean()), grad


def stacking_weights(elpd_pointwise: np.ndarray) -> np.ndarray:
    """Stacking weights maximising Σ_g log Σ_k w_k exp(elpd_gk) over the simplex.

    Parameters
    ----------
    elpd_pointwise
        Per-leaf elpd, shape (G, K): G leaves, K structures.

    Returns
    -------
    numpy.ndarray
        Weights, shape (K,), non-negative and summing to 1.

    Notes
    -----
    The simplex is parameterised by a softmax and the objective is minimised by BFGS with its
    analytic gradient. Each leaf's row is shifted by its maximum first (the optimum does not
    move) and log-sum-exp keeps the sums stable however negative the elpd.

    References
    ----------
    Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis 13:917-1007, eq. 4 (stacking of
    predictive distributions with the log score).
    """
    elpd = np.asarray(elpd_pointwise, dtype=float)
    if elpd.ndim != 2 or elpd.shape[0] < 1 or elpd.shape[1] < 1:
        raise ValueError(f"elpd_pointwise must be a (leaves, structures) matrix, got shape {elpd.shape}")
    if not np.all(np.isfinite(elpd)):
        raise ValueError("elpd_pointwise must be finite")
    n_models = elpd.shape[1]
    if n_models == 1:
        return np.ones(1)
    elpd = elpd - elpd.max(axis=1, keepdims=True)
    fit = minimize(
        _negative_mean_log_score, np.zeros(n_models), args=(elpd,), jac=True,
        method="BFGS", options={"gtol": 1e-10, "maxiter": 10_000},
    )
    z = fit.x
    return np.exp(z - logsumexp(z))
