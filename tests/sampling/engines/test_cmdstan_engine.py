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


def test_a_cmdstan_run_scores_as_the_pystan_run(demo_run, cmdstan_engine, tmp_path):
    # The session's run (PyStan) repeated for one of its structures with engine "cmdstan" by name, in local
    # worker processes (the name travels with the tasks; each worker builds its own engine): the same
    # draws give the same scores, leaf by leaf. Task keys differ (the engine is part of them), so nothing is
    # shared between the two run folders.
    from dataclasses import replace

    import pandas as pd

    from leafcv.compare import run_comparison

    comp, dataset, out, _ = demo_run
    one = replace(comp, structures=(comp.structure("traits-month-fixed"),))
    run_comparison(one, dataset, tmp_path / "run", engine="cmdstan", workers=2, log=lambda _: None)
    a = pd.read_csv(out / "pointwise.csv").set_index("leaf")
    b = pd.read_csv(tmp_path / "run" / "pointwise.csv").set_index("leaf")
    cols = [c for c in b.columns if c.endswith(":traits-month-fixed")]
    assert len(cols) >= 4
    for col in cols:
        if pd.api.types.is_numeric_dtype(b[col]):
            np.testing.assert_allclose(b[col], a.loc[b.index, col], rtol=0, atol=1e-8, err_msg=col)
        else:
            assert list(b[col]) == list(a.loc[b.index, col]), col
    ranked = pd.read_csv(out / "ranking.csv").set_index("structure").loc["traits-month-fixed"]
    alone = pd.read_csv(tmp_path / "run" / "ranking.csv").set_index("structure").loc["traits-month-fixed"]
    for col in ("elpd", "se", "mcse", "rmse", "r2", "n_refits", "max_khat"):
        assert alone[col] == pytest.approx(ranked[col], abs=1e-8), col
    manifest = __import__("json").loads((tmp_path / "run" / "manifest.json").read_text())
    assert manifest["engine"]["name"] == "cmdstan" and manifest["engine"]["version"].startswith("CmdStan 2.35")
    assert not set((out / "tasks").glob("*.json")) & set((tmp_path / "run" / "tasks").glob("*.json"))
