"""ArviZ's array functions that leafcv uses on plain NumPy arrays (arviz-stats' ``array_stats``).

Diagnostics take (chain, draw) arrays; PSIS takes one leaf's draws. The functions are the ones ArviZ's
own ``rhat``, ``ess`` and ``loo`` call, so leafcv's numbers and ArviZ's agree.

Tests: tests/cv/test_psis.py, tests/sampling/stan/test_leafcv.py, tests/sampling/test_api.py.
"""
from __future__ import annotations

import numpy as np

#: The quantiles of the tail ESS (Vehtari et al. 2021, section 4.3: the 5 % and 95 % quantiles).
TAIL_PROB = (0.05, 0.95)


def _stats():
    from arviz_stats.base import array_stats

    return array_stats


def rhat(x: np.ndarray) -> float:
    """Rank-normalised split R-hat (Vehtari et al. 2021) of a (chain, draw) array."""
    return float(_stats().rhat(np.asarray(x, float), chain_axis=0, draw_axis=1))


def ess(x: np.ndarray, method: str = "bulk") -> float:
    """Effective sample size of a (chain, draw) array: ``bulk``, ``tail`` or ``mean`` (Vehtari et al. 2021)."""
    extra = {"prob": TAIL_PROB} if method == "tail" else {}
    return float(_stats().ess(np.asarray(x, float), method=method, chain_axis=0, draw_axis=1, **extra))


def psislw(log_ratios: np.ndarray, r_eff: float = 1.0) -> tuple[np.ndarray, float]:
    """Pareto-smoothed importance log weights (normalised) and the Pareto k-hat of one set of draws
    (Vehtari et al. 2024), from the log importance ratios (for leave-one-out: minus the log likelihood).

    arviz-stats' ``psislw`` takes the log likelihood itself (the ratios' negative), unlike ArviZ 0.x's."""
    lw, k = _stats().psislw(-np.asarray(log_ratios, float), r_eff=float(r_eff))
    return np.asarray(lw, float), float(k)


def mcse(x: np.ndarray, method: str = "mean") -> float:
    """Monte Carlo standard error of the mean (or ``sd``, ...) of a (chain, draw) array (Vehtari et al. 2021)."""
    return float(_stats().mcse(np.asarray(x, float), method=method, chain_axis=0, draw_axis=1))
