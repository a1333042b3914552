"""The generic program against hand-written reference programs of two concrete structures.

tests/stan/reference_traits_month.stan: leaf effects on vcmax25 and alpha, N slope and month levels
on vcmax25, chlorophyll and SLA slopes on alpha, jmax25 and rd25 as ratios to vcmax25.
tests/stan/reference_species_slopes.stan: the same without month, with species-specific N slopes.

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

from leafcv.design import build_design
from leafcv.engines.program import program_text
from leafcv.engines.pystan_engine import PyStanEngine
from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves, structure_inits
from leafcv.spec import SamplerSpec

from .reference_programs import SPECIES_SLOPES, TRAITS_MONTH, generic_to_reference, population, random_generic_point, \
    reference_data, reference_inits

pytestmark = pytest.mark.stan
REFERENCES = [TRAITS_MONTH, SPECIES_SLOPES]
SAMPLER = SamplerSpec(chains=2, warmup=400, draws=500, seed=20261202, adapt_delta=0.9)
FAMILY_WISE = 0.001


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
    import arviz as az

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
