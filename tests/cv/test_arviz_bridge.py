"""The ArviZ bridge (leafcv.cv.arviz_bridge).

Results as arviz-stats' ELPDData, accepted by its ``compare`` (called directly as the reference), and
the stacking weights taken from it in input order.

The labelled data tree of a fit (to_datatree), with the fake engine:
coordinates name every population quantity by its term, and leaf_value is each leaf's parameters on the
natural scale, checked against the FvCB link functions written out here (log for Vcmax25, a log ratio to
Vcmax25 for Jmax25, logit for alpha; Farquhar, von Caemmerer & Berry 1980 parameters)."""
from __future__ import annotations

import numpy as np
import pytest
from arviz_stats import compare, summary

from leafcv.cv.arviz_bridge import accepted_keywords, compare_results, open_fit, to_datatree, to_elpd_data
from leafcv.cv.result import CVResult
from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec
from ..fakes import FakeEngine

# arviz-stats' compare, called directly below as the reference, uses an inplace sort that pandas 3.1 deprecates
pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")

G = 30
#: compare's stacking, its numbers unrounded (arviz-stats 1.x rounds unless told round_to="none")
UNROUNDED = accepted_keywords(compare, {"method": "stacking", "round_to": "none"})
LEAVES = tuple(f"leaf{i:02d}" for i in range(G))


def make(name: str, elpd_i, **kwargs) -> CVResult:
    """A result over LEAVES with method auto and 4000 draws unless told otherwise."""
    kwargs.setdefault("n_draws", 4000)
    kwargs.setdefault("method", "auto")
    leaves = kwargs.pop("leaves", LEAVES)
    return CVResult(structure=name, leaves=leaves, elpd_i=np.asarray(elpd_i, dtype=float), **kwargs)


def test_elpd_data_is_accepted_by_arviz_compare():
    rng = np.random.default_rng(6)
    a = make("a", rng.normal(-20, 2, G), pareto_k=rng.uniform(0, 0.5, G))
    b = make("b", a.elpd_i + rng.normal(-0.5, 1, G))
    table = compare({"a": to_elpd_data(a), "b": to_elpd_data(b)}, **UNROUNDED)
    assert table.loc["a", "elpd"] == pytest.approx(a.elpd)
    assert table.loc["b", "se"] == pytest.approx(b.se)
    assert list(to_elpd_data(a).elpd_i.coords["leaf"].values) == list(LEAVES)


def test_bridge_returns_arviz_stacking_weights_in_input_order():
    rng = np.random.default_rng(14)
    base = rng.normal(-20, 2, G)
    results = {f"s{k}": make(f"s{k}", base + rng.normal(-0.5 * k, 1.0, G)) for k in (2, 0, 1)}
    weights = compare_results(results)
    ref = compare({k: to_elpd_data(r) for k, r in results.items()}, **UNROUNDED)
    assert list(weights.index) == ["s2", "s0", "s1"] and weights.name == "weight"
    np.testing.assert_allclose(weights.to_numpy(), ref.loc[list(results), "weight"].astype(float), atol=1e-12)



def test_a_fit_is_labelled_by_its_terms_and_carries_each_leafs_natural_values(quick_demo, tmp_path):
    comparison, dataset, _ = quick_demo
    st = comparison.structure("traits-month-fixed")
    fit = fit_structure(st, dataset, comparison.data, SamplerSpec(chains=2, warmup=10, draws=50, seed=4),
                        engine=FakeEngine(), leaf_fits=fit_leaves(dataset))
    idata = to_datatree(fit, dataset)
    post = idata.posterior
    design = fit.design
    assert list(post["parameter"].values) == ["vcmax25", "jmax25", "alpha", "theta", "rd25"]
    assert list(post["coefficient"].values) == [f"{c.param}: {c.label}" for c in design.coefficients]
    assert list(post["coefficient_label"].values) == [c.label for c in design.coefficients]
    assert "vcmax25: n_area" in list(post["coefficient"].values)
    assert list(post["coefficient_parameter"].values) == [c.param for c in design.coefficients]
    assert list(post["leaf_term"].values) == ["vcmax25", "alpha"]
    assert list(post["leaf"].values) == [str(x) for x in dataset.leaves["leaf"]]
    assert post["leaf_value"].dims == ("chain", "draw", "leaf", "parameter")

    b0 = fit.draws.params["b0"]                                        # (chain, draw, P) link scale
    v = post["leaf_value"]
    # jmax25 has no leaf effect and no term: Jmax25 / Vcmax25 = exp(b0 of jmax25) for every leaf
    ratio = (v.sel(parameter="jmax25") / v.sel(parameter="vcmax25")).values
    np.testing.assert_allclose(ratio, np.exp(b0[..., 1])[..., None] * np.ones(dataset.n_leaves), rtol=1e-10)
    # theta has no term: logit^-1(b0 of theta) for every leaf
    np.testing.assert_allclose(v.sel(parameter="theta").values,
                               (1 / (1 + np.exp(-b0[..., 3])))[..., None] * np.ones(dataset.n_leaves), rtol=1e-10)
    # a leaf whose Vcmax25 effect is centred: Vcmax25 = exp(its own link value eta_c)
    L = dataset.n_leaves
    k = int(np.flatnonzero(design.cen_cells < L)[0])
    leaf = int(design.cen_cells[k])
    np.testing.assert_allclose(v.sel(parameter="vcmax25").values[:, :, leaf],
                               np.exp(fit.draws.params["eta_c"][:, :, k]), rtol=1e-10)

    path = tmp_path / "fit.nc"
    idata.to_netcdf(path, engine="h5netcdf")
    back = open_fit(path)
    assert list(back.posterior["coefficient_kind"].values) == [c.kind for c in design.coefficients]
    assert float(back.posterior["coefficient_scale"].sel(coefficient="alpha: chl_ug").values) == 10.0
    table = summary(back, var_names=["b0"], kind="stats")
    assert len(table) == 5 and table.index[0] == "b0[vcmax25]"


def test_a_trait_acting_on_two_parameters_gets_two_coordinates(quick_demo):
    # the coordinate names the parameter, so each coefficient can be selected alone (ArviZ's summary
    # needs unique coordinate values)
    from dataclasses import replace

    from leafcv.spec import ParamSpec

    comparison, dataset, _ = quick_demo
    st = comparison.structure("leaf-vcmax-alpha")
    params = dict(st.params, vcmax25=ParamSpec(fixed=("n_area",), random=("leaf",)),
                  alpha=ParamSpec(fixed=("n_area",), random=("leaf",)))
    fit = fit_structure(replace(st, params=params), dataset, comparison.data,
                        SamplerSpec(chains=2, warmup=10, draws=40, seed=4), engine=FakeEngine(),
                        leaf_fits=fit_leaves(dataset))
    post = to_datatree(fit, dataset).posterior
    assert list(post["coefficient"].values) == ["vcmax25: n_area", "alpha: n_area"]
    assert post["beta"].sel(coefficient="alpha: n_area").shape == (2, 40)
    table = summary(post.to_dataset(), var_names=["beta"], kind="stats")
    assert list(table.index) == ["beta[vcmax25: n_area]", "beta[alpha: n_area]"]
