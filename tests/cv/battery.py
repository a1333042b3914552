"""Known-answer cases for the held-out quadrature (`leafcv.cv.quadrature`, `leafcv.cv.heldout`).

Each case is a leaf's log-likelihood as a function of its own link-scale effects b, population draws
(mean and SD of b per draw) and mode-search starts, with the true log marginal likelihood of every
cell (leaf, draw) computed independently of leafcv's rules:

- one-dimensional FvCB leaves (effect on log Vcmax25, hard minimum): composite Gauss-Legendre
  (20 nodes a panel) on panels split at every point's Rubisco/electron-transport kink
  b_i* = log(Wj_i / (fv_i fc_i)), over mean +- 14 SD (the prior alone is 98 nats down there).
  Gauss-Legendre is exact for polynomials of degree 39 on each panel (Davis & Rabinowitz 1984,
  ch. 2), and the integrand is analytic between kinks, so the reference is limited by rounding;
  `scipy.integrate.quad` with the same breakpoints agrees (checked in the tests);
- Student-t leaves: the same panels without kinks (the integrand is smooth);
- linear-Gaussian leaves: closed form y ~ N(X mu, s^2 I + X Sigma X') (Gelman et al. 2013, BDA3
  ch. 14, conjugate normal linear regression).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.polynomial.legendre import leggauss
from scipy import stats
from scipy.special import logsumexp

from leafcv import fvcb

CI = np.array([50, 80, 120, 180, 250, 350, 500, 700, 900, 1100, 1300, 1500], float)


@dataclass
class Case:
    name: str
    loglik_rows: object          # rows -> (b (len(rows), Q, d) -> (len(rows), Q))
    mean: np.ndarray             # (S, d)
    sd: np.ndarray               # (S, d) or Cholesky factors (S, d, d)
    starts: list                 # list of (S, d)
    truth: np.ndarray            # (S,) true log m per draw


def _gl_log_integral(h_fn, lo: float, hi: float, breaks, panels: int = 600, nodes: int = 20) -> float:
    """log of int_lo^hi exp(h(b)) db by composite Gauss-Legendre, panels split at ``breaks``."""
    # panels are also packed geometrically around the maximum of h on a fine scan, so that a peak far
    # narrower than the panels (a sharp likelihood) is resolved
    scan = np.linspace(lo, hi, 4001)
    top = scan[int(np.argmax(h_fn(scan)))]
    near = top + np.concatenate([-(2.0 ** np.arange(-24, 4)), 2.0 ** np.arange(-24, 4)])
    edges = np.unique(np.concatenate([np.linspace(lo, hi, panels + 1), near[(near > lo) & (near < hi)],
                                      np.asarray([x for x in breaks if lo < x < hi], float)]))
    x, w = leggauss(nodes)
    a, b = edges[:-1, None], edges[1:, None]
    pts = (0.5 * (b - a) * x[None, :] + 0.5 * (a + b)).ravel()
    lw = (np.log(0.5 * (b - a)) + np.log(w)[None, :]).ravel()
    h = h_fn(pts)
    return float(logsumexp(h + lw))


def fvcb_leaf(log_vcmax: float, *, n_draws: int = 24, seed: int = 0, sigma: float = 0.5, tau: float = 0.25,
              ci=CI, q: float = 1500.0, jmax25: float = 99.0, t_leaf: float = 25.0,
              student_nu: float | None = None, y=None, name: str = "fvcb") -> Case:
    """A leaf with one effect, b = log Vcmax25, on an A-Ci curve at light ``q``; Jmax25, alpha, theta
    and Rd25 fixed per draw (so above some Vcmax every point is electron-transport limited)."""
    rng = np.random.default_rng([seed, int(1000 * (log_vcmax + 10))])
    ci = np.asarray(ci, float)
    f = fvcb.PointFactors.at(ci, np.full_like(ci, q), np.full_like(ci, t_leaf))
    S = n_draws
    mu = np.log(55.0) + rng.normal(0, 0.03, S)
    sd_ = tau * rng.uniform(0.85, 1.15, S)
    jm = jmax25 * np.exp(rng.normal(0, 0.02, S))
    sig = sigma * rng.uniform(0.9, 1.1, S)
    alpha, theta, rd = 0.3, 0.7, 0.8
    if y is None:
        y = f.net_assimilation(np.exp(log_vcmax), jmax25, alpha, theta, rd) + rng.normal(0, sigma, len(ci))
    y = np.asarray(y, float)
    nu = student_nu

    def a_hat(v, rows):
        return f.net_assimilation(np.exp(v)[..., None], jm[rows][:, None, None], alpha, theta, rd)

    def loglik_rows(rows):
        def ll(b):
            a = a_hat(b[..., 0], rows)                       # (R, Q, n)
            s = sig[rows][:, None, None]
            if nu is None:
                return np.sum(stats.norm.logpdf(y, a, s), axis=-1)
            return np.sum(stats.t.logpdf(y, nu, a, s), axis=-1)
        return ll

    truth = np.empty(S)
    j = fvcb.electron_transport(alpha, f.q, 1.0, theta)    # placeholder shape; real J per draw below
    for s in range(S):
        jj = fvcb.electron_transport(alpha, f.q, jm[s] * f.fj, theta) * f.fe
        kinks = np.log(jj / (f.fv * f.fc)) if nu is None or True else []
        lo, hi = mu[s] - 14 * sd_[s], mu[s] + 14 * sd_[s]

        def h(b, s=s):
            ll = loglik_rows(np.array([s]))(b[None, :, None])[0]
            return ll + stats.norm.logpdf(b, mu[s], sd_[s])
        truth[s] = _gl_log_integral(h, lo, hi, kinks)
    del j
    mean = mu[:, None]
    sdm = sd_[:, None]
    own = np.full((S, 1), log_vcmax) + rng.normal(0, 0.02, (S, 1))
    return Case(name, loglik_rows, mean, sdm, [own, np.full((S, 1), log_vcmax), mean], truth)


def leaf_error(lm: np.ndarray, truth: np.ndarray, weighting: str) -> float:
    """|error| of the leaf's score as each path forms it: -log mean 1/m (full fit, unsmoothed PSIS) or
    log mean m (a refit)."""
    if weighting == "importance":
        return abs(float(logsumexp(-lm) - logsumexp(-truth)))
    return abs(float(logsumexp(lm) - logsumexp(truth)))


def flat_leaf(k_sd: float, jmax25: float = 99.0, *, seed: int = 0, n_draws: int = 24) -> Case:
    """A leaf k_sd population SDs above the mean log Vcmax25 whose A-Ci points (Ci >= 250) are all
    electron-transport limited: its likelihood is flat in Vcmax25 above the kink and falls off a cliff
    below it, so the mode sits at the cliff's edge (a tiny Laplace scale) and the integrand has a
    one-sided shoulder that only the prior brings down."""
    return fvcb_leaf(np.log(55.0) + 0.25 * k_sd, seed=seed, n_draws=n_draws, jmax25=jmax25,
                     ci=(250, 350, 500, 700, 900, 1100, 1300, 1500),
                     name=f"flat above the kink ({k_sd:+.1f} SD, Jmax25 {jmax25:g})")


def sharp_leaf(*, seed: int = 0, n_draws: int = 16) -> Case:
    """200 A-Ci points with sigma = 0.005: a likelihood peak about 1e-4 wide in log Vcmax25."""
    ci = np.tile(np.array([50, 80, 120, 160, 200], float), 40)
    return fvcb_leaf(np.log(55.0) + 0.1, seed=seed, n_draws=n_draws, sigma=0.005, ci=ci,
                     name="sharp (200 points, sigma 0.005)")


def two_cluster_leaf(*, seed: int = 0, n_draws: int = 24) -> Case:
    """Student-t (nu = 3) leaf whose Rubisco-limited points form two clusters, half at Vcmax25 40 and
    half at 80: the likelihood has two modes in log Vcmax25."""
    ci = np.array([50, 80, 120, 180, 250, 50, 80, 120, 180, 250], float)
    f = fvcb.PointFactors.at(ci, np.full_like(ci, 1500.0), np.full_like(ci, 25.0))
    v = np.where(np.arange(len(ci)) < 5, 40.0, 80.0)
    y = f.net_assimilation(v, 250.0, 0.3, 0.7, 0.8) + np.random.default_rng(seed).normal(0, 0.1, len(ci))
    return fvcb_leaf(np.log(55.0), seed=seed, n_draws=n_draws, sigma=0.3, ci=ci, jmax25=250.0,
                     student_nu=3.0, y=y, tau=0.4, name="two clusters (Student-t, nu 3)")


def gaussian_leaf(d: int, *, correlated: bool = False, seed: int = 0, n_draws: int = 60, n: int = 15) -> Case:
    """Linear-Gaussian leaf with d effects: y ~ N(X b, s^2 I), b ~ N(mu, Sigma); closed form
    y ~ N(X mu, s^2 I + X Sigma X') (BDA3 ch. 14). ``correlated``: Sigma has correlations (the
    quadrature gets its Cholesky factor)."""
    rng = np.random.default_rng([d, seed, int(correlated)])
    X = rng.normal(size=(n, d))
    s = 0.4
    y = X @ rng.normal(size=d) + rng.normal(0, s, n)
    mean = rng.normal(0, 0.5, (n_draws, d))
    sds = rng.uniform(0.3, 1.5, (n_draws, d))
    if correlated:
        corr = np.full((d, d), 0.7) + 0.3 * np.eye(d)
        cov = sds[:, :, None] * corr[None] * sds[:, None, :]
        sd = np.linalg.cholesky(cov)
    else:
        cov = np.einsum("ij,sj->sij", np.eye(d), sds**2)
        sd = sds

    def loglik_rows(rows):
        def ll(b):
            return stats.norm.logpdf(y, np.einsum("sqd,nd->sqn", b, X), s).sum(-1)
        return ll

    truth = np.array([stats.multivariate_normal.logpdf(y, X @ mean[k], s**2 * np.eye(n) + X @ cov[k] @ X.T)
                      for k in range(n_draws)])
    return Case(f"linear-Gaussian, {d} effect(s){', correlated' if correlated else ''}", loglik_rows, mean, sd,
                [np.zeros((n_draws, d)), mean], truth)


class LinearLeaf:
    """A leaf of a linear-Gaussian level for `leafcv.cv.heldout.level_log_marginal`, with the
    attributes that function reads of a `leafcv.cv.leafmodel.LeafModel`: one parameter with a leaf
    effect b ~ N(mu + U, sd^2), where U is the level's shared effect, and points y_i ~ N(b, s^2)."""

    def __init__(self, y: np.ndarray, mu: np.ndarray, sd: np.ndarray, s: float):
        S = len(mu)
        self.y, self.s = np.asarray(y, float), s
        self.mu, self.eta = mu[:, None].copy(), mu[:, None].copy()
        self.sd = sd[:, None].copy()
        self.sigma = np.full((S, len(self.y)), s)
        self.nu = None
        self.shared = [(0, 0, 0, 1.0)]
        self.effect_params = [0]

    @property
    def dim(self) -> int:
        return 1

    def mean_sd(self):
        return self.mu[:, [0]], self.sd

    def loglik_rows(self, rows):
        sigma = self.sigma[rows][:, None, :]

        def ll(b):
            return np.sum(stats.norm.logpdf(self.y, b[..., :1], sigma), axis=-1)
        return ll


def far_level(k_tau: float, *, n_leaves: int = 3, n_points: int = 12, seed: int = 0, n_draws: int = 40,
              leaf_sd: float = 0.02):
    """A held-out level whose shared effect is k_tau level SDs out: (leaves, tau (S, 1), truth (S,)),
    truth y ~ N(mu 1, s^2 I + sd^2 B + tau^2 1 1') with B the leaves' blocks of ones (BDA3 ch. 5,
    the normal hierarchical model)."""
    rng = np.random.default_rng([seed, int(10 * k_tau)])
    S = n_draws
    mu = rng.normal(0.0, 0.02, S)
    tau = 0.1 * rng.uniform(0.8, 1.2, S)
    sd = leaf_sd * rng.uniform(0.8, 1.2, S)
    s = 0.05
    u = k_tau * 0.1
    ys = [u + rng.normal(0, leaf_sd) + rng.normal(0, s, n_points) for _ in range(n_leaves)]
    leaves = [LinearLeaf(y, mu, sd, s) for y in ys]
    y_all = np.concatenate(ys)
    blocks = np.kron(np.eye(n_leaves), np.ones((n_points, n_points)))
    n = len(y_all)
    truth = np.array([stats.multivariate_normal.logpdf(y_all, np.full(n, mu[k]),
                                                       s**2 * np.eye(n) + sd[k] ** 2 * blocks + tau[k] ** 2)
                      for k in range(S)])
    return leaves, tau[:, None], truth
