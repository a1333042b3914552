"""Integrated PSIS leave-one-leaf-out from per-draw marginal likelihoods of each leaf, with Monte Carlo
standard errors.

Since a leaf's effects are informed only by its own data, p(theta | y_-g) is proportional to
p(theta | y) / m_g(theta): the importance ratios are 1 / m_g(theta_s) and
p(y_g | y_-g) ~= sum_s w_s m_g(theta_s) / sum_s w_s with Pareto-smoothed weights w
(Vehtari et al. 2016, JMLR 17(103); Merkle, Furr & Rabe-Hesketh 2019; smoothing: Vehtari et al. 2024,
JMLR 25(72), through arviz-stats' `psislw`).

Monte Carlo error (delta method for the log of a self-normalised importance-sampling estimate; the
form of Vehtari et al. 2024 and of the PSIS-LOO MCSE of Vehtari, Gelman & Gabry 2017, sec. 2.3 and
appendix, recalled from memory): with normalised weights w_s, E = sum_s w_s m_s and
  Var(E) ~= sum_s w_s^2 (m_s - E)^2 / r_eff,   MCSE(log E) ~= sqrt(Var(E)) / E,
where r_eff = ESS / S of the m_s computed from the chains (ArviZ's rank-free "mean" ESS). A refit's
elpd = log mean_s m_s has MCSE ~= sd(m) / (mean(m) sqrt(ESS)), ESS again from the chains.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp

from .result import khat_threshold  # noqa: F401  (one definition, re-exported for callers)


@dataclass(frozen=True)
class LooEstimate:
    """Per-leaf integrated PSIS estimates (G leaves)."""

    elpd: np.ndarray      # (G,)
    khat: np.ndarray      # (G,)
    mcse: np.ndarray      # (G,)
    r_eff: np.ndarray     # (G,)
    log_weights: np.ndarray   # (G, S) smoothed, normalised


def relative_efficiency(log_m: np.ndarray, chains: int) -> float:
    """ESS / S of exp(log m) over ``chains`` equal chains (draws chain after chain), in (0, 1].

    Capped at 1: antithetic chains would give more, which a Monte Carlo error should not count on.
    """
    x = np.asarray(log_m, float)
    S = x.size
    if chains < 1 or S % chains:
        raise ValueError(f"{S} draws do not split into {chains} equal chains")
    m = np.exp(x - np.max(x)).reshape(chains, S // chains)
    if np.ptp(m) == 0 or S // chains < 4:
        return 1.0
    from ..arviz_arrays import ess as arviz_ess

    ess = arviz_ess(m, method="mean")
    if not np.isfinite(ess) or ess <= 0:
        return 1.0 / S
    return float(min(ess / S, 1.0))


def integrated_loo(log_m: np.ndarray, chains: int = 1) -> LooEstimate:
    """Per-leaf elpd, Pareto k-hat and MCSE from log m (S draws, G leaves), draws chain after chain."""
    from ..arviz_arrays import psislw

    log_m = np.asarray(log_m, float)
    S, G = log_m.shape
    r_eff = np.array([relative_efficiency(log_m[:, g], chains) for g in range(G)])
    lw_all, khat = np.empty((G, S)), np.empty(G)
    for g in range(G):   # psislw takes one r_eff per call
        lw_all[g], khat[g] = psislw(-log_m[:, g], r_eff=float(r_eff[g]))
    elpd = logsumexp(lw_all + log_m.T, axis=1)          # lw are normalised
    # sum_s w_s^2 (m_s / E - 1)^2, written in logs: w_s m_s / E = exp(lw + log m - elpd)
    a = lw_all + log_m.T - elpd[:, None]
    rel_var = np.sum(np.exp(2 * a) - 2 * np.exp(a + lw_all) + np.exp(2 * lw_all), axis=1)
    mcse = np.sqrt(np.maximum(rel_var, 0.0) / r_eff)
    return LooEstimate(np.asarray(elpd), khat, mcse, r_eff, lw_all)


def refit_elpd(log_m_heldout: np.ndarray, chains: int = 1) -> tuple[float, float]:
    """elpd of a held-out leaf from a refit without it, log mean_s m_g(theta_s), and its MCSE."""
    x = np.asarray(log_m_heldout, float)
    elpd = float(logsumexp(x) - np.log(len(x)))
    m = np.exp(x - np.max(x))
    ess = relative_efficiency(x, chains) * len(x)
    mcse = float(np.std(m, ddof=1) / (np.mean(m) * np.sqrt(ess))) if len(x) > 1 else float("inf")
    return elpd, mcse
