"""The line between fast and Stan-backed tests (tests/conftest.py): outside tests/sampling/ the PyStan engine
and stan.build fail the test that calls them, and the ``stan`` marker is refused at collection."""
from __future__ import annotations

import re
from types import SimpleNamespace

import pytest

from leafcv.engines.program import program_text
from leafcv.engines.pystan_engine import PyStanEngine
from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec
from . import conftest

TINY = "parameters { real x; } model { x ~ normal(0, 1); }"


def test_the_engine_fails_a_fast_test_that_samples():
    engine = PyStanEngine(log=lambda _: None)
    with pytest.raises(pytest.fail.Exception, match="tests/sampling/"):
        engine.fit(TINY, {}, SamplerSpec(chains=1, warmup=10, draws=10, seed=1), 1, [{"x": 0.0}])
    with pytest.raises(pytest.fail.Exception, match="tests/sampling/"):
        engine.compile(program_text(), {}, 1)


def test_stan_build_fails_a_fast_test():
    import stan

    with pytest.raises(pytest.fail.Exception, match="compiles or samples a Stan program"):
        stan.build(TINY, data={}, random_seed=1)


def test_a_structure_fitted_with_the_default_engine_fails_a_fast_test(quick_demo):
    # pytest.fail raises a BaseException: no `except Exception` on the way turns the refusal into a failed fit
    comparison, dataset, _ = quick_demo
    with pytest.raises(pytest.fail.Exception, match="tests/sampling/"):
        fit_structure(comparison.structure("leaf-vcmax-alpha"), dataset, comparison.data,
                      SamplerSpec(chains=1, warmup=10, draws=10, seed=1), leaf_fits=fit_leaves(dataset))


def test_the_stan_marker_is_refused_outside_tests_sampling(request):
    request.node.add_marker(pytest.mark.stan)
    with pytest.raises(pytest.UsageError, match=re.escape(request.node.nodeid)):
        conftest.pytest_collection_modifyitems(request.config, [request.node])
    assert conftest.in_sampling(SimpleNamespace(path=conftest.SAMPLING / "cv" / "test_methods.py"))
    assert not conftest.in_sampling(request.node)
