"""The Python API (leafcv.api) with the sampler: a finished run opened with ``leafcv.open_run`` (the session's
one run, ``demo_run`` in tests/sampling/conftest.py) keeps each full fit as an ArviZ data tree that
arviz-stats' loo reproduces; fitting inside a running event loop (Jupyter); the notebook example run as a kernel would."""
from __future__ import annotations

from dataclasses import replace

import pytest

from leafcv.spec import SamplerSpec


def test_the_run_keeps_each_full_fit_as_a_data_tree_that_arviz_loo_reproduces(demo_run):
    # arviz_stats.loo (Vehtari, Gelman & Gabry 2017; PSIS of Vehtari et al. 2024, ArviZ's implementation) on
    # the saved log_likelihood group, leaf by leaf with leafcv's relative efficiency, gives the PSIS elpd and
    # k-hat that leafcv stored for every leaf it scored by PSIS.
    import xarray as xr
    from arviz_stats import loo as arviz_loo

    import leafcv
    from leafcv.cv.psis import relative_efficiency

    comp, dataset, out, _ = demo_run
    run = leafcv.open_run(out)
    assert run.finished and list(run.ranking["structure"]) == list(demo_run[3]["structure"])
    point = run.pointwise.set_index("leaf")
    for name in ("leaf-vcmax-alpha", "traits-month-fixed"):
        idata = run.fit(name)
        assert {"posterior", "sample_stats", "observed_data", "log_likelihood"} <= set(idata.children)
        ll = idata.log_likelihood["leaf_log_marginal"]
        assert ll.dims == ("chain", "draw", "leaf") and list(ll["leaf"].values) == list(point.index)
        assert idata.observed_data["net_assimilation"].size == len(dataset.obs)
        psis = [g for g in point.index if point.loc[g, f"method:{name}"] == "psis"]
        assert len(psis) >= dataset.n_leaves - 6
        chains = ll.sizes["chain"]
        for g in psis:
            one = xr.DataTree.from_dict({"log_likelihood": idata["log_likelihood"].to_dataset().sel(leaf=[g])})
            reff = relative_efficiency(ll.sel(leaf=g).values.reshape(-1), chains)
            loo = arviz_loo(one, pointwise=True, reff=reff)
            assert float(loo.elpd_i.values[0]) == pytest.approx(point.loc[g, f"elpd:{name}"], abs=1e-8)
            assert float(loo.pareto_k.values[0]) == pytest.approx(point.loc[g, f"khat:{name}"], abs=1e-8)


def test_the_api_works_inside_a_running_event_loop(quick_demo):
    # Jupyter runs an event loop in the kernel's thread; asyncio.run refuses to start inside one
    # (Python docs, asyncio.run). leafcv's engine then runs PyStan in a worker thread.
    import asyncio

    import leafcv

    comparison, dataset, _ = quick_demo
    study = leafcv.Study(replace(comparison, sampler=SamplerSpec(chains=2, warmup=100, draws=100, seed=4)), dataset)

    async def notebook_cell():
        asyncio.get_running_loop()
        return study.fit("leaf-vcmax-alpha")

    fit = asyncio.run(notebook_cell())
    assert fit.result.draws.params["b0"].shape[:2] == (2, 100)
    tree = fit.to_datatree()
    assert tree.posterior["b0"].shape[:2] == (2, 100)
    assert "vcmax25" in " ".join(fit.summary.astype(str).to_numpy().ravel())


def test_the_notebook_example_runs_inside_an_event_loop(demo_run):
    # examples/notebook.py, run as a notebook kernel would (its thread running an event loop). It runs in the
    # session run's folder, the run copied to where the notebook writes its own: with the same data,
    # structures and --fast chains, its main job reuses the run's results instead of repeating them.
    import asyncio
    import runpy
    import shutil
    import sys
    from pathlib import Path

    out = demo_run[2]
    folder = out.parents[1]
    shutil.copytree(out, folder / "runs" / "notebook")
    script = Path(__file__).resolve().parents[2] / "examples" / "notebook.py"
    argv = sys.argv
    sys.argv = [str(script), str(folder), "--fast"]

    async def kernel():
        return runpy.run_path(str(script), run_name="__main__")

    try:
        ns = asyncio.run(kernel())
    finally:
        sys.argv = argv
    ranking = ns["run"].ranking
    assert list(ranking["structure"]) and set(ranking["structure"]) == {"leaf-vcmax-alpha", "traits-month-fixed"}
    assert (folder / "runs" / "notebook" / "fits" / f"{ns['best']}.nc").exists()
    assert ns["fit"].diagnostics.grade in ("converged", "marginal", "failed")
