"""The CmdStan engine (leafcv.engines.cmdstan_engine) against the PyStan engine.

Both run Stan 2.35's NUTS service with diagonal metric and adaptation (stan::services::sample::
hmc_nuts_diag_e_adapt), chain k seeded by util::create_rng(seed, k) (httpstan passes the chain number as
``chain``, cmdstanpy as ``id``), inits for every parameter, and Stan's default adaptation windows; CmdStan
writes its CSV with 18 significant digits. So with the same seed, settings and inits they give the same
draws: held here to exact equality, sampler diagnostics included (DESIGN.md "Engines"). A size-0 variable
has no CSV column; its array is empty under both engines (its trailing dimensions may differ).
"""
from __future__ import annotations

import numpy as np
import pytest

from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec

SHORT = SamplerSpec(chains=2, warmup=100, draws=60, seed=11)


@pytest.fixture(scope="module")
def both_fits(quick_demo, cmdstan_engine):
    comparison, dataset, _ = quick_demo
    st = comparison.structure("traits-month-fixed")
    leaf_fits = fit_leaves(dataset)
    return {name: fit_structure(st, dataset, comparison.data, SHORT, engine=engine, leaf_fits=leaf_fits)
            for name, engine in (("pystan", "pystan"), ("cmdstan", cmdstan_engine))}


def test_same_seed_same_draws(both_fits):
    a, b = both_fits["pystan"].draws, both_fits["cmdstan"].draws
    assert (a.engine, b.engine) == ("pystan", "cmdstan")
    assert list(a.params) == list(b.params)
    compared = 0
    for name in a.params:
        x, y = a.params[name], b.params[name]
        assert x.shape[:2] == y.shape[:2] == (2, 60), name
        if x.size == 0:
            assert y.size == 0, name
            continue
        assert x.shape == y.shape, name
        np.testing.assert_array_equal(x, y, err_msg=name)
        compared += 1
    assert compared >= 6
    for name in a.sampler:
        np.testing.assert_array_equal(a.sampler[name], b.sampler[name], err_msg=name)


def test_same_diagnostics(both_fits):
    # divergences, tree depth, E-BFMI, R-hat and ESS: all computed from the same draws
    assert both_fits["pystan"].diagnostics == both_fits["cmdstan"].diagnostics


def test_a_cmdstan_fit_leaves_no_csv_files(both_fits, tmp_path, monkeypatch, quick_demo, cmdstan_engine):
    import tempfile

    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    comparison, dataset, _ = quick_demo
    fit_structure(comparison.structure("leaf-vcmax-alpha"), dataset, comparison.data,
                  SamplerSpec(chains=2, warmup=30, draws=10, seed=3), engine=cmdstan_engine)
    assert list(tmp_path.iterdir()) == []
