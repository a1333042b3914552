"""Stan-backed tests: everything here compiles or samples a Stan program, and is marked ``stan``.

``python3 -m pytest -m "not stan"`` and ``python3 -m pytest tests --ignore=tests/sampling`` both give the
fast set. The main job runs once per session (``demo_run``) for every test that reads a whole comparison.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest

from leafcv.spec import SamplerSpec

SAMPLING = Path(__file__).resolve().parent

#: The session's run: the two structures and the short chains of the notebook example's --fast mode
#: (examples/notebook.py), so that the notebook, pointed at the run's folder, reuses the run's results
#: (a re-run reuses every result whose inputs match) instead of repeating it. Should the two drift apart,
#: the notebook simply runs its own comparison again.
RUN_STRUCTURES = ("leaf-vcmax-alpha", "traits-month-fixed")
RUN_SAMPLER = SamplerSpec(chains=2, warmup=150, draws=150, seed=7)


@pytest.hookimpl(tryfirst=True)
def pytest_collection_modifyitems(config, items):
    # this hook sees every collected test of the session, not only this folder's
    for item in items:
        if SAMPLING in Path(item.path).resolve().parents:
            item.add_marker(pytest.mark.stan)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The main job on the quick demo (16 leaves), run once per session into ``<folder>/runs/demo``: the
    structures "leaf-vcmax-alpha" and "traits-month-fixed" (the generating one), method auto with 3 spot
    checks, short chains. Returns (comparison as run, dataset, run folder, ranking table); the demo's data
    and comparison file are in the run folder's grandparent."""
    from leafcv.api import load
    from leafcv.compare import run_comparison
    from leafcv.demo import write_demo

    folder = tmp_path_factory.mktemp("demo-run")
    comparison, dataset = load(write_demo(folder, quick=True))
    comp = replace(comparison, sampler=RUN_SAMPLER,
                   structures=tuple(comparison.structure(n) for n in RUN_STRUCTURES))
    out = folder / "runs" / "demo"
    table = run_comparison(comp, dataset, out, log=lambda _: None)
    return comp, dataset, out, table


@pytest.fixture(scope="session")
def cmdstan_engine():
    """A CmdStan engine for the session, its program compiled once (a cache folder per machine, so later
    sessions find it compiled). Skipped, with the reason, where no CmdStan is found (``.ci/run`` assembles
    one with ../shared/cmdstan/install.sh and exports CMDSTAN)."""
    from leafcv.engines.choice import EngineUnavailable, check_engine, make_engine
    from leafcv.engines.program import program_text

    try:
        check_engine("cmdstan")
    except EngineUnavailable as exc:
        pytest.skip(f"no CmdStan here: {exc}")
    engine = make_engine("cmdstan", log=lambda _: None)
    engine.compile(program_text())
    return engine
