"""A leaf of a held-out month (or species) is scored with that level's effect integrated, not with one
prior draw of it per posterior draw (which biases the held-out density downward; CROSS-VALIDATION.md).

Reference: the nested integral written out directly,
  m_s = int N(u | 0, tau_s^2) int p(y | b) N(b | mu_s + u e_v, diag(sd_s^2)) db du,
with a fine trapezoid over the month effect u and, at every node, a 2-D trapezoid rule over
the leaf's own values b. leafcv instead integrates once over b with the variances added (the sum of
independent normals is normal with the variances added; e.g. BDA3 sec. 2.5, from memory)."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.special import logsumexp

from leafcv.cv.leafmodel import LeafModel, flatten_draws
from leafcv.cv.methods import score_leaves
from leafcv.cv.quadrature import laplace_mode
from leafcv.design import leaf_link_values
from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec


def _nested_reference(lm: LeafModel, rows: np.ndarray, pi_u: int, tau: np.ndarray, ls: np.ndarray,
                      n: int = 301, half: float = 10.0) -> np.ndarray:
    """log m per draw in ``rows`` by a fine trapezoid over the held-out level's effect and, at every
    node, a 2-D trapezoid over b."""
    mean, sd_tot = lm.mean_sd()
    leaf_sd = np.sqrt(np.maximum(sd_tot**2 - np.where(np.arange(lm.dim) == pi_u, 1.0, 0.0)[None, :] * tau[:, None]**2, 0))
    # the window: +-half Laplace SDs around the mode of the integrand (the data pin the leaf far more
    # tightly than the population does, so a window in prior SDs would be far too coarse)
    mode, chol, _ = laplace_mode(lm.loglik_rows, mean, sd_tot, mean)
    out = np.empty(len(rows))
    for k, s in enumerate(rows):
        ll = lm.loglik_rows(np.array([s]))
        scale = np.maximum(np.sqrt(np.diag(chol[s] @ chol[s].T)), 1e-3)
        # ... united with +-0.3 around the leaf's least-squares values: where a draw's population mean
        # is far from the leaf's data, a mode search from the population mean can stop in a secondary
        # mode and put the window beside the mass (measured: 0.6 nats lost on one draw of this fit with
        # the Laplace window alone)
        lo = np.minimum(mode[s] - half * scale, ls - 0.3)
        hi = np.maximum(mode[s] + half * scale, ls + 0.3)
        g0, g1 = np.linspace(lo[0], hi[0], n), np.linspace(lo[1], hi[1], n)
        grid = np.stack(np.meshgrid(g0, g1, indexing="ij"), -1).reshape(1, -1, 2)
        loglik = ll(grid)[0]
        lw = np.log(np.full(n, g0[1] - g0[0])) [:, None] + np.log(np.full(n, g1[1] - g1[0]))[None, :]
        lw[[0, -1], :] -= np.log(2)
        lw[:, [0, -1]] -= np.log(2)
        vals = []
        u, lw_u = _u_rule(tau[s], leaf_sd[s][pi_u])
        for uq, lwu in zip(u, lw_u):
            m = mean[s].copy()
            m[pi_u] += uq
            z = (grid[0] - m) / leaf_sd[s]
            lprior = np.sum(-0.5 * z**2 - np.log(leaf_sd[s]) - 0.5 * np.log(2 * np.pi), axis=-1)
            vals.append(lwu + logsumexp(loglik + lprior + lw.reshape(-1)))
        out[k] = logsumexp(vals)
    return out


def _u_rule(tau: float, width: float) -> tuple[np.ndarray, np.ndarray]:
    """Trapezoid nodes over the level effect u in +-8 tau and log weights including N(u | 0, tau^2),
    spaced at most width / 4 (width: the leaf SD of the parameter u shifts, which sets how sharply the
    integrand varies in u; Gauss-Hermite in the prior scale is too coarse when tau >> width)."""
    n = int(min(max(81, np.ceil(16 * tau / (width / 4))), 4001)) | 1
    u = np.linspace(-8 * tau, 8 * tau, n)
    lw = np.log(np.full(n, u[1] - u[0]))
    lw[[0, -1]] -= np.log(2)
    return u, lw - 0.5 * (u / tau) ** 2 - np.log(tau) - 0.5 * np.log(2 * np.pi)


@pytest.fixture(scope="module")
def heldout_month_fit(quick_demo):
    comparison, dataset, _ = quick_demo
    months = dataset.leaves["campaign"].astype(str).to_numpy()
    held = np.flatnonzero(months == sorted(set(months))[1])
    train = np.ones(dataset.n_leaves, bool)
    train[held] = False
    leaf_fits = fit_leaves(dataset)
    fit = fit_structure(comparison.structure("traits-month-random"), dataset, comparison.data,
                        SamplerSpec(chains=2, warmup=300, draws=100, seed=11, adapt_delta=0.95),
                        train_leaves=train, leaf_fits=leaf_fits)
    return fit, dataset, held, leaf_fits


def test_heldout_month_effect_is_integrated(heldout_month_fit):
    fit, dataset, held, leaf_fits = heldout_month_fit
    draws = flatten_draws(fit.draws.params)
    lv = leaf_link_values(fit.design, draws)
    g = int(held[0])
    lm = LeafModel(fit.design, dataset, draws, lv, g)
    assert len(lm.heldout) == 1 and lm.dim == 2                  # month on vcmax25; leaf on vcmax25, alpha
    (r, lev), = lm.heldout
    pi_u = lm.effect_params.index(fit.design.stan_data["re_par"][r] - 1)
    tau = draws["tau"][:, r]
    rows = np.arange(0, len(tau), 20)
    ls = np.array([leaf_fits.link_values(p, False)[g] for p in ('vcmax25', 'alpha')])
    reference = _nested_reference(lm, rows, pi_u, tau, ls)
    scored = score_leaves(fit, dataset, np.array([g]), leaf_fits, in_fit=False).log_m[:, 0]
    # every (leaf, draw) cell checked, not only the average; measured: max 0.006 nats over 3 leaves
    assert np.max(np.abs(scored[rows] - reference)) < 0.02

    # the unacceptable shortcut: the held-out month's effect fixed at its one prior draw per draw
    one_draw = LeafModel(fit.design, dataset, draws, lv, g)
    one_draw.mu = lv[0][:, g, :]
    one_draw.sd = draws["tau_leaf"]
    from leafcv.cv.quadrature import leaf_log_marginal

    mean, sd = one_draw.mean_sd()
    lm_one, _ = leaf_log_marginal(one_draw.loglik_rows, mean, sd, mean)
    # per draw, log m with the month integrated is >= the average over months of log m (Jensen), so the
    # one-draw cells are biased downward; measured on the quick demo: mean gap 4 to 9 nats (SE 1 to 1.6)
    gap = scored - lm_one
    assert np.mean(gap) > max(1.0, 3 * np.std(gap) / np.sqrt(len(gap))), np.mean(gap)


def _joint_reference(models, rows, tau, ls, n: int = 241, half: float = 10.0) -> np.ndarray:
    """log p(y of several leaves of one held-out level) per draw in ``rows``: a fine trapezoid over the
    shared level effect u ~ N(0, tau^2) of the product over leaves of a 2-D trapezoid over each leaf's
    own values, its window +-half Laplace SDs around that leaf's mode at u = 0 united with +-0.3
    around its least-squares values ``ls``."""
    out = np.empty(len(rows))
    grids = []
    for m in models:
        mean, sd = m.mean_sd()
        mode, chol, _ = laplace_mode(m.loglik_rows, mean, sd, mean)
        grids.append((mean, sd, mode, chol))
    for k, s in enumerate(rows):
        u, lw_u = _u_rule(tau[s], min(float(sd[s].min()) for _, sd, _, _ in grids))
        vals = np.zeros(len(u))
        for m, (mean, sd, mode, chol), m_ls in zip(models, grids, ls):
            (r, lev, pi, xcov), = m.shared
            ku = m.effect_params.index(pi)
            scale = np.maximum(np.sqrt(np.diag(chol[s] @ chol[s].T)), 1e-3)
            lo = np.minimum(mode[s] - half * scale, m_ls - 0.3)
            hi = np.maximum(mode[s] + half * scale, m_ls + 0.3)
            g0, g1 = np.linspace(lo[0], hi[0], n), np.linspace(lo[1], hi[1], n)
            grid = np.stack(np.meshgrid(g0, g1, indexing="ij"), -1).reshape(1, -1, 2)
            loglik = m.loglik_rows(np.array([s]))(grid)[0]
            lw = np.log(np.full(n, g0[1] - g0[0]))[:, None] + np.log(np.full(n, g1[1] - g1[0]))[None, :]
            lw[[0, -1], :] -= np.log(2)
            lw[:, [0, -1]] -= np.log(2)
            for q, uq in enumerate(u):
                mu = mean[s].copy()
                mu[ku] += uq * xcov
                z = (grid[0] - mu) / sd[s]
                lprior = np.sum(-0.5 * z**2 - np.log(sd[s]) - 0.5 * np.log(2 * np.pi), axis=-1)
                vals[q] += logsumexp(loglik + lprior + lw.reshape(-1))
        out[k] = logsumexp(vals + lw_u)
    return out


def test_leaves_of_a_heldout_month_are_scored_jointly(heldout_month_fit):
    """The month's leaves share its one unknown effect: integrated once per draw for all of them
    (CROSS-VALIDATION.md, "Held-out levels"), checked cell by cell against the nested reference."""
    from leafcv.cv.methods import score_level

    fit, dataset, held, leaf_fits = heldout_month_fit
    members = held[:3]
    draws = flatten_draws(fit.draws.params)
    lv = leaf_link_values(fit.design, draws)
    models = [LeafModel(fit.design, dataset, draws, lv, int(g), integrate_heldout=False) for g in members]
    (r, _, _, _), = models[0].shared
    tau = draws["tau"][:, r]
    rows = np.arange(0, len(tau), 40)
    ls = [np.array([leaf_fits.link_values(p, False)[g] for p in ("vcmax25", "alpha")]) for g in members]
    reference = _joint_reference(models, rows, tau, ls)
    joint, bound, unresolved = score_level(fit, dataset, members, leaf_fits)
    assert unresolved == 0 and bound < 0.05
    assert np.max(np.abs(joint[rows] - reference)) < 0.02
    # the sum of leaves each integrating the month on its own is another (wrong) quantity
    apart = score_leaves(fit, dataset, members, leaf_fits, in_fit=False).log_m.sum(axis=1)
    assert np.mean(np.abs(apart - joint)) > 0.2
