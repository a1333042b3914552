"""Marginal likelihood of a leaf with its random effects integrated out, per posterior draw.

For draw s, m_s = int prod_i p(y_i | b, theta_s) N(b | mu_s, diag(sd_s^2)) db over the leaf's own
link-scale parameter values b (never over the standard-normal z of a non-centred term). Computed by
Gauss-Hermite quadrature placed per draw at the mode of the integrand, scaled by the inverse negative
Hessian (Laplace-adaptive; Pinheiro & Bates 1995; Liu & Pierce 1994). The hard minimum of the FvCB
model has a kink, so every cell is checked: where the Newton search fails or a second, smaller rule
disagrees by more than ``tol`` nats, the cell is recomputed on a wide, fine grid placed at
``fallback_centre`` / ``fallback_chol`` (e.g. the leaf's full-fit posterior moments, widened).

With probabilists' Hermite nodes z_q and weights w_q normalised to sum to 1, and b = c + C z,
  log m ~= log|C| + logsumexp_q [log w_q + h(c + C z_q) - log phi(z_q)],
where h is the log integrand (CROSS-VALIDATION.md, "Computing m_g").
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Callable

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from scipy.special import logsumexp

LogLik = Callable[[np.ndarray], np.ndarray]   # b (S, Q, d) -> log-likelihood of the leaf's points (S, Q)
_LOG_2PI = np.log(2 * np.pi)


@dataclass(frozen=True)
class QuadratureInfo:
    n_cells: int
    n_fallback: int          # cells recomputed on the fallback grid
    max_rule_gap: float      # largest |difference| between the two adaptive rules, in nats (before fallback)


def gh_grid(n: int, d: int) -> tuple[np.ndarray, np.ndarray]:
    """Tensor Gauss-Hermite nodes (n^d, d) for the standard normal and log weights summing to 1."""
    x, w = hermegauss(n)
    logw = np.log(w) - 0.5 * _LOG_2PI
    nodes = np.array(list(itertools.product(x, repeat=d)), float).reshape(-1, d)
    lw = np.array([sum(c) for c in itertools.product(logw, repeat=d)], float)
    return nodes, lw


#: Largest dimension integrated by tensor Gauss-Hermite; beyond it a scrambled Sobol rule is used.
MAX_TENSOR_DIM = 3
#: Points of the quasi-Monte Carlo rule (main, check, fallback) beyond MAX_TENSOR_DIM dimensions.
QMC_POINTS = (1024, 256, 4096)
#: Draws per block, so that (draws x nodes x points) arrays stay small.
BLOCK = 250


def qmc_grid(n_points: int, d: int, seed: int = 20261202) -> tuple[np.ndarray, np.ndarray]:
    """Scrambled Sobol points mapped to the standard normal, with log weights log(1/n).

    Returned as (nodes, log w) so that the Gauss-Hermite formula applies unchanged: for
    int g(z) phi(z) dz, Gauss-Hermite gives sum_q w_q g(z_q) and randomised quasi-Monte Carlo the
    plain mean (1/n) sum_q g(z_q) over normal-mapped Sobol points (Owen 2003; from memory).
    """
    from scipy.stats import norm, qmc

    u = qmc.Sobol(d, scramble=True, seed=seed).random(n_points)
    z = norm.ppf(np.clip(u, 1e-12, 1 - 1e-12))
    return z, np.full(n_points, -np.log(n_points))


def rule(n: int, d: int, kind: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Hermite with n nodes per dimension up to MAX_TENSOR_DIM, else QMC (kind 0 main, 1 check, 2 fallback)."""
    return gh_grid(n, d) if d <= MAX_TENSOR_DIM else qmc_grid(QMC_POINTS[kind], d, seed=20261202 + kind)


def prior_chol(sd: np.ndarray) -> np.ndarray:
    """The prior scale as a lower Cholesky factor (S, d, d): ``sd`` is SDs (S, d) or already a factor."""
    return sd if sd.ndim == 3 else np.einsum("ij,sj->sij", np.eye(sd.shape[1]), sd)


def prior_var(sd: np.ndarray) -> np.ndarray:
    """Prior variances (S, d) from SDs (S, d) or a Cholesky factor (S, d, d)."""
    return sd**2 if sd.ndim == 2 else np.sum(sd**2, axis=2)


def _log_prior(b: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """log N(b | mean, Sigma) with Sigma = diag(sd^2) for sd (S, d), or sd sd' for a Cholesky factor
    sd (S, d, d) (correlated leaf effects); b (S, Q, d), mean (S, d)."""
    if sd.ndim == 3:
        inv = np.linalg.inv(sd)
        z = np.einsum("sij,sqj->sqi", inv, b - mean[:, None, :])
        logdet = np.sum(np.log(np.diagonal(sd, axis1=1, axis2=2)), axis=1)
        return np.sum(-0.5 * z**2, axis=-1) - logdet[:, None] - 0.5 * b.shape[-1] * _LOG_2PI
    z = (b - mean[:, None, :]) / sd[:, None, :]
    return np.sum(-0.5 * z**2 - np.log(sd[:, None, :]) - 0.5 * _LOG_2PI, axis=-1)


def log_integrand(loglik: LogLik, b: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    val = loglik(b) + _log_prior(b, mean, sd)
    return np.where(np.isfinite(val), val, -np.inf)


def quadrature(loglik: LogLik, mean: np.ndarray, sd: np.ndarray, centre: np.ndarray, chol: np.ndarray,
               n_nodes: int, kind: int = 0) -> np.ndarray:
    """log m per draw on the grid centre + chol z; centre (S, d), chol (S, d, d) lower triangular."""
    S, d = centre.shape
    z, lw = rule(n_nodes, d, kind)
    b = centre[:, None, :] + np.einsum("sij,qj->sqi", chol, z)
    h = log_integrand(loglik, b, mean, sd)
    log_phi = -0.5 * np.sum(z**2, axis=1) - 0.5 * d * _LOG_2PI
    logdet = np.sum(np.log(np.abs(np.diagonal(chol, axis1=1, axis2=2))), axis=1)
    return logdet + logsumexp(lw[None, :] + h - log_phi[None, :], axis=1)


def blocked_quadrature(loglik_rows, rows: np.ndarray, mean, sd, centre, chol, n_nodes: int, kind: int = 0
                       ) -> np.ndarray:
    """`quadrature` over the draws ``rows`` in blocks of BLOCK draws (bounded memory)."""
    out = np.empty(len(rows))
    for i in range(0, len(rows), BLOCK):
        r = rows[i:i + BLOCK]
        out[i:i + BLOCK] = quadrature(loglik_rows(r), mean[r], sd[r], centre[r], chol[r], n_nodes, kind)
    return out


def _stencil(d: int, eps: float) -> np.ndarray:
    """Central-difference stencil: 0, +-e_i, and +-e_i +-e_j (i < j)."""
    pts = [np.zeros(d)]
    for i in range(d):
        for s in (1, -1):
            e = np.zeros(d)
            e[i] = s * eps
            pts.append(e)
    for i, j in itertools.combinations(range(d), 2):
        for si, sj in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
            e = np.zeros(d)
            e[i], e[j] = si * eps, sj * eps
            pts.append(e)
    return np.array(pts)


def _grad_hess(h_fn, b: np.ndarray, eps: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Value, gradient and Hessian of h at b (S, d) by central differences, all draws at once."""
    S, d = b.shape
    st = _stencil(d, eps)
    vals = h_fn(b[:, None, :] + st[None, :, :])            # (S, n_stencil)
    f0 = vals[:, 0]
    g = np.empty((S, d))
    H = np.empty((S, d, d))
    for i in range(d):
        fp, fm = vals[:, 1 + 2 * i], vals[:, 2 + 2 * i]
        g[:, i] = (fp - fm) / (2 * eps)
        H[:, i, i] = (fp - 2 * f0 + fm) / eps**2
    k = 1 + 2 * d
    for i, j in itertools.combinations(range(d), 2):
        fpp, fpm, fmp, fmm = (vals[:, k + m] for m in range(4))
        H[:, i, j] = H[:, j, i] = (fpp - fpm - fmp + fmm) / (4 * eps**2)
        k += 4
    return f0, g, H


def laplace_mode(loglik_rows: Callable[[np.ndarray], LogLik], mean: np.ndarray, sd: np.ndarray,
                 start: np.ndarray, max_iter: int = 30, eps: float = 1e-4
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-draw mode of the log integrand by damped Newton with backtracking.

    ``loglik_rows(rows)`` gives the log-likelihood restricted to the draws ``rows``. Where the
    Hessian is not negative definite the step is a prior-scaled gradient step. Returns (mode (S, d),
    chol of the inverse negative Hessian (S, d, d), ok (S,) bool); a draw is not ok when the search
    ended with non-finite values or a Hessian that is not negative definite.
    """
    def h_rows(x, rows):
        return log_integrand(loglik_rows(rows), x, mean[rows], sd[rows])

    b = np.array(start, float, copy=True)
    S, d = b.shape
    active = np.ones(S, bool)
    for _ in range(max_iter):
        if not active.any():
            break
        idx = np.flatnonzero(active)
        f0, g, H = _grad_hess(lambda x: h_rows(x, idx), b[idx], eps)
        neg = -H
        good = np.all(np.isfinite(neg.reshape(len(idx), -1)), axis=1)
        good[good] = np.all(np.linalg.eigvalsh(neg[good]) > 0, axis=1)
        step = g * prior_var(sd[idx])                       # fallback: gradient step scaled by the prior
        if good.any():
            step[good] = np.linalg.solve(neg[good], g[good][..., None])[..., 0]
        step = np.clip(np.nan_to_num(step), -2.0, 2.0)
        t = np.ones(len(idx))
        accepted = np.zeros(len(idx), bool)
        for _ in range(12):
            cand = b[idx] + t[:, None] * step
            fc = h_rows(cand[:, None, :], idx)[:, 0]
            better = np.isfinite(fc) & (fc >= f0 - 1e-12) & ~accepted
            b[idx[better]] = cand[better]
            accepted |= better
            t = np.where(accepted, t, t / 2)
            if accepted.all():
                break
        moved = np.max(np.abs(t[:, None] * step), axis=1)
        active[idx[(moved < 1e-7) | ~accepted]] = False
    all_rows = np.arange(S)
    f0, g, H = _grad_hess(lambda x: h_rows(x, all_rows), b, eps)
    neg = -H
    ok = np.isfinite(f0) & np.all(np.isfinite(neg.reshape(S, -1)), axis=1)
    ok[ok] = np.all(np.linalg.eigvalsh(neg[ok]) > 0, axis=1)
    chol = np.array(prior_chol(sd), float)                   # prior scale where the curvature is unusable
    if ok.any():
        chol[ok] = np.linalg.cholesky(np.linalg.inv(neg[ok]))
    return b, chol, ok


def leaf_log_marginal(
    loglik_rows: Callable[[np.ndarray], LogLik],
    mean: np.ndarray,
    sd: np.ndarray,
    start: np.ndarray,
    fallback_centre: np.ndarray,
    fallback_chol: np.ndarray,
    n_nodes: int = 7,
    n_check: int = 5,
    n_fallback: int = 21,
    tol: float = 0.05,
) -> tuple[np.ndarray, QuadratureInfo]:
    """log m_s of one leaf for every draw s, with the robust scheme described in the module docstring.

    Parameters
    ----------
    loglik_rows
        ``loglik_rows(rows)`` returns the leaf's log-likelihood function restricted to the draws
        ``rows`` (an index array): b (len(rows), Q, d) -> (len(rows), Q).
    mean, sd
        Population mean and SD of the leaf's effects per draw, (S, d); for correlated effects the
        Cholesky factor of their covariance, (S, d, d).
    start
        Starting points of the mode search, (S, d).
    fallback_centre, fallback_chol
        Grid for cells that fail the checks: (d,) and (d, d), or per draw (S, d) and (S, d, d).
    """
    S, d = mean.shape
    rows = np.arange(S)
    mode, chol, ok = np.empty((S, d)), np.empty((S, d, d)), np.empty(S, bool)
    for i in range(0, S, BLOCK):
        r = rows[i:i + BLOCK]
        mode[r], chol[r], ok[r] = laplace_mode(lambda sub, r=r: loglik_rows(r[sub]), mean[r], sd[r], start[r])
    lm = blocked_quadrature(loglik_rows, rows, mean, sd, mode, chol, n_nodes, 0)
    lm_check = blocked_quadrature(loglik_rows, rows, mean, sd, mode, chol, n_check, 1)
    gap = np.abs(lm - lm_check)
    gap = np.where(np.isfinite(gap), gap, np.inf)
    redo = ~ok | (gap > tol) | ~np.isfinite(lm)
    max_gap = float(np.max(np.where(ok, gap, 0.0))) if ok.any() else float("inf")
    if redo.any():
        r = np.flatnonzero(redo)
        fc = np.array(np.broadcast_to(fallback_centre, (S, d)))
        fch = np.array(np.broadcast_to(fallback_chol, (S, d, d)))
        lm[r] = blocked_quadrature(loglik_rows, r, mean, sd, fc, fch, n_fallback if d <= 2 else 9, 2)
    return lm, QuadratureInfo(S, int(redo.sum()), max_gap)
