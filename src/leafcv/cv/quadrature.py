"""Marginal likelihood of a leaf with its random effects integrated out, per posterior draw.

For draw s, m_s = int prod_i p(y_i | b, theta_s) N(b | mu_s, Sigma_s) db over the leaf's own
link-scale parameter values b (never over the standard-normal z of a non-centred term).

Every cell (leaf, draw) is placed from the leaf's own conditional posterior at that draw: the mode of
the log integrand h found by damped Newton from one or more starts, scaled by the inverse negative
Hessian (Laplace-adaptive Gauss-Hermite; Pinheiro & Bates 1995; Liu & Pierce 1994). With
probabilists' Hermite nodes z_q and weights w_q normalised to sum to 1, and b = c + C z,
  log m ~= log|C| + logsumexp_q [log w_q + h(c + C z_q) - log phi(z_q)]
(CROSS-VALIDATION.md, "Computing m_g"). Beyond MAX_TENSOR_DIM dimensions a scrambled Sobol rule
mapped to the normal takes the place of the tensor grid (Owen 2003, from memory).

Every cell is checked by two rules placed CHECK_SHIFT Laplace SDs either side of the mode (rules
centred alike meet a kink of the hard minimum alike, and can agree on a wrong value). Where the value
rule and a check disagree by more than ``tol`` nats, or the mode search failed, the cell is re-placed
from further starts (multi-start across the kink), then escalated to finer rules on wider grids
(GH_LEVELS), then to brute force: a tensor trapezoid on sinh-stretched axes, fine at the mode and
reaching PRIOR_REACH population SDs beyond the mode and the population mean on every side, checked by
the same rule on every other node. A leaf-level screen brute-forces a few draws the rules settled; if
the rules missed mass there (a second mode, a shoulder beyond their grid) every cell of the leaf is
suspect and goes to brute force. No cell is ever recomputed on a grid that is not placed from its own
conditional posterior. Cells whose rules never agree are counted, never hidden, and every cell's gap
enters the leaf's stated bound. tests/cv/test_quadrature_battery.py holds the bound to the true error
on known answers.
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


def gh_grid(n: int, d: int) -> tuple[np.ndarray, np.ndarray]:
    """Tensor Gauss-Hermite nodes (n^d, d) for the standard normal and log weights summing to 1."""
    x, w = hermegauss(n)
    logw = np.log(w) - 0.5 * _LOG_2PI
    nodes = np.array(list(itertools.product(x, repeat=d)), float).reshape(-1, d)
    lw = np.array([sum(c) for c in itertools.product(logw, repeat=d)], float)
    return nodes, lw


#: Largest dimension integrated by tensor Gauss-Hermite; beyond it a scrambled Sobol rule is used.
MAX_TENSOR_DIM = 3
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


def grad_hess(h_fn, b: np.ndarray, eps) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Value, gradient and Hessian of h at b (S, d) by central differences, all draws at once.

    ``eps``: one step for every coordinate, or steps per draw and coordinate (S, d). ``h_fn`` maps
    points (S, n_stencil, d) to values (S, n_stencil).
    """
    S, d = b.shape
    step = np.broadcast_to(np.asarray(eps, float), (S, d))
    st = _stencil(d, 1.0)
    vals = h_fn(b[:, None, :] + st[None, :, :] * step[:, None, :])     # (S, n_stencil)
    f0 = vals[:, 0]
    g = np.empty((S, d))
    H = np.empty((S, d, d))
    for i in range(d):
        fp, fm = vals[:, 1 + 2 * i], vals[:, 2 + 2 * i]
        g[:, i] = (fp - fm) / (2 * step[:, i])
        H[:, i, i] = (fp - 2 * f0 + fm) / step[:, i] ** 2
    k = 1 + 2 * d
    for i, j in itertools.combinations(range(d), 2):
        fpp, fpm, fmp, fmm = (vals[:, k + m] for m in range(4))
        H[:, i, j] = H[:, j, i] = (fpp - fpm - fmp + fmm) / (4 * step[:, i] * step[:, j])
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
        f0, g, H = grad_hess(lambda x: h_rows(x, idx), b[idx], eps)
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
    f0, g, H = grad_hess(lambda x: h_rows(x, all_rows), b, eps)
    neg = -H
    ok = np.isfinite(f0) & np.all(np.isfinite(neg.reshape(S, -1)), axis=1)
    ok[ok] = np.all(np.linalg.eigvalsh(neg[ok]) > 0, axis=1)
    chol = np.array(prior_chol(sd), float)                   # prior scale where the curvature is unusable
    if ok.any():
        chol[ok] = np.linalg.cholesky(np.linalg.inv(neg[ok]))
    return b, chol, ok


#: Two rules agree when their log m differ by at most this many nats (per cell).
TOL = 0.01
#: Escalation levels for d <= MAX_TENSOR_DIM: (nodes of the value rule, nodes of the check rule,
#: scale factor on the Laplace Cholesky factor). Level 0 is the everyday pair; levels 1 and 2 use more
#: nodes on a wider grid, for integrands that are far from Gaussian (the kink of the hard minimum).
GH_LEVELS = ((7, 5, 1.0), (15, 11, 1.5), (31, 21, 2.5))
GH_LEVELS_3D = ((7, 5, 1.0), (11, 9, 1.5), (21, 15, 2.5))
#: The same for d > MAX_TENSOR_DIM: points of two scrambled Sobol rules with different seeds.
QMC_LEVELS = ((1024, 256, 1.0), (4096, 1024, 1.5), (16384, 4096, 2.5))
#: The two check rules of every level sit this many Laplace SDs either side of the mode (along the
#: diagonal), so that they meet a kink of the hard minimum at other nodes than the value rule does:
#: rules centred alike can be wrong alike, and the cell's gap is the larger of the two. For a Gaussian integrand the shifted rule stays exact to rounding (the
#: ratio to the normal weight is exp(linear), an entire function).
CHECK_SHIFT = 0.5
#: Rounding level of a cell's rule gap (nats): below it the integrand is taken as Gaussian-smooth.
ROUNDING = 1e-5
#: Added to the gap of a Gauss-Hermite cell whose rules differ beyond ROUNDING (nats). Calibrated on
#: the known-answer battery (tests/cv/test_quadrature_battery.py: FvCB leaves swept across the kink of
#: the hard minimum), where the rules' gap alone left 2.5 % of such cells below their true error, some
#: by 10x; with this floor 0.3 %, none by more than 1.4x.
KINK_FLOOR = 0.003
#: Draws brute-forced by the leaf-level screen, by dimension.
SCREEN_DRAWS = {1: 8, 2: 4, 3: 3}
#: Cells per round of brute force between checks of the remaining budget.
BRUTE_CHUNK = 32
#: A leaf is scored only when its quadrature bound (share-weighted rule gaps) is at most this (nats).
LEAF_TOL = 0.05
#: Brute force stops once the cells left unsettled can move the leaf's elpd by at most this x LEAF_TOL.
BRUTE_BUDGET = 0.1
#: Brute-force tensor trapezoid (d <= MAX_TENSOR_DIM) on sinh-mapped axes: nodes per dimension, how
#: far the box reaches beyond the mode and the population mean (population SDs: the prior alone is 98
#: nats down at 14), how often that reach may be doubled when the integrand is not negligible at the
#: box's faces, and how many nodes one block of draws may evaluate at once.
BRUTE_NODES = {1: 401, 2: 81, 3: 33}
PRIOR_REACH = 14.0
BRUTE_WIDENINGS = 2
BRUTE_POINTS = 200_000
#: ... and how often its spacing may be halved while the trapezoid and its nested check disagree.
BRUTE_REFINEMENTS = 2
#: The integrand at the edge of the brute-force box must be this many nats below its maximum.
EDGE_DROP = 25.0


@dataclass(frozen=True)
class QuadratureInfo:
    """How the cells of one leaf were integrated.

    ``bound`` weighs each cell's |difference| between its last two rules by the draw's share in the
    leaf's score (`draw_shares`): to first order the leaf's elpd moves by sum_s share_s x error_s.
    A leaf whose bound exceeds LEAF_TOL is not scored.
    """

    n_cells: int
    suspect: bool = False      # the leaf-level screen found mass that the Gauss-Hermite rules missed
    n_escalated: int = 0       # cells that needed a finer, wider rule than level 0
    n_brute: int = 0           # cells settled by the brute-force trapezoid
    n_unresolved: int = 0      # cells whose rules never agreed within the tolerance
    bound: float = 0.0         # nats: share-weighted rule gaps, the error bound of the leaf's elpd
    max_cell_gap: float = 0.0  # nats: the largest rule gap of any cell
    unresolved_gap: float = 0.0


def _level_rules(level: int, d: int):
    """(value rule, check rule, scale) of an escalation level: rules are (nodes z, log weights)."""
    if d <= MAX_TENSOR_DIM:
        n_val, n_chk, scale = (GH_LEVELS_3D if d == 3 else GH_LEVELS)[level]
        return gh_grid(n_val, d), gh_grid(n_chk, d), scale
    n_val, n_chk, scale = QMC_LEVELS[level]
    return qmc_grid(n_val, d, seed=20261202 + 2 * level), qmc_grid(n_chk, d, seed=20261203 + 2 * level), scale


def _rule_log_m(loglik_rows, rows, mean, sd, centre, chol, rule_zw) -> np.ndarray:
    """log m on the grid centre + chol z of the given rule, over draws ``rows`` in blocks."""
    z, lw = rule_zw
    d = z.shape[1]
    log_phi = -0.5 * np.sum(z**2, axis=1) - 0.5 * d * _LOG_2PI
    out = np.empty(len(rows))
    for i in range(0, len(rows), BLOCK):
        r = rows[i:i + BLOCK]
        b = centre[r][:, None, :] + np.einsum("sij,qj->sqi", chol[r], z)
        h = log_integrand(loglik_rows(r), b, mean[r], sd[r])
        logdet = np.sum(np.log(np.abs(np.diagonal(chol[r], axis1=1, axis2=2))), axis=1)
        out[i:i + BLOCK] = logdet + logsumexp(lw[None, :] + h - log_phi[None, :], axis=1)
    return out


def _sinh_axes(centre: np.ndarray, scale: np.ndarray, lo: np.ndarray, hi: np.ndarray, n: int
               ) -> tuple[np.ndarray, np.ndarray]:
    """Per draw and dimension, n nodes x = c + a sinh(t) with t uniform on [-asinh((c - lo)/a),
    asinh((hi - c)/a)], and the log trapezoid weights of int f(x) dx = int f(c + a sinh t) a cosh t dt.

    The map puts nodes a fraction of ``scale`` apart near the mode and stretches them geometrically
    towards the box's edges, so one grid resolves a sharp peak and reaches a distant edge (the
    sinh-type substitutions of Mori & Sugihara 2001, from memory). centre, scale, lo, hi: (B, d);
    returns x (B, d, n) and log w (B, d, n).
    """
    t_lo = -np.arcsinh((centre - lo) / scale)
    t_hi = np.arcsinh((hi - centre) / scale)
    u = np.linspace(0.0, 1.0, n)
    t = t_lo[..., None] + (t_hi - t_lo)[..., None] * u
    dt = (t_hi - t_lo)[..., None] / (n - 1)
    x = centre[..., None] + scale[..., None] * np.sinh(t)
    logw = np.log(dt) + np.log(scale[..., None] * np.cosh(t))
    logw[..., [0, -1]] -= np.log(2)
    return x, logw


def _tensor_log_m(h_fn, x: np.ndarray, logw: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Tensor trapezoid of exp(h) on per-draw axes x (B, d, n) with log weights (B, d, n), and the same
    rule on every other node (its nested check: spacing doubled, weights doubled, ends halved).
    Returns (log m (B,), log m of the check (B,), the largest h on the box's faces minus its peak (B,))."""
    B, d, n = x.shape
    grids = np.meshgrid(*[np.arange(n)] * d, indexing="ij")
    idx = np.stack([g.ravel() for g in grids], axis=-1)                 # (n^d, d)
    pts = np.stack([x[:, j, idx[:, j]] for j in range(d)], axis=-1)     # (B, n^d, d)
    h = h_fn(pts)                                                       # (B, n^d)
    lw = sum(logw[:, j, idx[:, j]] for j in range(d))
    val = logsumexp(h + lw, axis=1)
    half = np.all(idx % 2 == 0, axis=1)
    lw2 = logw[..., ::2] + np.log(2.0)
    lw2[..., [0, -1]] -= np.log(2)
    sub = idx[half] // 2
    chk = logsumexp(h[:, half] + sum(lw2[:, j, sub[:, j]] for j in range(d)), axis=1)
    face = np.any((idx == 0) | (idx == n - 1), axis=1)
    with np.errstate(invalid="ignore"):
        drop = np.max(h[:, face], axis=1) - np.max(h, axis=1)
    return val, chk, drop


def _brute_force(loglik_rows, rows: np.ndarray, mean, sd, centre, chol, tol: float
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Brute-force log m of draws ``rows``: a tensor trapezoid on sinh-mapped axes (`_sinh_axes`), fine
    near the mode and reaching PRIOR_REACH population SDs beyond both the mode and the population mean
    on every side, widened while the integrand at the box's faces is not EDGE_DROP nats below its peak
    and refined while the nested check disagrees. Returns (values, |value - nested check|), with a gap
    of inf where the box never became wide enough."""
    d = centre.shape[1]
    out_v, out_g = np.full(len(rows), -np.inf), np.full(len(rows), np.inf)
    prior = np.sqrt(prior_var(sd[rows]))
    lap = np.sqrt(np.sum(chol[rows] ** 2, axis=2))
    scale = np.clip(np.nan_to_num(lap, nan=1.0), 1e-4 * prior, prior)
    reach = np.full(len(rows), PRIOR_REACH)
    nodes = np.full(len(rows), BRUTE_NODES[d])
    widen = refine = 0
    pending = np.arange(len(rows))          # positions in ``rows`` still to (re)compute
    while pending.size:
        # rows needing the same grid size go together, in blocks of at most BRUTE_POINTS nodes
        for n in np.unique(nodes[pending]):
            group = pending[nodes[pending] == n]
            per = max(1, BRUTE_POINTS // int(n) ** d)
            for i in range(0, len(group), per):
                j = group[i:i + per]
                r = rows[j]

                def h_fn(b, r=r):
                    return log_integrand(loglik_rows(r), b, mean[r], sd[r])

                lo = np.minimum(centre[r], mean[r]) - reach[j, None] * prior[j]
                hi = np.maximum(centre[r], mean[r]) + reach[j, None] * prior[j]
                x, lw = _sinh_axes(centre[r], scale[j], lo, hi, int(n))
                val, chk, drop = _tensor_log_m(h_fn, x, lw)
                g = np.abs(val - chk)
                out_v[j] = val
                out_g[j] = np.where(np.isfinite(g) & (drop < -EDGE_DROP), g, np.inf)
                out_g[j[~(drop < -EDGE_DROP)]] = -1.0          # marks: box too small
        narrow = pending[out_g[pending] == -1.0]
        coarse = pending[(out_g[pending] > tol) & np.isfinite(out_g[pending])]
        pending = np.zeros(0, int)
        if narrow.size and widen < BRUTE_WIDENINGS:        # the box did not reach a negligible integrand
            reach[narrow] *= 2
            widen += 1
            pending = narrow
        if coarse.size and refine < BRUTE_REFINEMENTS:     # the nested rules disagree: halve the spacing
            nodes[coarse] = 2 * nodes[coarse] - 1
            refine += 1
            pending = np.union1d(pending, coarse)
    out_g[out_g == -1.0] = np.inf
    return out_v, out_g


def _modes(loglik_rows, mean, sd, starts: list[np.ndarray], rows: np.ndarray,
           mode: np.ndarray, chol: np.ndarray, ok: np.ndarray, hmax: np.ndarray) -> None:
    """Search the mode of draws ``rows`` from each start; keep, per draw, the best result in place
    (an ok mode beats a failed one; among equals the higher log integrand wins)."""
    for start in starts:
        for i in range(0, len(rows), BLOCK):
            r = rows[i:i + BLOCK]
            m, c, k = laplace_mode(lambda sub, r=r: loglik_rows(r[sub]), mean[r], sd[r], start[r])
            h = log_integrand(loglik_rows(r), m[:, None, :], mean[r], sd[r])[:, 0]
            better = (k & ~ok[r]) | ((k == ok[r]) & (h > hmax[r]))
            rb = r[better]
            mode[rb], chol[rb], ok[rb], hmax[rb] = m[better], c[better], k[better], h[better]


def draw_shares(log_m: np.ndarray, weighting: str) -> np.ndarray:
    """Each draw's share in the leaf's score, the weights of d elpd / d log m_s.

    "importance" (integrated PSIS on the full fit): elpd = -log mean_s 1/m_s up to smoothing, so a
    relative error delta_s of m_s moves elpd by sum_s omega_s delta_s with omega_s proportional to
    1/m_s. "mean" (a refit): elpd = log mean_s m_s, omega_s proportional to m_s.
    """
    x = np.asarray(log_m, float)
    x = -x if weighting == "importance" else x
    finite = np.isfinite(x)
    if not finite.any():
        return np.full(len(x), 1.0 / max(len(x), 1))
    top = np.max(x[finite])
    with np.errstate(invalid="ignore"):
        w = np.where(np.isnan(x), 0.0, np.exp(np.minimum(x - top, 0.0)))
    w[np.isposinf(x)] = 1.0                      # a draw with m_s = 0 outweighs all others
    return w / w.sum()


def _screen_rows(lm: np.ndarray, gap: np.ndarray, todo: np.ndarray, weighting: str, n: int) -> np.ndarray:
    """Draws for the leaf-level screen: settled draws (not in ``todo``), half of them those with the
    largest share in the leaf's score, the rest spread over the quantiles of log m."""
    settled = np.setdiff1d(np.arange(len(lm)), todo)
    settled = settled[np.isfinite(lm[settled])]
    if settled.size <= n:
        return settled
    share = draw_shares(lm, weighting)[settled]
    top = settled[np.argsort(-share)[: n // 2]]
    rest = np.setdiff1d(settled, top)
    spread = rest[np.argsort(lm[rest])][np.linspace(0, len(rest) - 1, n - len(top)).round().astype(int)]
    return np.unique(np.concatenate([top, spread]))


def _brute_force_cells(loglik_rows, todo: np.ndarray, lm: np.ndarray, gap: np.ndarray, mean, sd, mode, chol,
                       tol: float, weighting: str, until_settled: bool) -> int:
    """Brute force (`_brute_force`) on the cells ``todo``, in place, in order of their weight in the
    leaf's score, until the cells left can move the leaf's elpd by at most BRUTE_BUDGET x LEAF_TOL
    (every cell when ``until_settled``). Returns the number of cells brute-forced."""
    if not todo.size:
        return 0
    share = draw_shares(lm, weighting)
    capped = np.minimum(gap, 1e6)                 # a cell never checked (inf) weighs as a large gap
    impact = share[todo] * capped[todo]
    order = todo[np.argsort(-impact)]
    left = float(np.sum(impact))
    done = 0
    while done < len(order) and (until_settled or left > BRUTE_BUDGET * LEAF_TOL):
        chunk = order[done:done + BRUTE_CHUNK]
        done += len(chunk)
        left -= float(np.sum(share[chunk] * capped[chunk]))
        v, g = _brute_force(loglik_rows, chunk, mean, sd, mode, chol, tol)
        better = (g <= tol) | (g < gap[chunk])
        lm[chunk[better]], gap[chunk[better]] = v[better], g[better]
        left += float(np.sum(share[chunk] * np.minimum(gap[chunk], 1e6)))
    return done


def cell_log_marginals(
    loglik_rows: Callable[[np.ndarray], LogLik],
    mean: np.ndarray,
    sd: np.ndarray,
    starts: np.ndarray | list[np.ndarray],
    *,
    tol: float = TOL,
    first_level: int = 0,
    weighting: str = "importance",
) -> tuple[np.ndarray, QuadratureInfo]:
    """log m_s of one leaf for every draw s, every cell placed from the leaf's own conditional
    posterior at that draw and checked (module docstring).

    Parameters
    ----------
    loglik_rows
        ``loglik_rows(rows)`` returns the leaf's log-likelihood function restricted to the draws
        ``rows`` (an index array): b (len(rows), Q, d) -> (len(rows), Q).
    mean, sd
        Population mean and SD of the leaf's effects per draw, (S, d); for correlated effects the
        Cholesky factor of their covariance, (S, d, d).
    starts
        One or more (S, d) starting points of the per-draw mode search (e.g. the leaf's own values in
        each draw, its least-squares estimate, the population mean). The first is searched for every
        draw, the others for draws whose search or checks failed, together with points one Laplace
        SD either side of the first mode along each axis (to cross a kink of the minimum).
    tol
        Two rules agree when their log m differ by at most ``tol`` nats.
    first_level
        Escalation level to start at (0 normally; tests start higher to check each level; 3 is the
        brute-force trapezoid alone, on every cell).
    weighting
        How the draws enter the leaf's score (`draw_shares`): "importance" for integrated PSIS on the
        full fit, "mean" for a refit. Brute force is spent on the cells that weigh most in the score,
        and ``info.bound`` is the share-weighted sum of the cells' rule gaps: an estimate of the
        largest error of the leaf's elpd.

    Returns
    -------
    (log m (S,), each cell's gap between its last two rules (S,), QuadratureInfo). Cells whose rules never agree keep their last value and are
    counted in ``n_unresolved``: the caller must not score the leaf silently.
    """
    starts = [np.asarray(starts, float)] if np.ndim(starts) == 2 else [np.asarray(x, float) for x in starts]
    S, d = mean.shape
    all_rows = np.arange(S)
    mode, chol = np.empty((S, d)), np.empty((S, d, d))
    ok, hmax = np.zeros(S, bool), np.full(S, -np.inf)
    _modes(loglik_rows, mean, sd, starts[:1], all_rows, mode, chol, ok, hmax)
    retry = np.flatnonzero(~ok)
    if retry.size and len(starts) > 1:
        _modes(loglik_rows, mean, sd, starts[1:], retry, mode, chol, ok, hmax)
    lm = np.full(S, -np.inf)
    gap = np.full(S, np.inf)
    todo = all_rows
    restarted = np.zeros(S, bool)
    escalated = np.zeros(S, bool)
    n_levels = len(GH_LEVELS)
    shift = np.full(d, CHECK_SHIFT / np.sqrt(d))
    for level in range(first_level, n_levels):
        if not todo.size:
            break
        val_rule, chk_rule, scale = _level_rules(level, d)
        for attempt in range(2):
            c = chol * scale
            v = _rule_log_m(loglik_rows, todo, mean, sd, mode, c, val_rule)
            g = np.zeros(len(todo))
            for sign in (1.0, -1.0):
                k = _rule_log_m(loglik_rows, todo, mean, sd, mode + sign * (c @ shift), c, chk_rule)
                g = np.maximum(g, np.abs(v - k))
            g = np.where(np.isfinite(g), g, np.inf)
            lm[todo], gap[todo] = v, g
            bad = todo[(g > tol) | ~np.isfinite(v) | ~ok[todo]]
            fresh = bad[~restarted[bad]]
            if attempt or not fresh.size:
                break
            # multi-start: the other starts, and one Laplace SD either side of the mode on each axis
            restarted[fresh] = True
            sdev = np.sqrt(np.sum(chol[fresh] ** 2, axis=2))
            extra = list(starts[1:])
            for j in range(d):
                for sign in (1.0, -1.0):
                    e = np.array(mode, copy=True)
                    e[fresh, j] += sign * sdev[:, j]
                    extra.append(e)
            _modes(loglik_rows, mean, sd, extra, fresh, mode, chol, ok, hmax)
        todo = todo[(gap[todo] > tol) | ~np.isfinite(lm[todo]) | ~ok[todo]]
        escalated[todo] = True
        if level > first_level:
            # a cell that no level settled: its value moved this much from the level before, which is
            # the more honest measure of its error where both rules of a level err alike
            with np.errstate(invalid="ignore"):
                moved = np.abs(lm[todo] - previous[todo])
            gap[todo] = np.maximum(gap[todo], np.where(np.isfinite(moved), moved, np.inf))
        previous = lm.copy()
    n_brute, suspect = 0, False
    gap_of_rule = gap.copy()
    if d <= MAX_TENSOR_DIM:
        if first_level < n_levels:
            # the leaf-level screen: brute force on a few draws that the rules settled, those that weigh
            # most in the leaf's score and a spread of the rest; a rule that missed mass there (a second
            # mode, a shoulder beyond the grid, a kink both rules got wrong alike) makes every cell suspect
            screen = _screen_rows(lm, gap, todo, weighting, SCREEN_DRAWS[d])
            if screen.size:
                bv, bg = _brute_force(loglik_rows, screen, mean, sd, mode, chol, tol)
                n_brute += len(screen)
                disc = np.abs(bv - lm[screen])
                trusted = bg <= tol
                missed = trusted & (disc > np.maximum(2 * gap[screen], tol))
                if missed.any():
                    suspect = True
                    worst = float(np.max(disc[missed]))
                    others = np.setdiff1d(all_rows, screen)
                    gap[others] = np.maximum(gap[others], 2 * worst)
                    todo = np.union1d(todo, others)
                # brute force's value replaces the rules' where the two differ by more than both their gaps
                # (on a smooth integrand the rules are the more exact, and their value stands)
                better = trusted & (disc > gap[screen] + bg)
                lm[screen[better]], gap[screen[better]] = bv[better], bg[better]
        n_brute += _brute_force_cells(loglik_rows, todo, lm, gap, mean, sd, mode, chol, tol, weighting,
                                      until_settled=first_level >= n_levels)
        todo = todo[gap[todo] > tol]
    # a Gauss-Hermite cell whose rules differ beyond rounding is not Gaussian-smooth (a kink of the hard
    # minimum): there the rules' errors have erratic signs, and their gap alone can understate the error
    by_rule = (gap_of_rule == gap) & (d <= MAX_TENSOR_DIM)       # Sobol rules' gaps are statistical
    gap = gap + np.where(by_rule & (gap > ROUNDING), KINK_FLOOR, 0.0)
    share = draw_shares(lm, weighting)
    with np.errstate(invalid="ignore"):
        bound = float(np.sum(np.where(share > 0, share * gap, 0.0))) if np.all(np.isfinite(gap[share > 0])) \
            else float("inf")
    info = QuadratureInfo(
        n_cells=S, suspect=suspect, n_escalated=int(escalated.sum()), n_brute=n_brute, n_unresolved=int(todo.size),
        bound=bound, max_cell_gap=float(np.max(gap)) if S else 0.0,
        unresolved_gap=float(np.max(gap[todo])) if todo.size else 0.0)
    return lm, gap, info


def leaf_log_marginal(loglik_rows, mean, sd, starts, **options) -> tuple[np.ndarray, QuadratureInfo]:
    """log m_s of one leaf for every draw s and how it was integrated (`cell_log_marginals`, without
    the per-cell gaps)."""
    lm, _, info = cell_log_marginals(loglik_rows, mean, sd, starts, **options)
    return lm, info
