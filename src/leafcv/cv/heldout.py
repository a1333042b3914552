"""Joint marginal likelihood of the leaves of one held-out level (a species or a month left out).

The leaves of a held-out level share its unknown effects U (one per random term of that grouping:
an intercept on some parameter, or a slope), so the level is scored jointly, per posterior draw s:

  p(y_level | theta_s) = int prod_g m_g(U) N(U | 0, diag tau_s^2) dU,
  m_g(U) = int p(y_g | b, theta_s) N(b | mu_g,s + U x_g, Sigma_s) db,

the inner integrals by `leafcv.cv.quadrature.leaf_log_marginal` (every cell checked), the outer one by
Gauss-Hermite placed at the mode of its log integrand F(U) = sum_g log m_g(U) + log N(U | 0, tau^2),
scaled by its curvature (Newton steps from U = 0 with a central-difference stencil, each capped at 3
tau, until they settle: a level far in the tails is reached), checked by two shifted rules and escalated
like the inner rules. The inner rules' bounds enter weighed by each outer node's share of the outer sum,
so an inner integral unsettled at a node far in the tails does not spoil the level. The sum of per-leaf integrals with U integrated for
each leaf apart is not this density (CROSS-VALIDATION.md, "Held-out levels").
"""
from __future__ import annotations

import copy
from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp

from .leafmodel import LeafModel
from .quadrature import (CHECK_SHIFT, GH_LEVELS, LEAF_TOL, TOL, _LOG_2PI, _level_rules, draw_shares,
                         grad_hess, leaf_log_marginal)

#: Outer mode search: at most this many Newton steps, stopped once a step is below this many SDs.
OUTER_ITERATIONS = 12
OUTER_STEP_TOL = 0.01


@dataclass(frozen=True)
class LevelInfo:
    n_cells: int
    n_inner_calls: int
    inner_bound: float        # inner bounds summed over the level's leaves, weighed by outer node and draw (nats)
    outer_bound: float        # share-weighted outer rule gaps (nats)
    n_unresolved: int         # draws whose outer rules never agreed, or with unresolved inner cells
    n_escalated: int

    @property
    def bound(self) -> float:
        return self.inner_bound + self.outer_bound


def _shifted(model: LeafModel, keys: list[tuple[int, int]], U: np.ndarray, rows: np.ndarray) -> LeafModel:
    """A copy of ``model`` restricted to draws ``rows`` with the shared effects U (len(rows), k) added."""
    m = copy.copy(model)
    m.mu, m.eta = model.mu[rows].copy(), model.eta[rows].copy()
    m.sd = model.sd[rows]
    m.sigma = model.sigma[rows]
    m.nu = None if model.nu is None else model.nu[rows]
    for r, lev, pi, x in model.shared:
        j = keys.index((r, lev))
        m.mu[:, pi] += U[:, j] * x
        if pi not in model.effect_params:
            m.eta[:, pi] += U[:, j] * x
    return m


class _Level:
    """Sum over the level's leaves of log m_g(U), for per-draw U, with the inner rules' bounds."""

    def __init__(self, models: list[LeafModel], keys, starts: list[list[np.ndarray]], tol: float):
        self.models, self.keys, self.starts, self.tol = models, keys, starts, tol
        self.calls = 0
        self.last_bound = np.zeros(0)       # per row of the last call: summed inner bounds (inf: unsettled)

    def __call__(self, U: np.ndarray, rows: np.ndarray) -> np.ndarray:
        total = np.zeros(len(rows))
        bound = np.zeros(len(rows))
        for model, starts in zip(self.models, self.starts):
            m = _shifted(model, self.keys, U, rows)
            self.calls += 1
            if m.dim == 0:
                total += m.fixed_loglik()
                continue
            mean, sd = m.mean_sd()
            st = [s[rows] for s in starts] + [mean]
            lm, info = leaf_log_marginal(m.loglik_rows, mean, sd, st, tol=self.tol, weighting="mean")
            total += lm
            bound += info.bound if np.isfinite(info.bound) and info.bound <= LEAF_TOL else np.inf
        self.last_bound = bound
        return total


def _log_prior(U: np.ndarray, tau: np.ndarray) -> np.ndarray:
    return np.sum(-0.5 * (U / tau) ** 2 - np.log(tau) - 0.5 * _LOG_2PI, axis=-1)


def _newton(F, tau: np.ndarray, rows: np.ndarray, centre: np.ndarray, step: np.ndarray):
    """One Newton step of F + log prior from ``centre`` with a central-difference stencil of ``step``,
    capped at 3 tau; returns (value at centre, new centre, Cholesky factor of the inverse negative
    Hessian, ok)."""
    n, k = centre.shape

    def h_fn(points):                                     # (n, n_stencil, k) -> (n, n_stencil)
        return np.stack([F(points[:, j], rows) + _log_prior(points[:, j], tau[rows])
                         for j in range(points.shape[1])], axis=1)

    f0, g, H = grad_hess(h_fn, centre, step)
    neg = -H
    ok = np.all(np.isfinite(neg.reshape(n, -1)), axis=1) & np.isfinite(f0)
    ok[ok] = np.all(np.linalg.eigvalsh(neg[ok]) > 0, axis=1)
    new = centre.copy()
    chol = np.einsum("ij,sj->sij", np.eye(k), tau[rows])
    if ok.any():
        delta = np.linalg.solve(neg[ok], g[ok][..., None])[..., 0]
        limit = 3 * tau[rows][ok]
        new[ok] = centre[ok] + np.clip(delta, -limit, limit)
        chol[ok] = np.linalg.cholesky(np.linalg.inv(neg[ok]))
    return f0, new, chol, ok


def _outer_mode(F, tau: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mode and curvature of the outer log integrand per draw: Newton steps (each capped at 3 tau) from
    U = 0 until the step is below OUTER_STEP_TOL posterior SDs, at most OUTER_ITERATIONS; a step that
    lowers the log integrand is halved back. A level far in the tails (8 tau out) is reached in a few
    steps. Returns (centre (S, k), Cholesky factor (S, k, k), ok (S,))."""
    S, k = tau.shape
    centre = np.zeros((S, k))
    chol = np.einsum("ij,sj->sij", np.eye(k), tau)
    ok = np.zeros(S, bool)
    value = np.full(S, -np.inf)
    previous = centre.copy()
    step = 0.5 * tau
    active = np.arange(S)
    for _ in range(OUTER_ITERATIONS):
        if not active.size:
            break
        f0, new, c, k_ok = _newton(F, tau, active, centre[active], step[active])
        worse = np.isfinite(value[active]) & (f0 < value[active] - 1e-9)
        # a step that made things worse: go back halfway and search again from there
        back = active[worse]
        centre[back] = 0.5 * (centre[back] + previous[back])
        keep = active[~worse]
        kk = ~worse
        value[keep] = f0[kk]
        chol[keep] = np.where(k_ok[kk][:, None, None], c[kk], chol[keep])
        ok[keep] = k_ok[kk]
        previous[keep] = centre[keep]
        sd = np.sqrt(np.sum(chol[keep] ** 2, axis=2))
        moved = np.max(np.abs(new[kk] - centre[keep]) / sd, axis=1)
        centre[keep] = new[kk]
        step[keep] = np.maximum(sd, 1e-3 * tau[keep])
        still = keep[(moved > OUTER_STEP_TOL) & k_ok[kk]]
        active = np.union1d(still, back)
    return centre, chol, ok


def level_log_marginal(models: list[LeafModel], tau: np.ndarray, keys: list[tuple[int, int]],
                       starts: list[list[np.ndarray]], tol: float = TOL) -> tuple[np.ndarray, LevelInfo]:
    """log p(y_level | theta_s) for every draw s (module docstring).

    Parameters
    ----------
    models
        The level's leaves, built with ``integrate_heldout=False``.
    tau
        SDs of the shared effects per draw, (S, k), in the order of ``keys``.
    keys
        (group term, stacked level) of each shared effect.
    starts
        Per leaf, the mode-search starts of its inner integrals (each (S, d)).
    """
    S, k = tau.shape
    rows = np.arange(S)
    F = _Level(models, keys, starts, tol)
    centre, chol, ok = _outer_mode(F, tau)
    lm, gap, inner = np.full(S, -np.inf), np.full(S, np.inf), np.full(S, np.inf)
    todo = rows
    escalated = np.zeros(S, bool)
    shift = np.full(k, CHECK_SHIFT / np.sqrt(k))
    for level in range(len(GH_LEVELS)):
        if not todo.size:
            break
        val_rule, chk_rule, scale = _level_rules(level, k)
        c = chol[todo] * scale
        results = []
        for (z, lw), offset in ((val_rule, 0.0), (chk_rule, 1.0), (chk_rule, -1.0)):
            log_phi = -0.5 * np.sum(z**2, axis=1) - 0.5 * k * _LOG_2PI
            terms, bounds = [], []
            for q in range(len(z)):
                U = centre[todo] + c @ (z[q] + offset * shift)
                terms.append(lw[q] + F(U, todo) + _log_prior(U, tau[todo]) - log_phi[q])
                bounds.append(F.last_bound)
            terms = np.stack(terms, axis=1)
            logdet = np.sum(np.log(np.abs(np.diagonal(c, axis1=1, axis2=2))), axis=1)
            results.append(logdet + logsumexp(terms, axis=1))
            if offset == 0.0:
                # the inner rules' error, weighed by each outer node's share of the outer sum: an inner
                # integral unsettled at a node far in the tails (share ~ 0) does not spoil the level
                with np.errstate(invalid="ignore", over="ignore"):
                    node_share = np.exp(terms - logsumexp(terms, axis=1, keepdims=True))
                    b = np.stack(bounds, axis=1)
                    inner_now = np.sum(np.where(node_share > 1e-12, node_share * b, 0.0), axis=1)
        v = results[0]
        g = np.maximum(np.abs(v - results[1]), np.abs(v - results[2]))
        g = np.where(np.isfinite(g), g, np.inf)
        lm[todo], gap[todo], inner[todo] = v, g, inner_now
        todo = todo[(g > tol) | ~np.isfinite(v)]
        escalated[todo] = True
    bad = np.zeros(S, bool)
    bad[todo] = True
    share = draw_shares(lm, "mean")          # the level's score is log mean_s p_s (a refit)
    with np.errstate(invalid="ignore"):
        outer = float(np.sum(np.where(share > 0, share * gap, 0.0))) if np.all(np.isfinite(gap[share > 0])) \
            else float("inf")
        inner_bound = float(np.sum(np.where(share > 0, share * inner, 0.0))) \
            if np.all(np.isfinite(inner[share > 0])) else float("inf")
    info = LevelInfo(S, F.calls, inner_bound, outer, int((bad | ~np.isfinite(inner)).sum()), int(escalated.sum()))
    return lm, info
