"""Held-out quadrature of hard-minimum FvCB leaves against a brute-force reference, cell by cell.

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
from scipy.special import logit, logsumexp

from leafcv.api import load
from leafcv.cv.leafmodel import LeafModel, flatten_draws
from leafcv.cv.quadrature import LEAF_TOL, leaf_log_marginal, log_integrand
from leafcv.demo import GEN, write_demo
from leafcv.design import build_design, leaf_link_values
from leafcv.inits import fit_leaves

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
