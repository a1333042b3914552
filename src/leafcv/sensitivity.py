"""Prior and likelihood sensitivity of a fitted structure by power-scaling (Kallioinen, Paananen,
Bürkner & Vehtari 2023, "Detecting and diagnosing prior and likelihood sensitivity with power-scaling",
Statistics and Computing 34:57).

From the draws of one full-data fit, with each draw's log prior and log likelihood:

- **what is scaled.** The prior is the joint prior of the population quantities as the program states
  it: the intercepts b0 (a normal on the link scale, or a beta on the natural scale carried to the logit
  scale), the trait and level coefficients (normal), the SDs of group and leaf effects and the residual
  SDs (half-normal, on the SD itself), the Student-t degrees of freedom (gamma) and the LKJ prior of
  correlated leaf effects. The distributions of the leaf and level effects given their SDs are part of
  the model's hierarchy and are not scaled. The likelihood is the conditional likelihood of every point
  given its leaf's values (normal or Student-t), summed over points.
- **power-scaling.** Raising a component to the power alpha changes the posterior by importance weights
  proportional to component^(alpha - 1), Pareto-smoothed (PSIS, arviz-stats' ``psislw``; Vehtari et al. 2024).
  alpha = 2^-delta and 2^+delta with delta = 0.01.
- **sensitivity.** For each quantity, the cumulative Jensen-Shannon distance (Nguyen & Vreeken 2015)
  between its marginal under the base and the power-scaled posterior, taken in both directions of the
  axis (the larger), divided by |log2 alpha| and averaged over the two alphas: the derivative of the
  distance with respect to log2 alpha.
- **diagnosis.** Sensitivity >= 0.05 (the paper's threshold, quoted from memory) to both the prior and
  the likelihood: possible prior-data conflict; to the prior only: the likelihood is weak and the prior
  dominates; otherwise no concern.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats
from scipy.special import expit, log_expit

log = logging.getLogger("leafcv")

#: Step of log2 alpha (alpha = 2^-DELTA and 2^+DELTA).
DELTA = 0.01
#: Sensitivity at or above which a quantity is flagged (Kallioinen et al. 2023; from memory).
THRESHOLD = 0.05
#: Pareto k-hat above which the importance-weighted estimate is unreliable (Vehtari et al. 2024: 0.7 for
#: a few thousand draws, from memory).
KHAT_LIMIT = 0.7

#: (draw, point) cells of the likelihood computed at once (about 16 MB per array).
CHUNK_CELLS = 2_000_000

CONFLICT = "possible prior–data conflict"
WEAK = "weak likelihood (the prior dominates)"
NONE = "no concern"


# ------------------------------------------------------------------------------------------------------
# the estimator

def cjs_distance(x: np.ndarray, weights: np.ndarray) -> float:
    """Cumulative Jensen-Shannon distance between the ECDF of the draws ``x`` (equal weights) and their
    weighted ECDF (``weights``, any positive scale), in the direction of ``x``.

    CJS(P||Q) = int P log2(P / M) dx + (int Q - P dx) / (2 ln 2), M = (P + Q) / 2 (Nguyen & Vreeken 2015);
    distance = sqrt((CJS(P||Q) + CJS(Q||P)) / (int P dx + int Q dx)), integrals over the range of the
    draws, as in Kallioinen et al. (2023).
    """
    order = np.argsort(x, kind="stable")
    xs, w = np.asarray(x, float)[order], np.asarray(weights, float)[order]
    dx = np.diff(xs)
    n = len(xs)
    p = np.arange(1, n) / n
    q = np.clip(np.cumsum(w / w.sum())[:-1], 0.0, 1.0)
    return _cjs(p, q, dx)


def _cjs(p: np.ndarray, q: np.ndarray, dx: np.ndarray) -> float:
    m = 0.5 * (p + q)
    with np.errstate(divide="ignore", invalid="ignore"):
        pq = np.where(p > 0, p * np.log2(p / m), 0.0)
        qp = np.where(q > 0, q * np.log2(q / m), 0.0)
    ip, iq = float(np.dot(p, dx)), float(np.dot(q, dx))
    if ip + iq <= 0:
        return 0.0
    cjs_pq = max(0.0, float(np.dot(pq, dx)) + (iq - ip) / (2 * np.log(2)))
    cjs_qp = max(0.0, float(np.dot(qp, dx)) + (ip - iq) / (2 * np.log(2)))
    return float(np.sqrt((cjs_pq + cjs_qp) / (ip + iq)))


def scaled_weights(log_component: np.ndarray, alpha: float) -> tuple[np.ndarray, float]:
    """Pareto-smoothed normalised weights of power-scaling a component by ``alpha``, and their k-hat."""
    from .arviz_arrays import psislw

    lw = (alpha - 1.0) * np.asarray(log_component, float)
    lw = lw - lw.max()
    smoothed, khat = psislw(lw)
    w = np.exp(smoothed - smoothed.max())
    return w / w.sum(), float(khat)


def sensitivities(values: np.ndarray, log_component: np.ndarray, delta: float = DELTA
                  ) -> tuple[np.ndarray, float]:
    """Sensitivity of each column of ``values`` (draws, quantities) to power-scaling the component whose
    log density per draw is ``log_component``, and the larger k-hat of the two weightings."""
    values = np.asarray(values, float).reshape(len(log_component), -1)
    out = np.zeros(values.shape[1])
    khat = -np.inf
    for sign in (-1.0, 1.0):
        w, k = scaled_weights(log_component, 2.0 ** (sign * delta))
        khat = max(khat, k)
        for j in range(values.shape[1]):
            d = max(cjs_distance(values[:, j], w), cjs_distance(-values[:, j], w))
            out[j] += d / (2 * delta)
    return out, khat


def diagnosis(prior: float, likelihood: float, threshold: float = THRESHOLD) -> str:
    if prior >= threshold:
        return CONFLICT if likelihood >= threshold else WEAK
    return NONE


def sensitivity_table(values: np.ndarray, labels: list[str], log_prior: np.ndarray, log_lik: np.ndarray,
                      delta: float = DELTA) -> pd.DataFrame:
    """One row per quantity: its prior and likelihood sensitivity, the k-hat of each weighting and the
    diagnosis in words."""
    ps, pk = sensitivities(values, log_prior, delta)
    ls, lk = sensitivities(values, log_lik, delta)
    table = pd.DataFrame({"quantity": labels, "prior": ps, "likelihood": ls})
    table["diagnosis"] = [diagnosis(p, q) for p, q in zip(ps, ls)]
    table["prior_khat"], table["likelihood_khat"] = pk, lk
    return table


# ------------------------------------------------------------------------------------------------------
# leafcv's prior and likelihood per draw

def _block(draws: dict, name: str, S: int) -> np.ndarray:
    v = draws.get(name)
    return np.zeros((S, 0)) if v is None else np.asarray(v, float).reshape(S, -1)


def log_prior(design, draws: dict[str, np.ndarray]) -> np.ndarray:
    """log p(population quantities) per draw, (S,): the priors of stan/leafcv.stan's model block on b0,
    beta, tau, tau_leaf, sigma, nu and the leaf correlation, with their constants (the program's ``~``
    drops them; differences between draws are equal). ``draws``: name -> (S, ...)."""
    d = design.stan_data
    b0 = np.asarray(draws["b0"], float)
    S = len(b0)
    lp = np.zeros(S)
    for p, (fam, a, b) in enumerate(zip(d["prior_family"], d["prior_a"], d["prior_b"])):
        x = b0[:, p]
        if fam == 1:
            lp += stats.norm.logpdf(x, a, b)
        else:   # beta on inv_logit(b0) with the Jacobian of the logit transform
            lp += stats.beta.logpdf(expit(x), a, b) + log_expit(x) + log_expit(-x)
    for name, scale, half in (("beta", d["beta_sd"], False), ("tau", d["tau_sd"], True),
                              ("tau_leaf", d["leaf_tau_sd"], True)):
        v = _block(draws, name, S)
        if v.shape[1]:
            lp += (stats.halfnorm.logpdf(v, scale=scale) if half else stats.norm.logpdf(v, 0, scale)).sum(axis=1)
    lp += stats.halfnorm.logpdf(_block(draws, "sigma", S), scale=d["sigma_sd"]).sum(axis=1)
    if d["student_t"]:
        lp += stats.gamma.logpdf(_block(draws, "nu", S)[:, 0], d["nu_shape"], scale=1.0 / d["nu_rate"])
    if d["leaf_corr"]:
        lp += lkj_corr_cholesky_logpdf(np.asarray(draws["leaf_chol"], float).reshape(S, d["Rl"], d["Rl"]),
                                       d["lkj_eta"])
    return lp


def lkj_corr_cholesky_logpdf(chol: np.ndarray, eta: float) -> np.ndarray:
    """log density of Cholesky factors (S, K, K) of correlation matrices under LKJ(eta), up to its
    normalising constant: sum over k = 2..K of (K - k + 2 eta - 2) log L_kk (Stan Functions Reference,
    "LKJ Cholesky distribution")."""
    K = chol.shape[-1]
    k = np.arange(2, K + 1)
    diag = np.diagonal(chol, axis1=1, axis2=2)[:, 1:]
    return (np.log(diag) * (K - k + 2 * eta - 2)).sum(axis=1)


def log_likelihood(design, leaf_values: np.ndarray, sigma: np.ndarray, nu: np.ndarray | None = None
                   ) -> np.ndarray:
    """Sum over the design's points of log p(A_i | the leaf's values, sigma[, nu]) per draw, (S,).

    ``leaf_values``: (S, L, P) natural-scale values of every leaf (vcmax25, jmax25, alpha, theta, rd25[,
    tpu25], ratios resolved, as ``leaf_value`` of a saved fit); ``sigma``: (S, residual SD groups)."""
    from . import fvcb
    from .terms import responses

    pts, opts = design.points, design.options
    r = responses(opts)
    factors = fvcb.PointFactors.at(pts.ci, pts.q, pts.t_leaf, pts.o2, electron=opts.electron,
                                   vcmax_response=r["vcmax"], jmax_response=r["jmax"], rd_response=r["rd"],
                                   tpu_response=r["tpu"])
    leaf_values = np.asarray(leaf_values, float)
    S, N = len(leaf_values), len(pts.leaf)
    sd_all = np.asarray(sigma, float).reshape(S, -1)[:, pts.sigma_group]
    out = np.empty(S)
    step = max(1, CHUNK_CELLS // max(N, 1))          # draws per block: bounded memory for large studies
    for lo in range(0, S, step):
        v = leaf_values[lo:lo + step][:, pts.leaf, :]                  # (draws, N, P)
        col = {name: v[..., i] for i, name in enumerate(design.params)}
        a_hat = factors.net_assimilation(col["vcmax25"], col["jmax25"], col["alpha"], col["theta"], col["rd25"],
                                         col.get("tpu25"), opts.transition, opts.smooth_curvature)
        sd = sd_all[lo:lo + step]
        if nu is None:
            out[lo:lo + step] = stats.norm.logpdf(pts.a_net, a_hat, sd).sum(axis=1)
        else:
            df = np.asarray(nu, float).reshape(-1, 1)[lo:lo + step]
            out[lo:lo + step] = stats.t.logpdf(pts.a_net, df, a_hat, sd).sum(axis=1)
    return out


@dataclass(frozen=True)
class Quantities:
    """The population quantities of a fit whose sensitivity is reported: labels in words and draws."""

    labels: list[str]
    values: np.ndarray          # (S, quantities)


def population_quantities(design, draws: dict[str, np.ndarray]) -> Quantities:
    """Intercepts, coefficients, SDs of group and leaf effects, residual SDs and Student-t df."""
    S = len(np.asarray(draws["b0"]))
    labels, cols = [], []
    for i, p in enumerate(design.params):
        scale = "log ratio to vcmax25" if design.ratio.get(p) else f"{design.parameters[i].link} scale"
        labels.append(f"{p} intercept ({scale})")
        cols.append(np.asarray(draws["b0"], float)[:, i])
    for k, c in enumerate(design.coefficients):
        labels.append(f"{c.param}: {c.label} (coefficient)")
        cols.append(_block(draws, "beta", S)[:, k])
    for k, g in enumerate(design.group_terms):
        labels.append(f"SD of {g.label}")
        cols.append(_block(draws, "tau", S)[:, k])
    for k, lt in enumerate(design.leaf_terms):
        labels.append(f"SD of leaf effects on {lt.param}")
        cols.append(_block(draws, "tau_leaf", S)[:, k])
    for k, name in enumerate(design.sigma_groups):
        labels.append(f"residual SD ({name})")
        cols.append(_block(draws, "sigma", S)[:, k])
    if design.student_t:
        labels.append("Student-t degrees of freedom")
        cols.append(_block(draws, "nu", S)[:, 0])
    return Quantities(labels, np.column_stack(cols))


def fit_sensitivity(design, draws: dict[str, np.ndarray], delta: float = DELTA) -> pd.DataFrame:
    """The sensitivity table of one fit from its draws (name -> (S, ...), ``leaf_value`` included)."""
    q = population_quantities(design, draws)
    nu = draws.get("nu") if design.student_t else None
    lp = log_prior(design, draws)
    ll = log_likelihood(design, draws["leaf_value"], draws["sigma"], None if nu is None else np.asarray(nu)[:, 0])
    return sensitivity_table(q.values, q.labels, lp, ll, delta)


def sentence(row) -> str:
    """What a flagged row means, in words a reviewer reads."""
    q = row["quantity"]
    if row["diagnosis"] == CONFLICT:
        return (f"{q}: its posterior moves both when the prior is made slightly stronger or weaker "
                f"(sensitivity {row['prior']:.2f}) and when the data are weighted slightly more or less "
                f"({row['likelihood']:.2f}); the prior and the data pull in different directions. Check that "
                "this prior is the one intended; a wider prior would let the data decide.")
    if row["diagnosis"] == WEAK:
        return (f"{q}: its posterior moves when the prior is made slightly stronger or weaker (sensitivity "
                f"{row['prior']:.2f}) but hardly when the data are weighted more or less ({row['likelihood']:.2f}): "
                "the data say little about it and the prior largely decides its estimate; report it as "
                "such, or collect data that inform it.")
    return f"{q}: no concern."


# ------------------------------------------------------------------------------------------------------
# from a run folder

def mismatches(design, draws: dict[str, np.ndarray], n_leaves: int) -> list[str]:
    """What in ``draws`` (name -> (S, ...)) does not have the shape ``design`` needs, in words."""
    d = design.stan_data
    need = {"b0": (len(design.params),), "beta": (d["K"],), "tau": (d["R"],), "tau_leaf": (d["Rl"],),
            "sigma": (d["S"],), "leaf_value": (n_leaves, len(design.params))}
    if d["student_t"]:
        need["nu"] = (1,)
    if d["leaf_corr"]:
        need["leaf_chol"] = (1, d["Rl"], d["Rl"])
    out = []
    for name, shape in need.items():
        if int(np.prod(shape)) == 0:
            continue
        if name not in draws:
            out.append(f"no {name}")
        elif tuple(np.shape(draws[name])[1:]) != shape:
            out.append(f"{name} has shape {tuple(np.shape(draws[name])[1:])}, expected {shape}")
    return out


def run_sensitivity(run_dir: str | Path, structure: str, delta: float = DELTA) -> pd.DataFrame:
    """The sensitivity table of ``structure``'s saved full-data fit (``fits/<structure>.nc``). Reads the
    comparison and data files the manifest names (the data only when its hash matches); no sampler."""
    from .cv.arviz_bridge import open_fit
    from .design import build_design
    from .errors import UserInputError
    from .manifest import run_inputs

    manifest, comparison, dataset, path = run_inputs(run_dir, structure, "prior sensitivities")
    design = build_design(comparison.structure(structure), dataset, comparison.data)
    post = open_fit(path)["posterior"].to_dataset()
    draws = {k: post[k].values.reshape((-1,) + post[k].shape[2:]) for k in post.data_vars}
    wrong = mismatches(design, draws, len(dataset.leaves))
    if wrong:
        raise UserInputError(str(path), [f"the saved fit does not match structure {structure!r} as the comparison "
                                         f"file describes it ({'; '.join(wrong)}); run `leafcv compare` again"])
    table = fit_sensitivity(design, draws, delta)
    table.insert(0, "structure", structure)
    log.info("prior sensitivity of %s: %d of %d quantities flagged", structure,
             int((table["diagnosis"] != NONE).sum()), len(table))
    return table
