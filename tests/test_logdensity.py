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
    # the program samples the SDs on the log scale: change of variables, Jacobian d tau / d log tau = tau
    lp += sum(np.log(np.asarray(point[k], float)).sum() for k in ("tau", "tau_leaf", "sigma"))
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


def test_offset_and_scale_of_the_free_parameters_is_an_exact_reparameterisation(quick_demo):
    # Stan Reference Manual, "Affinely transformed real": x = offset + multiplier * y, whose log Jacobian
    # is sum(log multiplier). So at any constrained point, the log density without the Jacobian is
    # unchanged by leafcv's scaling, and with the Jacobian it moves by that constant, at every point.
    from leafcv.inits import cold_scaling

    comparison, dataset, _ = quick_demo
    leaf_fits = fit_leaves(dataset)
    design = build_design(comparison.structure("traits-month-random"), dataset, comparison.data, leaf_fits=leaf_fits)
    scaling = cold_scaling(design, leaf_fits)
    n_free = sum(np.size(design.stan_data[k]) for k in ("cen_cell", "nc_cell", "lev_term", "tau_sd", "leaf_tau_sd",
                                                         "beta_sd", "prior_a")) + design.stan_data["S"]
    assert scaling["n_scale"] == n_free
    assert np.all(scaling["scale_mult"] > 0) and np.ptp(scaling["scale_mult"]) > 0.1
    rng = np.random.default_rng(5)
    scaling["scale_offset"] = rng.normal(0, 0.5, n_free)
    engine = PyStanEngine(log=lambda _: None)
    plain = engine.compile(program_text(), design.stan_data, 1)
    scaled = engine.compile(program_text(), {**design.stan_data, **scaling}, 1)
    log_jacobian = float(np.sum(np.log(scaling["scale_mult"])))
    for _ in range(3):
        point = {k: v.tolist() for k, v in random_generic_point(design, rng).items()}
        up, us = plain.unconstrain_pars(point), scaled.unconstrain_pars(point)
        assert not np.allclose(up, us)
        lp, ls = plain.log_prob(up, adjust_transform=False), scaled.log_prob(us, adjust_transform=False)
        assert ls == pytest.approx(lp, rel=1e-10, abs=1e-8)
        lpj, lsj = plain.log_prob(up, adjust_transform=True), scaled.log_prob(us, adjust_transform=True)
        assert lsj - lpj == pytest.approx(log_jacobian, rel=1e-8, abs=1e-8)
