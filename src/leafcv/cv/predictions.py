"""Held-out predictions a reader can plot: each point's predicted A, and each leaf's predictive curves.

Both are computed at scoring time, under the same held-out posterior as the leaf's score: the
PSIS-weighted full-data draws (a leaf scored by integrated PSIS) or the draws of the refit without it.
A held-out leaf's own effects are not known, so they are drawn from the population given each draw,
exactly as in its score.

Curves: for each curve type a leaf has, a grid of 40 values of the varied quantity (Ci for A–Ci curves,
PPFD for A–Q curves) across the leaf's own measured range, the other conditions held at the medians of
that curve's points. At each grid value: the predictive mean of A and the 5 % and 95 % quantiles of a new
observation (the mixture over draws of normal, or Student-t, residuals around A).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats
from scipy.special import logsumexp, ndtr

from .leafmodel import LeafModel
from .quadrature import prior_chol
from ..data.dataset import LEAF_TERM

#: Grid values per curve.
GRID_POINTS = 40
#: Draws (thinned evenly) behind a curve's quantiles.
GRID_DRAWS = 400
#: Which quantity each curve type varies.
VARIED = {"aci": "ci", "aq": "ppfd"}
#: The interval of a new observation shown around each curve.
INTERVAL = (0.05, 0.95)
#: Seed stream of the effect draws behind the curves.
GRID_STREAM = 23
#: Columns of the two tables (predictions/<structure>-points.csv and -curves.csv).
POINT_COLUMNS = ["leaf", "curve", "curve_type", "ci", "ppfd", "t_leaf", "observed", "predicted"]
CURVE_COLUMNS = ["leaf", "curve_type", "varied", "ci", "ppfd", "t_leaf", "o2", "mean", "q05", "q95"]


@dataclass(frozen=True)
class CurveDraws:
    """A leaf's predicted A on its grids at thinned draws, with a population draw of its effects."""

    grid: pd.DataFrame           # curve_type, varied, ci, ppfd, t_leaf, o2
    draw_index: np.ndarray       # (n,) rows of the fit's flattened draws
    a: np.ndarray                # (n, grid points)
    sigma: np.ndarray            # (n, grid points)
    nu: np.ndarray | None        # (n,) Student-t degrees of freedom


def leaf_grid(points: pd.DataFrame) -> pd.DataFrame:
    """The grid of each curve type of one leaf's points (see the module text)."""
    rows = []
    for kind, pts in points.groupby("curve_type", sort=True):
        varied = VARIED.get(str(kind))
        if varied is None:
            continue
        lo, hi = float(pts[varied].min()), float(pts[varied].max())
        values = np.linspace(lo, hi, GRID_POINTS) if hi > lo else np.array([lo])
        fixed = {c: float(pts[c].median()) for c in ("ci", "ppfd", "t_leaf", "o2")}
        for v in values:
            rows.append({"curve_type": str(kind), "varied": varied, **fixed, varied: float(v)})
    return pd.DataFrame(rows, columns=["curve_type", "varied", "ci", "ppfd", "t_leaf", "o2"])


def curve_draws(model: LeafModel, seed: int) -> CurveDraws | None:
    """A at the leaf's grid for GRID_DRAWS evenly thinned draws, the leaf's effects drawn from their
    population distribution in each draw (seeded by ``seed`` and the leaf)."""
    grid = leaf_grid(model.points)
    if grid.empty:
        return None
    S = len(model.eta)
    idx = np.unique(np.linspace(0, S - 1, min(GRID_DRAWS, S)).astype(int))
    eta = model.eta[idx].copy()
    if model.dim:
        rng = np.random.default_rng([seed, GRID_STREAM, model.leaf])
        mean, sd = model.mean_sd()
        z = rng.standard_normal((len(idx), model.dim))
        eta[:, model.effect_params] = mean[idx] + np.einsum("sij,sj->si", prior_chol(sd[idx]), z)
    factors = model.factors_at(*(grid[c].to_numpy(float) for c in ("ci", "ppfd", "t_leaf", "o2")))
    a = model.assimilation_at(eta, factors)
    sigma = np.column_stack([model.sigma_of(k)[idx] for k in grid["curve_type"]])
    nu = None if model.nu is None else model.nu[idx]
    return CurveDraws(grid, idx, a, sigma, nu)


def summarise_curves(cd: CurveDraws, log_weights: np.ndarray | None = None) -> pd.DataFrame:
    """Predictive mean and the INTERVAL quantiles of a new observation at each grid value, the draws
    weighted by ``log_weights`` (over all the fit's draws; None: equal weights)."""
    n = len(cd.draw_index)
    lw = np.zeros(n) if log_weights is None else np.asarray(log_weights, float)[cd.draw_index]
    w = np.exp(lw - logsumexp(lw))
    out = cd.grid.copy()
    out["mean"] = w @ cd.a
    for q, name in zip(INTERVAL, ("q05", "q95")):
        out[name] = _mixture_quantile(q, w, cd.a, cd.sigma, cd.nu)
    return out


def _mixture_quantile(q: float, w: np.ndarray, loc: np.ndarray, scale: np.ndarray, nu: np.ndarray | None,
                      iterations: int = 48) -> np.ndarray:
    """The q quantile of sum_s w_s F((y - loc_s) / scale_s) at each column, by bisection (the CDF is
    monotone; 48 halvings of the bracket, at most a few thousand umol m-2 s-1 wide, leave < 1e-11)."""
    lo = np.min(loc - 40 * scale, axis=0)
    hi = np.max(loc + 40 * scale, axis=0)
    cdf = ndtr if nu is None else (lambda z: stats.t.cdf(z, nu[:, None]))
    for _ in range(iterations):
        mid = 0.5 * (lo + hi)
        below = w @ cdf((mid[None, :] - loc) / scale) < q
        lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
    return 0.5 * (lo + hi)


def points_table(dataset, preds: dict[int, np.ndarray]) -> pd.DataFrame:
    """Every predicted point: leaf, curve, conditions, observed and held-out predicted A."""
    obs = dataset.obs
    parts = []
    for g in sorted(preds):
        rows = obs[obs["leaf_index"] == g]
        parts.append(pd.DataFrame({
            "leaf": rows["leaf"].astype(str).to_numpy(), "curve": rows["curve"].astype(str).to_numpy(),
            "curve_type": rows["curve_type"].to_numpy(), "ci": rows["ci"].to_numpy(float),
            "ppfd": rows["ppfd"].to_numpy(float), "t_leaf": rows["t_leaf"].to_numpy(float),
            "observed": rows["a_net"].to_numpy(float), "predicted": np.asarray(preds[g], float)}))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=POINT_COLUMNS)


def curves_table(dataset, curves: dict[int, pd.DataFrame]) -> pd.DataFrame:
    """Every leaf's curve summaries with its leaf id first."""
    leaves = dataset.leaves[LEAF_TERM].astype(str).to_numpy()
    parts = [c.assign(leaf=leaves[g])[["leaf"] + list(c.columns)] for g, c in sorted(curves.items())]
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=CURVE_COLUMNS)
