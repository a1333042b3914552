"""The generic Stan program (stan/leafcv.stan) evaluated and sampled by PyStan.

Log density against NumPy: the program's log density equals an independent NumPy/SciPy computation of
the same model (priors from scipy.stats, FvCB from leafcv.fvcb, itself checked against REFERENCES.md),
up to a constant, at random parameter values: the wiring of design matrices, index arrays, ratios and
centring is right. The offset and scale of the free parameters is an exact reparameterisation.

Against hand-written reference programs of two concrete structures (reference/stan/):
reference_traits_month.stan: leaf effects on vcmax25 and alpha, N slope and month levels
on vcmax25, chlorophyll and SLA slopes on alpha, jmax25 and rd25 as ratios to vcmax25.
reference_species_slopes.stan: the same without month, with species-specific N slopes.

(a) Exact: at matched parameter values the two programs' log densities differ by one constant (Stan's
    ~ statements drop different constants), at several random points.
(b) Posterior: fitted to the quick demo with fixed seeds and the same inits, the two programs'
    population means agree within Monte Carlo error. Each quantity's z = difference / sqrt(MCSE_1^2 +
    MCSE_2^2) is compared with the Bonferroni bound for a family-wise error of 0.001 over all
    quantities (Bonferroni correction; MCSE of the mean from ArviZ, Vehtari et al. 2021 rank-normalised
    ESS, from memory).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import expit

from leafcv import fvcb
from leafcv.design import build_design, leaf_link_values, natural_values
from leafcv.engines.program import program_text
from leafcv.engines.pystan_engine import PyStanEngine
from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves, structure_inits
from leafcv.spec import SamplerSpec
from reference.programs import SPECIES_SLOPES, TRAITS_MONTH, generic_to_reference, population, random_generic_point, \
    reference_data, reference_inits

REFERENCES = [TRAITS_MONTH, SPECIES_SLOPES]
SAMPLER = SamplerSpec(chains=2, warmup=400, draws=500, seed=20261202, adapt_delta=0.9)
FAMILY_WISE = 0.001


# ------------------------------------------------------------------------------------------
# log density against NumPy

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


# ------------------------------------------------------------------------------------------
# against the hand-written reference programs

def _quiet():
    return PyStanEngine(log=lambda _: None)


@pytest.mark.parametrize("ref", REFERENCES, ids=lambda r: r.name)
def test_log_density_matches_reference(quick_demo, ref):
    comparison, dataset, _ = quick_demo
    # the reference's parameterisation: every leaf effect centred, species slopes non-centred
    design = build_design(ref.structure("centred", "noncentred"), dataset, comparison.data)
    assert len(design.cen_cells) == 2 * dataset.n_leaves and design.stan_data["Mn"] == 0
    generic = _quiet().compile(program_text(), design.stan_data, 1)
    reference = _quiet().compile(ref.program_text(), reference_data(ref, dataset, comparison.data), 1)
    rng = np.random.default_rng(11)
    diffs, spread = [], []
    for _ in range(5):
        point = random_generic_point(design, rng)
        rpoint = generic_to_reference(ref, design, point)
        lp_g = generic.log_prob(generic.unconstrain_pars({k: v.tolist() for k, v in point.items()}), adjust_transform=False)
        lp_r = reference.log_prob(reference.unconstrain_pars({k: np.asarray(v).tolist() for k, v in rpoint.items()}),
                                  adjust_transform=False)
        # the generic program samples its SDs on the log scale (Jacobian tau per SD), the reference does not
        lp_r += sum(np.log(np.asarray(point[k], float)).sum() for k in ("tau", "tau_leaf", "sigma"))
        diffs.append(lp_g - lp_r)
        spread.append(abs(lp_g))
    # the points differ by tens to thousands of log-density units; the difference must not move
    assert np.ptp(spread) > 1.0, spread
    assert np.ptp(diffs) < 1e-8 * max(spread), diffs


def _fit_both(ref, comparison, dataset):
    structure = ref.structure()
    fits = fit_leaves(dataset)
    g = fit_structure(structure, dataset, comparison.data, SAMPLER, engine=_quiet(), leaf_fits=fits)
    inits = reference_inits(ref, g.design, structure_inits(g.design, fits, dataset, SAMPLER.chains, SAMPLER.seed))
    r = _quiet().fit(ref.program_text(), reference_data(ref, dataset, comparison.data), SAMPLER, SAMPLER.seed + 1, inits)
    return g, r


def _z_scores(ref, g, r):
    from leafcv import arviz_arrays as az

    pg = population(ref, g.draws.params, g.design)
    pr = population(ref, r.params)
    assert set(pg) == set(pr)
    out = {}
    for k in pg:
        se = np.hypot(float(az.mcse(pg[k], method="mean")), float(az.mcse(pr[k], method="mean")))
        out[k] = (float(pg[k].mean() - pr[k].mean()) / se, float(pg[k].mean()), float(pr[k].mean()),
                  float(az.rhat(pg[k])), float(az.rhat(pr[k])))
    return out


@pytest.mark.parametrize("ref", REFERENCES, ids=lambda r: r.name)
def test_posterior_means_match_reference(quick_demo, ref):
    comparison, dataset, _ = quick_demo
    g, r = _fit_both(ref, comparison, dataset)
    z = _z_scores(ref, g, r)
    bound = stats.norm.ppf(1 - FAMILY_WISE / (2 * len(z)))
    report = "\n".join(f"{k}: z {v[0]:+.2f} (generic {v[1]:.4f}, reference {v[2]:.4f}; R-hat {v[3]:.3f} / {v[4]:.3f})"
                       for k, v in z.items())
    # Monte Carlo error is only meaningful for chains that mixed
    assert max(max(v[3], v[4]) for v in z.values()) < 1.05, report
    assert max(abs(v[0]) for v in z.values()) < bound, f"bound {bound:.2f}\n{report}"
