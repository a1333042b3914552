"""Held-out quadrature (leafcv.cv.quadrature) against closed forms and brute force, without a sampler.
The same quadrature on a real fit: tests/sampling/cv/test_quadrature.py.

(1) Every escalation level of the held-out quadrature against closed-form normal-normal marginals.

Model (Gelman et al. 2013, Bayesian Data Analysis 3rd ed., ch. 5 and ch. 14, conjugate normal):
the leaf's d effects b ~ N(mu_s, diag(tau_s^2)) and n_j points per effect, y_jk ~ N(b_j, s_j^2).
Then y ~ N(X mu_s, diag(s^2) + X diag(tau_s^2) X') with X the 0/1 map of points to effects, so
log m_s has a closed form (SciPy's multivariate normal). The noise s_j is set so that the leaf's
posterior SD of b_j, (n_j / s_j^2 + 1 / tau^2)^(-1/2), is a chosen fraction of the population SD
tau: 1/50 (a well-measured leaf, the case an unplaced grid gets wrong by several nats) to ~1 (a
leaf whose data say almost nothing).

The integrand is Gaussian, so every rule placed at the conditional mode must be exact up to
rounding; the tolerance asked of leafcv is 0.01 nats per cell and for the summed elpd.

(2) Quadrature in 1 to 5 dimensions against the closed-form marginal likelihood of a Gaussian linear
model, y ~ N(X b, s^2 I), b ~ N(mu, diag(sd^2)): y ~ N(X mu, s^2 I + X diag(sd^2) X') (BDA3 ch. 14,
conjugate normal linear regression). The integrand is Gaussian, so the Laplace-adaptive rules
(Gauss-Hermite up to 3 dimensions, scrambled Sobol beyond) are exact up to rounding.

(3) Held-out quadrature of hard-minimum FvCB leaves against a brute-force reference, cell by cell.

32 simulated leaves of the default demo scenario (leafcv's own simulation; each has an A-Ci curve
crossing the Wc/Wj transition and an A-Q curve), structure with leaf effects on log Vcmax25 and logit
alpha. Population draws are set by hand near the generating values (no sampler): 16 draws per leaf.
The reference is an independent tensor trapezoid of exp(h) on a 401 x 401 grid over +-10 SD of the
leaf's least-squares estimate (SDs of the population, so it needs no mode search and no curvature),
after checking that the integrand is negligible (50 nats below its peak) at the edge of that box.

Both paths of leafcv are checked: the full-fit path (mode search started at the leaf's own value in
each draw) and the refit path (started at the least-squares estimate and the population mean only).
Requirement: every leaf within 0.05 nats, its score formed as each path forms it (log mean_s m_s for a
refit; -log mean_s 1/m_s, the unsmoothed form of integrated PSIS, for the full fit), and within the
quadrature bound leafcv states for it.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import logit, logsumexp

from leafcv.api import load
from leafcv.cv.leafmodel import LeafModel
from leafcv.cv.quadrature import (GH_LEVELS, LEAF_TOL, MAX_TENSOR_DIM, SCREEN_DRAWS, leaf_log_marginal,
                                  log_integrand)
from leafcv.demo import GEN, write_demo
from leafcv.design import build_design, leaf_link_values
from leafcv.inits import fit_leaves


# ------------------------------------------------------------------------------------------
# (1) every escalation level against closed-form normal-normal marginals

RATIOS = (1 / 50, 1 / 10, 1 / 2, 0.999)   # leaf posterior SD / population SD
N_PER_EFFECT = 6
BRUTE_DRAWS = 20


def _case(d: int, ratio: float, seed: int, S: int = 120):
    rng = np.random.default_rng([d, int(1000 * ratio), seed])
    tau = 1.0
    # posterior sd^2 = 1 / (n / s^2 + 1 / tau^2) = (ratio tau)^2  =>  s^2 = n / (1 / (ratio tau)^2 - 1 / tau^2)
    s = np.sqrt(N_PER_EFFECT / (1 / (ratio * tau) ** 2 - 1 / tau**2))
    X = np.kron(np.eye(d), np.ones((N_PER_EFFECT, 1)))
    b_true = rng.normal(0.0, tau, d)
    y = X @ b_true + rng.normal(0, s, len(X))
    mean = rng.normal(0.0, 0.3, (S, d))
    sd = tau * rng.uniform(0.8, 1.2, (S, d))

    def rows_fn(rows):
        def ll(b):
            return stats.norm.logpdf(y, np.einsum("sqd,nd->sqn", b, X), s).sum(-1)
        return ll

    exact = np.array([stats.multivariate_normal.logpdf(y, X @ mean[k], s**2 * np.eye(len(y)) + X @ np.diag(sd[k] ** 2) @ X.T)
                      for k in range(S)])
    return rows_fn, mean, sd, exact


@pytest.mark.parametrize("d", [1, 2, 3, 4])
def test_every_level_is_exact_on_normal_normal_leaves(d):
    """Levels 0..2 (and the brute-force trapezoid, level 3, up to MAX_TENSOR_DIM dimensions) each give
    log m within 0.01 nats on every cell, from a poor start (5 population SDs away from every mode)."""
    levels = list(range(len(GH_LEVELS))) + ([len(GH_LEVELS)] if d <= MAX_TENSOR_DIM else [])
    S = 120 if d <= 2 else 30
    for ratio in RATIOS:
        rows_fn, mean, sd, exact = _case(d, ratio, 0, S)
        poor = np.full((S, d), 5.0)
        total_err = []
        for level in levels:
            n = S if level < len(GH_LEVELS) else BRUTE_DRAWS    # brute force is slow: fewer cells
            lm, info = leaf_log_marginal(rows_fn, mean[:n], sd[:n], poor[:n], first_level=level)
            err = np.abs(lm - exact[:n])
            assert np.max(err) < 0.01, (d, ratio, level, np.max(err))
            assert info.bound < 0.01          # the stated bound (share-weighted rule gaps)
            total_err.append(abs(logsumexp(lm) - logsumexp(exact[:n])))
        assert max(total_err) < 0.01


def test_first_level_needs_no_escalation_when_the_integrand_is_gaussian():
    rows_fn, mean, sd, exact = _case(2, 1 / 50, 1)
    lm, info = leaf_log_marginal(rows_fn, mean, sd, np.zeros((len(mean), 2)))
    # only the leaf-level screen's few draws are brute-forced, and it finds nothing missed
    assert info.n_escalated == 0 and info.n_brute == SCREEN_DRAWS[2] and not info.suspect
    assert np.max(np.abs(lm - exact)) < 1e-6


def test_a_grid_placed_from_the_population_would_fail_this_check():
    """The defect this module replaces: one fixed grid at the least-squares point with 1.5 x the
    population SD, for a leaf whose posterior SD is 1/50 of it. Shown so that the tests above have teeth."""
    from leafcv.cv.quadrature import _rule_log_m, gh_grid

    rows_fn, mean, sd, exact = _case(2, 1 / 50, 2)
    S = len(mean)
    centre = np.zeros((S, 2))
    chol = np.broadcast_to(1.5 * np.eye(2), (S, 2, 2)).copy()
    lm = _rule_log_m(rows_fn, np.arange(S), mean, sd, centre, chol, gh_grid(21, 2))
    assert np.max(np.abs(lm - exact)) > 0.5


# ------------------------------------------------------------------------------------------
# (2) 1 to 5 dimensions against a Gaussian linear model

@pytest.mark.parametrize("d", [1, 2, 3, 4, 5])
def test_gaussian_linear_model_marginal(d):
    rng = np.random.default_rng(d)
    n, S = 15, 300
    X = rng.normal(size=(n, d))
    s = 0.6
    y = X @ rng.normal(size=d) + rng.normal(0, s, n)
    mean = rng.normal(0, 0.5, (S, d))
    sd = rng.uniform(0.3, 1.5, (S, d))

    def rows_fn(rows):
        def ll(b):
            return stats.norm.logpdf(y, np.einsum("sqd,nd->sqn", b, X), s).sum(-1)
        return ll

    lm, info = leaf_log_marginal(rows_fn, mean, sd, np.zeros((S, d)))
    exact = np.array([stats.multivariate_normal.logpdf(y, X @ mean[k], s**2 * np.eye(n) + X @ np.diag(sd[k]**2) @ X.T)
                      for k in range(S)])
    assert np.max(np.abs(lm - exact)) < 1e-6
    assert info.n_escalated == 0 and info.n_unresolved == 0
    assert (d > MAX_TENSOR_DIM) == (d >= 4)


# ------------------------------------------------------------------------------------------
# (3) hard-minimum FvCB leaves against a brute-force trapezoid

S = 16
N_REF = 401


@pytest.fixture(scope="module")
def leaves(tmp_path_factory):
    comparison, dataset = load(write_demo(tmp_path_factory.mktemp("demo32"), quick=False))
    st = comparison.structure("traits-month-fixed")
    fits = fit_leaves(dataset)
    design = build_design(st, dataset, comparison.data)        # without the pilot: every leaf centred
    d = design.stan_data
    L, P = d["L"], len(design.params)
    rng = np.random.default_rng(20261203)
    draws = {
        "b0": np.array([np.log(GEN["vcmax25_ref"]), np.log(GEN["jmax_ratio"]), logit(GEN["alpha_ref"]),
                        logit(GEN["theta"]), np.log(GEN["rd_ratio"])]) + rng.normal(0, 0.03, (S, P)),
        "beta": rng.normal(0, 0.03, (S, d["K"])) + np.array(
            [{"n_area": GEN["n_slope"], "chl_ug": GEN["chl_slope"], "sla_m2kg": GEN["sla_slope"]}.get(c.label, 0.0)
             for c in design.coefficients]),
        "tau": np.zeros((S, 0)), "u_c": np.zeros((S, 0)), "u_z": np.zeros((S, 0)),
        "tau_leaf": np.array([GEN["leaf_sd_vcmax"], GEN["leaf_sd_alpha"]]) * rng.uniform(0.8, 1.25, (S, 2)),
        "sigma": rng.uniform(0.45, 0.55, (S, 1)), "nu": np.zeros((S, 0)),
    }
    own = np.stack([fits.link_values("vcmax25", False), fits.link_values("alpha", False)], axis=1)   # (L, 2)
    cells = design.cen_cells
    leaf_of, par_of = cells % L, cells // L
    col = {0: 0, 2: 1}
    draws["eta_c"] = own[leaf_of, [col[p] for p in par_of]][None, :] + rng.normal(0, 0.05, (S, len(cells)))
    lv = leaf_link_values(design, draws)
    return design, dataset, draws, lv, own


def _reference(lm: LeafModel, centre: np.ndarray) -> np.ndarray:
    mean, sd = lm.mean_sd()
    half = 10 * sd.max(axis=0)
    g0 = np.linspace(centre[0] - half[0], centre[0] + half[0], N_REF)
    g1 = np.linspace(centre[1] - half[1], centre[1] + half[1], N_REF)
    grid = np.stack(np.meshgrid(g0, g1, indexing="ij"), -1).reshape(1, -1, 2)
    logw = np.log(np.full(N_REF, g0[1] - g0[0]))[:, None] + np.log(np.full(N_REF, g1[1] - g1[0]))[None, :]
    logw[[0, -1], :] -= np.log(2)
    logw[:, [0, -1]] -= np.log(2)
    out = np.empty(len(mean))
    for s in range(len(mean)):
        h = log_integrand(lm.loglik_rows(np.array([s])), grid, mean[[s]], sd[[s]])[0].reshape(N_REF, N_REF)
        edge = max(h[0].max(), h[-1].max(), h[:, 0].max(), h[:, -1].max())
        assert edge < h.max() - 50, "reference box too small"
        out[s] = logsumexp(h + logw)
    return out


def test_full_fit_and_refit_paths_match_brute_force_on_every_leaf(leaves):
    design, dataset, draws, lv, own = leaves
    worst_leaf, worst_cell, escalated = 0.0, 0.0, 0
    for g in range(dataset.n_leaves):
        lm = LeafModel(design, dataset, draws, lv, g)
        mean, sd = lm.mean_sd()
        ref = _reference(lm, own[g])
        ls = np.broadcast_to(own[g], mean.shape)
        for starts, weighting in (([lm.own_values(), ls, mean], "importance"), ([ls, mean], "mean")):
            lm_q, info = leaf_log_marginal(lm.loglik_rows, mean, sd, starts, weighting=weighting)
            assert info.bound <= LEAF_TOL
            worst_cell = max(worst_cell, float(np.max(np.abs(lm_q - ref))))
            # the leaf's score as each path forms it: PSIS-like weights 1/m (full fit), mean of m (refit)
            if weighting == "importance":
                err = abs(float(logsumexp(-lm_q) - logsumexp(-ref)))
            else:
                err = abs(float(logsumexp(lm_q) - logsumexp(ref)))
            assert err <= info.bound + 0.005, (g, err, info)     # the stated bound is not optimistic
            worst_leaf = max(worst_leaf, err)
            escalated += info.n_escalated
    assert dataset.n_leaves >= 30
    assert worst_leaf < 0.05, (worst_leaf, worst_cell)
    assert escalated > 0             # some first checks failed, so the escalation path was exercised
    print(f"worst leaf {worst_leaf:.2e} nats, worst cell {worst_cell:.2e}, escalated cells {escalated}")
