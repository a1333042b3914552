"""Predictions for new leaves (leafcv.predict) from a run made with the fake engine (no sampler): a new
leaf that copies a fitted leaf's traits and levels gets exactly that leaf's population mean; a new level
of a random grouping is integrated over, one of a fixed grouping is refused; expected A follows the FvCB
model (Farquhar, von Caemmerer & Berry 1980) at the predicted parameters."""
from __future__ import annotations

import shutil

import numpy as np
import pandas as pd
import pytest

from leafcv import fvcb
from leafcv.api import load
from leafcv.compare import run_comparison
from leafcv.demo import write_demo
from leafcv.design import build_design, leaf_link_values, natural_values
from leafcv.errors import DataError, UserInputError
from leafcv.inits import fit_leaves
from leafcv.predict import predict
from leafcv.spec import SamplerSpec
from .fakes import FakeEngine


@pytest.fixture(scope="module")
def fake_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("predict")
    path = write_demo(folder, quick=True)
    comparison, dataset = load(path)
    out = folder / "run"
    run_comparison(comparison, dataset, out, engine=FakeEngine(), spot_checks=0,
                   sampler=SamplerSpec(chains=2, warmup=10, draws=100, seed=9), log=lambda m: None)
    return comparison, dataset, out


def _leaf_rows(dataset, idx):
    cols = ["leaf", *dataset.groups, *dataset.traits]
    return dataset.leaves.iloc[idx][cols].rename(columns={"leaf": "plant_leaf"}).reset_index(drop=True)


def test_a_copy_of_a_fitted_leaf_has_that_leafs_population_mean(fake_run):
    from leafcv.cv.arviz_bridge import open_fit

    comparison, dataset, out = fake_run
    name = "traits-month-random"
    pred = predict(out, name, _leaf_rows(dataset, [0, 5]))
    design = build_design(comparison.structure(name), dataset, comparison.data, leaf_fits=fit_leaves(dataset))
    post = open_fit(out / "fits" / f"{name}.nc").posterior
    draws = {k: post[k].values.reshape((-1,) + post[k].shape[2:]) for k in post.data_vars}
    mu, _ = leaf_link_values(design, draws)
    nat = natural_values(design, mu)
    t = pred.parameters.set_index(["leaf", "parameter"])
    for i, leaf in ((0, dataset.leaves["leaf"].iloc[0]), (5, dataset.leaves["leaf"].iloc[5])):
        for p in design.params:
            assert t.loc[(leaf, p), "median"] == pytest.approx(float(np.median(nat[p][:, i])), rel=1e-10)
            lo, hi = t.loc[(leaf, p), ["new_leaf_q05", "new_leaf_q95"]]
            m_lo, m_hi = t.loc[(leaf, p), ["mean_q05", "mean_q95"]]
            if p in ("vcmax25", "alpha"):           # leaf effects: a new leaf is more uncertain
                assert hi - lo > m_hi - m_lo


def test_a_new_level_of_a_random_grouping_is_integrated_and_of_a_fixed_one_refused(fake_run):
    comparison, dataset, out = fake_run
    rows = _leaf_rows(dataset, [0])
    rows.loc[0, "campaign"] = "a-campaign-never-seen"
    pred = predict(out, "traits-month-random", rows)
    assert len(pred.parameters) == 5 and np.isfinite(pred.parameters["new_leaf_q95"]).all()
    with pytest.raises(DataError) as err:
        predict(out, "traits-month-fixed", rows)
    msg = str(err.value)
    assert "'campaign'" in msg and "row 2" in msg and "a-campaign-never-seen" in msg and "random effect" in msg


def test_missing_columns_and_unknown_structures_are_named(fake_run):
    comparison, dataset, out = fake_run
    rows = _leaf_rows(dataset, [0]).drop(columns=["n_area"])
    with pytest.raises(DataError, match="'n_area'"):
        predict(out, "traits-month-fixed", rows)
    with pytest.raises(UserInputError, match="no fit of structure 'nope'"):
        predict(out, "nope", _leaf_rows(dataset, [0]))


def test_expected_assimilation_is_the_fvcb_model_at_the_predicted_parameters(fake_run):
    comparison, dataset, out = fake_run
    cond = pd.DataFrame({"intercellular_co2": [150.0, 600.0], "photon_flux": [1500.0, 300.0],
                         "leaf_temperature": [25.0, 31.0]})
    rows = _leaf_rows(dataset, [2])
    pred = predict(out, "leaf-vcmax-alpha", rows, cond)
    a = pred.assimilation
    assert list(a["intercellular_co2"]) == [150.0, 600.0] and (a["oxygen"] == 210.0).all()
    # leaf-vcmax-alpha has no traits: the population mean is the same for every leaf, so the medians of
    # A follow from the medians of the parameters only through the model's monotonicity; check instead
    # that the interval of a new leaf contains the model at the parameters' medians
    t = pred.parameters.set_index("parameter")["median"]
    jmax = t["jmax25"]
    for j, row in a.iterrows():
        at_median = float(fvcb.net_assimilation(row["intercellular_co2"], row["photon_flux"], row["leaf_temperature"],
                                                t["vcmax25"], jmax, t["alpha"], t["theta"], t["rd25"]))
        assert row["new_leaf_q05"] <= at_median <= row["new_leaf_q95"]
        assert row["new_leaf_q05"] <= row["mean_q05"] <= row["a_median"] <= row["mean_q95"] <= row["new_leaf_q95"]


def test_the_new_leaf_file_keeps_levels_as_written(tmp_path):
    # a level that looks like a number stays the text the data reader keeps ("05" is not 5)
    # and the file goes through the data layer's reader: semicolons with decimal commas, as an observation
    # file may be written, and line numbers for messages
    from leafcv.predict import _read

    path = tmp_path / "new.csv"
    path.write_text("plant_leaf;campaign;n_area\nN1; 05 ;1,5\n\nN2;007;\n")
    t, rows, source = _read(path, "new-leaf", "leaf", ["n_area"])
    assert list(t["campaign"]) == ["05", "007"] and t["n_area"].iloc[0] == 1.5 and np.isnan(t["n_area"].iloc[1])
    assert list(rows) == [2, 4] and source == str(path)
    with pytest.raises(DataError, match="the new-leaf file .* does not exist"):
        _read(tmp_path / "nope.csv", "new-leaf", "leaf", [])


def test_a_csv_of_new_leaves_predicts_as_the_same_frame(fake_run, tmp_path):
    comparison, dataset, out = fake_run
    rows = _leaf_rows(dataset, [1, 3])
    rows.to_csv(tmp_path / "new.csv", index=False)
    a = predict(out, "traits-month-random", rows).parameters
    b = predict(out, "traits-month-random", tmp_path / "new.csv").parameters
    pd.testing.assert_frame_equal(a, b)


def test_the_apis_predict_writes_its_tables_when_given_a_folder(fake_run, tmp_path):
    from leafcv.api import open_run

    comparison, dataset, out = fake_run
    cond = pd.DataFrame({"intercellular_co2": [150.0], "photon_flux": [1500.0], "leaf_temperature": [25.0]})
    pred = open_run(out).predict("leaf-vcmax-alpha", _leaf_rows(dataset, [2]), cond, out=tmp_path / "pred")
    pd.testing.assert_frame_equal(pd.read_csv(tmp_path / "pred" / "parameters.csv", dtype={"leaf": str}),
                                  pred.parameters, check_dtype=False)
    pd.testing.assert_frame_equal(pd.read_csv(tmp_path / "pred" / "assimilation.csv", dtype={"leaf": str}),
                                  pred.assimilation, check_dtype=False)
    assert sorted(p.name for p in (tmp_path / "pred").iterdir()) == ["assimilation.csv", "parameters.csv"]
