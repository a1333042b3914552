"""Held-out quadrature (leafcv.cv.quadrature) on a real fit of the quick demo: the adaptive rule against a
brute-force 2-D trapezoid on every (leaf, draw) cell."""
from __future__ import annotations

import numpy as np
from scipy.special import logsumexp

from leafcv.cv.leafmodel import LeafModel, flatten_draws
from leafcv.cv.quadrature import laplace_mode, leaf_log_marginal, log_integrand
from leafcv.design import leaf_link_values
from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec


def _trapezoid_reference(lm: LeafModel, n: int = 101, half: float = 8.0) -> np.ndarray:
    """Brute-force 2-D trapezoid rule per draw over a window of +-half Laplace SDs around both the
    mode and the draw's own value: slow but needs no smoothness of the integrand beyond continuity."""
    mean, sd = lm.mean_sd()
    own = lm.own_values()
    mode, chol, _ = laplace_mode(lm.loglik_rows, mean, sd, own)
    out = np.empty(len(own))
    for s in range(len(own)):
        scale = np.maximum(np.sqrt(np.diag(chol[s] @ chol[s].T)), 1e-3)
        lo = np.minimum(mode[s], own[s]) - half * scale
        hi = np.maximum(mode[s], own[s]) + half * scale
        g0, g1 = np.linspace(lo[0], hi[0], n), np.linspace(lo[1], hi[1], n)
        grid = np.stack(np.meshgrid(g0, g1, indexing="ij"), -1).reshape(1, -1, 2)
        h = log_integrand(lm.loglik_rows(np.array([s])), grid, mean[[s]], sd[[s]])[0].reshape(n, n)
        w0 = np.full(n, g0[1] - g0[0]); w0[[0, -1]] /= 2
        w1 = np.full(n, g1[1] - g1[0]); w1[[0, -1]] /= 2
        out[s] = logsumexp(h + np.log(w0)[:, None] + np.log(w1)[None, :])
    return out


def test_quadrature_matches_brute_force_on_every_cell(quick_demo):
    comparison, dataset, _ = quick_demo
    fit = fit_structure(comparison.structure("traits-month-fixed"), dataset, comparison.data,
                        SamplerSpec(chains=2, warmup=300, draws=75, seed=3), leaf_fits=fit_leaves(dataset))
    draws = flatten_draws(fit.draws.params)
    lv = leaf_link_values(fit.design, draws)
    for g in (0, 15):      # leaf 15 has the largest Pareto k-hat of this scenario
        lm = LeafModel(fit.design, dataset, draws, lv, g)
        mean, sd = lm.mean_sd()
        own = lm.own_values()
        adaptive, _ = leaf_log_marginal(lm.loglik_rows, mean, sd, [own, mean])
        reference = _trapezoid_reference(lm)
        # measured: max 0.0013 nats, median 2e-4 (7-node adaptive rule, 150 draws)
        assert np.max(np.abs(adaptive - reference)) < 0.01, g
