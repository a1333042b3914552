"""Integrated PSIS leave-one-leaf-out from per-draw marginal likelihoods of each leaf.

Since a leaf's effects are informed only by its own data, p(theta | y_-g) is proportional to
p(theta | y) / m_g(theta): the importance ratios are 1 / m_g(theta_s) and
p(y_g | y_-g) ~= sum_s w_s m_g(theta_s) / sum_s w_s with Pareto-smoothed weights w
(Vehtari et al. 2016, JMLR 17(103); Merkle, Furr & Rabe-Hesketh 2019; smoothing: Vehtari et al. 2024,
JMLR 25(72), through ArviZ's `psislw`).
"""
from __future__ import annotations

import numpy as np
from scipy.special import logsumexp


def khat_threshold(n_draws: int) -> float:
    """min(1 - 1/log10(S), 0.7) (Vehtari et al. 2024)."""
    return float(min(1 - 1 / np.log10(n_draws), 0.7))


def integrated_loo(log_m: np.ndarray, r_eff: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """Per-leaf elpd and Pareto k-hat from log m (S draws, G leaves)."""
    elpd, khat, _ = integrated_loo_weights(log_m, r_eff)
    return elpd, khat


def integrated_loo_weights(log_m: np.ndarray, r_eff: float = 1.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """As `integrated_loo`, plus the smoothed, normalised log weights (G, S) for held-out predictions."""
    import arviz as az

    log_m = np.asarray(log_m, float)
    lw, khat = az.psislw(-log_m.T, reff=r_eff)          # (G, S): ArviZ takes samples on the last axis
    lw = np.asarray(lw)
    elpd = logsumexp(lw + log_m.T, axis=1)             # lw are normalised
    return np.asarray(elpd), np.asarray(khat), lw


def refit_elpd(log_m_heldout: np.ndarray) -> float:
    """elpd of a held-out leaf from a refit without it: log mean_s m_g(theta_s)."""
    x = np.asarray(log_m_heldout, float)
    return float(logsumexp(x) - np.log(len(x)))
