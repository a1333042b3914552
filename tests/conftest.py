"""Shared fixtures, and the line between fast tests and Stan-backed ones.

Every test that compiles or samples a Stan program lives in tests/sampling/, whose conftest marks it
``stan``. Outside that folder the ``stan`` marker is refused at collection, and the PyStan engine and
``stan.build`` fail the test that calls them (a failure no ``except Exception`` can swallow), so a
test that needs the sampler cannot hide among the fast ones. Stan programs are compiled once per
machine (httpstan caches them by program text).
"""
from __future__ import annotations

import contextlib
import warnings
from pathlib import Path
from unittest import mock

import pytest

TESTS = Path(__file__).resolve().parent
SAMPLING = TESTS / "sampling"


def in_sampling(item: pytest.Item) -> bool:
    """Whether a collected test lives in tests/sampling/."""
    return SAMPLING in Path(item.path).resolve().parents


@pytest.hookimpl(tryfirst=True)
def pytest_collection_modifyitems(config, items):
    stray = [item.nodeid for item in items if item.get_closest_marker("stan") and not in_sampling(item)]
    if stray:
        raise pytest.UsageError("tests marked 'stan' outside tests/sampling/ (move them there; its conftest marks "
                                "every test in it): " + ", ".join(stray))


@contextlib.contextmanager
def _sampler_refused(item: pytest.Item):
    """PyStanEngine.compile/fit and stan.build fail ``item`` while it is set up, run and torn down."""
    with warnings.catch_warnings():     # httpstan's schemas warn of deprecations in marshmallow on import
        warnings.simplefilter("ignore")
        import stan

    from leafcv.engines.pystan_engine import PyStanEngine

    def refuse(*args, **kwargs):
        pytest.fail(f"{item.nodeid} compiles or samples a Stan program: Stan-backed tests live in tests/sampling/",
                    pytrace=False)

    with mock.patch.object(PyStanEngine, "compile", refuse), mock.patch.object(PyStanEngine, "fit", refuse), \
            mock.patch.object(stan, "build", refuse):
        yield


@pytest.hookimpl(wrapper=True)
def pytest_runtest_setup(item):
    # fixtures (of any scope) are set up here: a module fixture that samples is caught too
    with contextlib.nullcontext() if in_sampling(item) else _sampler_refused(item):
        return (yield)


@pytest.hookimpl(wrapper=True)
def pytest_runtest_call(item):
    with contextlib.nullcontext() if in_sampling(item) else _sampler_refused(item):
        return (yield)


@pytest.hookimpl(wrapper=True)
def pytest_runtest_teardown(item, nextitem):
    with contextlib.nullcontext() if in_sampling(item) else _sampler_refused(item):
        return (yield)


@pytest.fixture(scope="session")
def quick_demo(tmp_path_factory):
    """The quick demo scenario written to a temporary folder: (comparison, dataset, truth)."""
    import pandas as pd

    from leafcv.api import load
    from leafcv.demo import write_demo

    folder = tmp_path_factory.mktemp("quick-demo")
    path = write_demo(folder, quick=True)
    comparison, dataset = load(path)
    return comparison, dataset, pd.read_csv(folder / "truth.csv")
