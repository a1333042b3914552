"""leafcv.sensitivity's log prior and log likelihood per draw against the Stan program's log density.

At random parameter points of two quick-demo structures, Stan's log density (stan/leafcv.stan, PyStan's
``log_prob`` without the Jacobian of Stan's own constraints) must equal

    leafcv's log prior of the population quantities + leafcv's conditional log likelihood
    + the hierarchy (level and leaf effects given their SDs, scipy.stats) + the log Jacobians the program
      adds for sampling the SDs on the log scale,

up to one constant (Stan's ``~`` drops constants). The two leafcv terms are the ones power-scaling
weights are built from, so differences of the log prior between draws are Stan's differences.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from leafcv.design import build_design, leaf_link_values, natural_values
from leafcv.engines.program import program_text
from leafcv.engines.pystan_engine import PyStanEngine
from leafcv.inits import fit_leaves
from leafcv.sensitivity import log_likelihood, log_prior
from reference.programs import random_generic_point


def _hierarchy_and_jacobians(design, point, mu) -> float:
    d = design.stan_data
    lev_term = np.asarray(d["lev_term"], int) - 1
    cen = np.asarray(d["cen_lev"], int) - 1
    lp = stats.norm.logpdf(point["u_c"], 0, np.asarray(point["tau"])[lev_term[cen]]).sum()
    lp += stats.norm.logpdf(point["u_z"]).sum()
    lp += stats.norm.logpdf(point["eta_c"], mu[0].T.reshape(-1)[design.cen_cells],
                            np.asarray(point["tau_leaf"])[design.cen_term]).sum()
    lp += stats.norm.logpdf(point["eta_z"]).sum()
    lp += sum(np.log(np.asarray(point[k], float)).sum() for k in ("tau", "tau_leaf", "sigma"))
    return float(lp)


@pytest.mark.parametrize("name", ["traits-month-random", "leaf-vcmax-alpha"])
def test_log_prior_and_likelihood_add_up_to_stans_log_density(quick_demo, name):
    comparison, dataset, _ = quick_demo
    design = build_design(comparison.structure(name), dataset, comparison.data, leaf_fits=fit_leaves(dataset))
    model = PyStanEngine(log=lambda _: None).compile(program_text(), design.stan_data, 1)
    rng = np.random.default_rng(8)
    diffs, priors = [], []
    for _ in range(5):
        point = random_generic_point(design, rng)
        draws = {k: np.asarray(v, float)[None, ...] for k, v in point.items()}
        mu, eta = leaf_link_values(design, draws)
        nat = natural_values(design, eta)
        leaf_values = np.stack([nat[p] for p in design.params], axis=-1)        # (1, L, P)
        ours = log_prior(design, draws)[0] + log_likelihood(design, leaf_values, draws["sigma"])[0]
        stan = model.log_prob(model.unconstrain_pars({k: v.tolist() for k, v in point.items()}),
                              adjust_transform=False)
        diffs.append(stan - ours - _hierarchy_and_jacobians(design, point, mu))
        priors.append(log_prior(design, draws)[0])
    assert np.ptp(priors) > 0.1          # the points differ in their prior, so the check can fail
    assert np.ptp(diffs) < 1e-6 * max(1.0, abs(np.mean(diffs))), diffs


def test_run_prior_sensitivity_and_the_report_table(demo_run):
    # the session's quick-demo run: Run.prior_sensitivity() of the best structure, and the report's
    # tables/prior_sensitivity.csv written by `leafcv report` from the run folder alone, agree
    import pandas as pd

    from leafcv.api import open_run
    from leafcv.report import write_report
    from leafcv.sensitivity import CONFLICT, NONE, WEAK

    _, _, out, table = demo_run
    run = open_run(out)
    best = str(run.ranking.dropna(subset=["rank"]).sort_values("rank").iloc[0]["structure"])
    sens = run.prior_sensitivity()
    assert set(sens["structure"]) == {best}
    assert {"vcmax25 intercept (log scale)", "residual SD (all points)"} <= set(sens["quantity"])
    assert sens["diagnosis"].isin([NONE, WEAK, CONFLICT]).all()
    assert (sens[["prior", "likelihood"]] >= 0).all().all()
    write_report(out)
    csv = pd.read_csv(out / "tables" / "prior_sensitivity.csv")
    pd.testing.assert_frame_equal(csv, sens, check_exact=False, rtol=1e-9)
