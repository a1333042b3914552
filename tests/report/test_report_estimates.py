"""What the chosen structure estimates, from hand-built InferenceData of the labelled layout: every number
against quantiles computed here from the same draws, on the scale a reader uses."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit

from leafcv.report.estimates import labelled, leaf_table, population_table
from leafcv.report import write_report

from .fake_run import LEAVES, labelled_idata

pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")


def q(x) -> list[float]:
    """Median, 5 % and 95 % quantiles of all draws."""
    return list(np.quantile(np.ravel(x), [0.5, 0.05, 0.95]))


def row(table: pd.DataFrame, variable: str) -> list[float]:
    r = table.set_index("variable").loc[variable]
    return [r["median"], r["q05"], r["q95"]]


def test_intercepts_slopes_levels_and_sds_on_the_reader_scale():
    idata = labelled_idata()
    post = idata.posterior
    table = population_table(idata)
    b0 = post["b0"].values
    np.testing.assert_allclose(row(table, "b0[vcmax25]"), q(np.exp(b0[..., 0])))
    np.testing.assert_allclose(row(table, "b0[jmax25]"), q(np.exp(b0[..., 1])))       # the ratio to vcmax25
    np.testing.assert_allclose(row(table, "b0[alpha]"), q(expit(b0[..., 2])))         # logit link
    np.testing.assert_allclose(row(table, "beta[n_area]"), q(np.exp(post["beta"].values[..., 0])))
    np.testing.assert_allclose(row(table, "beta[campaign=2026-06]"), q(np.exp(post["beta"].values[..., 1])))
    np.testing.assert_allclose(row(table, "tau_leaf[alpha]"), q(post["tau_leaf"].values[..., 1]))
    np.testing.assert_allclose(row(table, "sigma[all points]"), q(post["sigma"].values))
    words = table.set_index("variable")
    assert words.loc["b0[jmax25]", "quantity"] == "jmax25/vcmax25 at reference traits and levels"
    assert words.loc["beta[n_area]", "quantity"] == "vcmax25: slope on n_area, per 0.5 units of n_area"
    assert words.loc["beta[n_area]", "scale"] == "×"
    assert words.loc["beta[campaign=2026-06]", "quantity"] == "vcmax25: campaign=2026-06 against the reference level"
    assert words.loc["tau_leaf[alpha]", "scale"] == "SD, logit scale"
    assert words.loc["sigma[all points]", "quantity"] == "residual SD"


def _split_idata(tmp_path):
    """A fit in the layout `leafcv.cv.arviz_bridge.to_datatree` writes, with a within/between split on alpha
    (logit), a group term and residual SDs by curve type; written to NetCDF and read back."""
    from arviz_base import from_dict

    from leafcv.cv.arviz_bridge import open_fit

    rng = np.random.default_rng(5)
    shape = (2, 150)
    beta = np.array([0.1, 0.3, 0.8]) + rng.normal(0, 0.05, shape + (3,))
    idata = from_dict(
        {"posterior": {"b0": rng.normal(0, 0.1, shape + (5,)), "beta": beta,
                       "tau": np.abs(rng.normal(0.3, 0.03, shape + (1,))),
                       "sigma": np.abs(rng.normal(0.7, 0.05, shape + (2,)))}},
        dims={"b0": ["parameter"], "beta": ["coefficient"], "tau": ["group_term"], "sigma": ["sigma_group"]},
        coords={"parameter": ["vcmax25", "jmax25", "alpha", "theta", "rd25"],
                "coefficient": ["vcmax25: n_area", "alpha: chl_ug within taxon", "alpha: chl_ug between taxon"],
                "group_term": ["taxon effects on vcmax25"], "sigma_group": ["aci curves", "aq curves"]})
    idata["posterior"] = idata["posterior"].to_dataset().assign_coords(
        parameter_link=("parameter", ["log", "log", "logit", "logit", "log"]),
        parameter_ratio_to_vcmax25=("parameter", [0, 1, 0, 0, 0]),
        coefficient_label=("coefficient", ["n_area", "chl_ug within taxon", "chl_ug between taxon"]),
        coefficient_parameter=("coefficient", ["vcmax25", "alpha", "alpha"]),
        coefficient_kind=("coefficient", ["trait", "within", "between"]),
        coefficient_term=("coefficient", ["n_area", "chl_ug", "chl_ug"]),
        coefficient_grouping=("coefficient", ["", "taxon", "taxon"]),
        coefficient_scale=("coefficient", [0.5, 10.0, 10.0]),
        group_term_parameter=("group_term", ["vcmax25"]))
    path = tmp_path / "fit.nc"
    idata.to_netcdf(str(path), engine="h5netcdf")
    return open_fit(path), beta


def test_splits_group_terms_and_scales_from_the_coordinates(tmp_path):
    idata, beta = _split_idata(tmp_path)
    table = population_table(idata).set_index("variable")
    assert table.loc["beta[n_area]", "quantity"] == "vcmax25: slope on n_area, per 0.5 units of n_area"
    assert table.loc["beta[chl_ug within taxon]", "quantity"] == "alpha: within-taxon slope on chl_ug, per 10 units of chl_ug"
    assert table.loc["beta[chl_ug within taxon]", "scale"] == "odds ratio"
    np.testing.assert_allclose(row(table.reset_index(), "beta[chl_ug within taxon]"), q(np.exp(beta[..., 1])))
    diff = table.loc["beta[between − within chl_ug taxon]"]
    np.testing.assert_allclose([diff["median"], diff["q05"], diff["q95"]], q(np.exp(beta[..., 2] - beta[..., 1])))
    assert diff["scale"] == "ratio of odds ratios"
    assert table.loc["b0[jmax25]", "scale"] == "ratio" and table.loc["b0[rd25]", "scale"] != "ratio"
    assert table.loc["tau[taxon effects on vcmax25]", "scale"] == "SD, log scale"
    assert list(table.loc[["sigma[aci curves]", "sigma[aq curves]"], "quantity"]) == [
        "residual SD (aci curves)", "residual SD (aq curves)"]


def test_what_a_structure_estimates_is_read_from_the_fit_of_compare(quick_demo):
    """The fit file compare writes carries every coordinate the table reads: kinds, scales and ratios come
    from the design, not from words."""
    from leafcv.cv.arviz_bridge import to_datatree
    from leafcv.fitting import fit_structure
    from leafcv.spec import SamplerSpec

    from ..fakes import FakeEngine

    comparison, dataset, _ = quick_demo
    fit = fit_structure(comparison.structure("traits-month-fixed"), dataset, comparison.data,
                        SamplerSpec(chains=2, warmup=10, draws=60, seed=3), engine=FakeEngine())
    design = fit.design
    tree = to_datatree(fit, dataset)
    assert labelled(tree) == (True, "")
    table = population_table(tree).set_index("variable")
    for c in design.coefficients:
        quantity = table.loc[f"beta[{c.label}]", "quantity"]
        if c.kind == "level":
            assert quantity.endswith(f"{c.label} against the reference level")
        else:
            assert f"per {design.trait_transform[c.term][1]:g} unit" in quantity
    ratios = {p for p in design.params if design.ratio.get(p)}
    assert {v[3:-1] for v in table.index if v.startswith("b0[") and table.loc[v, "scale"] == "ratio"} == ratios


def test_a_fit_without_the_coordinates_gives_no_estimates_and_says_which(tmp_path):
    idata, _ = _split_idata(tmp_path)
    bare = idata.copy()
    bare["posterior"] = idata.posterior.to_dataset().drop_vars(["coefficient_kind", "group_term_parameter"])
    ok, why = labelled(bare)
    assert not ok and "coefficient_kind, group_term_parameter" in why and "re-run `leafcv compare`" in why


def test_leaf_table_is_the_quantiles_of_leaf_value():
    idata = labelled_idata()
    table = leaf_table(idata)
    lv = idata.posterior["leaf_value"].values                   # chain, draw, leaf, parameter
    assert list(table["leaf"]) == LEAVES
    for j, p in enumerate(["vcmax25", "jmax25", "alpha", "theta", "rd25"]):
        for i in (0, 7):
            np.testing.assert_allclose([table.loc[i, p], table.loc[i, f"{p}_q05"], table.loc[i, f"{p}_q95"]],
                                       q(lv[:, :, i, j]))


def test_the_report_shows_the_best_structures_estimates(written):
    from leafcv.cv.arviz_bridge import open_fit

    run, _, html = written
    assert "<h2>What traits-month-fixed estimates</h2>" in html
    shown = pd.read_csv(run / "tables" / "population_estimates.csv")
    fit = open_fit(run / "fits" / "traits-month-fixed.nc")
    expected = population_table(fit)
    np.testing.assert_allclose(shown[["median", "q05", "q95"]], expected[["median", "q05", "q95"]])
    leaves = pd.read_csv(run / "tables" / "leaf_estimates.csv")
    assert list(leaves.columns[:3]) == ["leaf", "taxon", "campaign"]
    np.testing.assert_allclose(leaves["vcmax25"], leaf_table(fit)["vcmax25"])


def test_a_fit_without_labels_gives_no_estimates_and_says_why(fresh_run, no_engine):
    from arviz_base import from_dict

    old = from_dict({"posterior": {"b0": np.zeros((2, 10, 5)), "beta": np.zeros((2, 10, 2))}})
    assert labelled(old) == (False, "it was written in the unlabelled layout of an earlier leafcv version (b0 has no "
                                    "'parameter' coordinate); re-run `leafcv compare` to write a labelled fit")
    old.to_netcdf(str(fresh_run / "fits" / "traits-month-fixed.nc"), engine="h5netcdf")
    html = write_report(fresh_run).read_text()
    assert "no estimates are shown because its saved fit" in html and "unlabelled layout" in html
    assert not (fresh_run / "tables" / "population_estimates.csv").exists()
