"""The generic Stan program's log density equals an independent NumPy/SciPy computation of the same model
(priors from scipy.stats, FvCB from leafcv.fvcb, itself checked against REFERENCES.md), up to a constant,
at random parameter values: the wiring of design matrices, index arrays, ratios and centring is right."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import expit

from leafcv import fvcb
from leafcv.design import build_design, leaf_link_values, natural_values
from leafcv.engines.program import program_text
from leafcv.engines.pystan_engine import PyStanEngine
from leafcv.inits import fit_leaves

from .reference_programs import random_generic_point

pytestmark = pytest.mark.stan


def _numpy_log_density(design, dataset, point) -> float:
    d = design.stan_data
    draws = {k: np.asarray(v, float)[None, ...] for k, v in point.items()}
    mu, eta = leaf_link_values(design, draws)
    nat = natural_values(design, eta[0])
    obs = dataset.obs.iloc[design.obs_index]
    li = obs["leaf_index"].to_numpy()
    a_hat = fvcb.net_assimilation(obs["ci"].to_numpy(), obs["ppfd"].to_numpy(), obs["t_leaf"].to_numpy(),
                                  nat["vcmax25"][li], nat["jmax25"][li], nat["alpha"][li], nat["theta"][li],
                                  nat["rd25"][li], o2=obs["o2"].to_numpy())
    lp = stats.norm.logpdf(obs["a_net"].to_numpy(), a_hat, point["sigma"][0]).sum()
    for p, fam, a, b in zip(range(len(design.params)), d["prior_family"], d["prior_a"], d["prior_b"]):
        x = point["b0"][p]
        lp += stats.norm.logpdf(x, a, b) if fam == 1 else stats.beta.logpdf(expit(x), a, b) + np.log(expit(x) * (1 - expit(x)))
    lp += stats.norm.logpdf(point["beta"], 0, d["beta_sd"]).sum()
    lp += stats.halfnorm.logpdf(point["tau"], scale=d["tau_sd"]).sum()
    lp += stats.halfnorm.logpdf(point["tau_leaf"], scale=d["leaf_tau_sd"]).sum()
    lp += stats.halfnorm.logpdf(point["sigma"], scale=d["sigma_sd"]).sum()
    lev_term = np.asarray(d["lev_term"], int) - 1
    lp += stats.norm.logpdf(point["u_c"], 0, np.asarray(point["tau"])[lev_term[np.asarray(d["cen_lev"], int) - 1]]).sum()
    lp += stats.norm.logpdf(point["u_z"]).sum()
    mu_flat = mu[0].T.reshape(-1)
    lp += stats.norm.logpdf(point["eta_c"], mu_flat[design.cen_cells],
                            np.asarray(point["tau_leaf"])[np.asarray(d["cen_term"], int) - 1]).sum()
    lp += stats.norm.logpdf(point["eta_z"]).sum()
    return float(lp)


@pytest.mark.parametrize("name", ["traits-month-random", "traits-month-fixed"])
def test_generic_log_density_matches_numpy(quick_demo, name):
    comparison, dataset, _ = quick_demo
    train = np.ones(dataset.n_leaves, bool)
    train[3] = False  # one held-out leaf: its cells are non-centred and its points are not in the likelihood
    design = build_design(comparison.structure(name), dataset, comparison.data, train_leaves=train,
                          leaf_fits=fit_leaves(dataset))
    assert all(c % dataset.n_leaves != 3 for c in design.cen_cells)
    model = PyStanEngine(log=lambda _: None).compile(program_text(), design.stan_data, 1)
    rng = np.random.default_rng(3)
    diffs = []
    for _ in range(4):
        point = random_generic_point(design, rng)
        stan_point = {k: v.tolist() for k, v in point.items()}
        upar = model.unconstrain_pars(stan_point)
        diffs.append(model.log_prob(upar, adjust_transform=False) - _numpy_log_density(design, dataset, point))
    # Stan's ~ statements drop constants: the difference is one constant over all points
    assert np.ptp(diffs) < 1e-6 * max(1.0, abs(np.mean(diffs))), diffs
