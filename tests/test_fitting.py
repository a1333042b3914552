"""Fitting one structure (leafcv.fitting) without a sampler, with the fake engine of tests/fakes.py. Real
fits of the generic program: tests/sampling/test_fitting.py."""
from __future__ import annotations

import numpy as np

from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec
from .fakes import FakeEngine


def test_a_refit_is_scaled_by_the_full_fits_posterior_means_and_sds(quick_demo):
    # The scaling (stan/leafcv.stan, scale_offset / scale_mult) of a refit: each free parameter's
    # posterior mean and SD in the full-data fit (here the fake engine's draws: inits + N(0, 0.01)),
    # and offset 0, scale 1 for the held-out leaf's standard-normal effects, which no fit informs.
    from leafcv.design import FREE_BLOCKS, build_design
    from leafcv.fitting import fit_structure, warm_scaling

    comparison, dataset, _ = quick_demo
    leaf_fits = fit_leaves(dataset)
    st = comparison.structure("traits-month-fixed")
    sampler = SamplerSpec(chains=4, warmup=50, draws=300, seed=3)
    full = fit_structure(st, dataset, comparison.data, sampler, engine=FakeEngine(), leaf_fits=leaf_fits)
    train = np.ones(dataset.n_leaves, bool)
    train[3] = False
    refit = build_design(st, dataset, comparison.data, train_leaves=train, leaf_fits=leaf_fits)
    sc = warm_scaling(full, refit)
    d = refit.stan_data
    sizes = {"b0_free": len(refit.params), "beta": d["K"], "log_tau": d["R"], "u_c": d["Qc"], "u_v": d["Q"] - d["Qc"],
             "log_tau_leaf": d["Rl"], "eta_c": d["Mc"], "eta_z": d["Mn"], "log_tau_s": d["Rs"], "z_s": d["Ms"], "log_sigma": d["S"]}
    at = np.cumsum([0] + [sizes[k] for k in FREE_BLOCKS])
    assert sc["n_scale"] == at[-1] == len(sc["scale_offset"]) == len(sc["scale_mult"])
    block = {k: slice(at[i], at[i + 1]) for i, k in enumerate(FREE_BLOCKS)}
    b0 = full.draws.params["b0"].reshape(-1, len(refit.params))      # no group terms: b0_free = b0
    np.testing.assert_allclose(sc["scale_offset"][block["b0_free"]], b0.mean(axis=0), atol=2e-3)
    np.testing.assert_allclose(sc["scale_mult"][block["b0_free"]], b0.std(axis=0), rtol=0.15)
    sigma = full.draws.params["sigma"].reshape(-1, d["S"])
    np.testing.assert_allclose(sc["scale_mult"][block["log_sigma"]], np.log(sigma).std(axis=0), rtol=0.15)
    held = (refit.nc_cells % dataset.n_leaves) == 3
    assert held.any()
    z = slice(at[FREE_BLOCKS.index("eta_z")], at[FREE_BLOCKS.index("eta_z") + 1])
    np.testing.assert_array_equal(sc["scale_offset"][z][held], 0.0)
    np.testing.assert_array_equal(sc["scale_mult"][z][held], 1.0)
    assert np.all(sc["scale_mult"][z][~held] != 1.0)
