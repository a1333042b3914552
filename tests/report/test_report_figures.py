"""Each figure's plotted data (figures/<name>.csv) against the run's own results, so that a figure cannot
silently show the wrong structure or the wrong numbers."""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from leafcv.cv.result import khat_threshold

pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")


def test_ranking_figure_plots_ranking_csv(written):
    run, _, _ = written
    plotted = pd.read_csv(run / "figures" / "ranking.csv", keep_default_na=False, na_values=[""])
    ranking = pd.read_csv(run / "ranking.csv")
    assert list(plotted["structure"]) == list(ranking["structure"])
    np.testing.assert_allclose(plotted["elpd_diff"], ranking["elpd_diff"], rtol=1e-12)
    np.testing.assert_allclose(plotted["se_diff"], ranking["se_diff"], rtol=1e-12)
    np.testing.assert_allclose(plotted["low_2se"], ranking["elpd_diff"] - 2 * ranking["se_diff"], rtol=1e-12)
    np.testing.assert_allclose(plotted["high_1se"], ranking["elpd_diff"] + ranking["se_diff"], rtol=1e-12)
    unranked = plotted[plotted["status"] == "not ranked"]
    assert list(unranked["structure"]) == list(ranking.loc[ranking["rank"].isna(), "structure"])
    assert list(unranked["reason"]) == ["not ranked: fits did not converge"]


def test_leaves_figure_plots_pointwise_differences_of_the_best_against_the_next_two(written):
    run, _, _ = written
    plotted = pd.read_csv(run / "figures" / "leaves.csv")
    ranking = pd.read_csv(run / "ranking.csv")
    pointwise = pd.read_csv(run / "pointwise.csv")
    ranked = list(ranking.loc[ranking["rank"].notna(), "structure"])
    assert set(plotted["best"]) == {ranked[0]}
    assert list(dict.fromkeys(plotted["other"])) == ranked[1:3]
    data = pd.read_csv(run.parent.parent / "observations.csv").drop_duplicates("plant_leaf")
    taxon = dict(zip(data["plant_leaf"], data["taxon"]))
    for other in ranked[1:3]:
        mine = plotted[plotted["other"] == other].set_index("leaf").loc[pointwise["leaf"]]
        expected = pointwise[f"elpd:{ranked[0]}"].to_numpy() - pointwise[f"elpd:{other}"].to_numpy()
        np.testing.assert_allclose(mine["delta"], expected, rtol=1e-12)
        # the bars sum to the total difference in ranking.csv (structure − best, so the sign flips)
        total = ranking.set_index("structure").loc[other, "elpd_diff"]
        assert mine["delta"].sum() == pytest.approx(-total)
        assert list(mine["group"]) == [taxon[leaf] for leaf in mine.index]
        top5 = set(pointwise["leaf"][np.argsort(-np.abs(expected))[:5]])
        assert set(mine.index[mine["labelled"]]) == top5


def test_khat_figure_plots_the_stored_khat_and_threshold(written):
    run, _, _ = written
    plotted = pd.read_csv(run / "figures" / "khat.csv")
    for name in plotted["structure"].unique():
        stored = json.loads((run / "results" / f"{name}.json").read_text())
        mine = plotted[plotted["structure"] == name]
        assert list(mine["leaf"]) == stored["leaves"]
        khat = np.array([np.nan if k is None else k for k in stored["pareto_k"]], float)
        np.testing.assert_array_equal(np.isnan(mine["khat"]), np.isnan(khat))
        np.testing.assert_allclose(mine["khat"].dropna(), khat[~np.isnan(khat)], rtol=1e-12)
        assert list(mine["method"]) == stored["method_i"]
        # min(1 - 1/log10 S, 0.7), Vehtari et al. 2024 (JMLR 25(72)); S = 400 gives 0.6157
        assert mine["threshold"].iloc[0] == pytest.approx(min(1 - 1 / np.log10(stored["n_draws"]), 0.7))
        assert mine["threshold"].iloc[0] == pytest.approx(khat_threshold(400))


@pytest.mark.parametrize("name", ["ranking", "leaves", "khat"])
def test_figures_are_drawn_in_the_okabe_ito_palette_and_are_not_blank(written, name):
    run, _, _ = written
    image = np.asarray(Image.open(run / "figures" / f"{name}.png").convert("RGB")).reshape(-1, 3)
    assert (image < 250).any(axis=1).mean() > 0.01                   # something is drawn
    # Okabe & Ito 2008 blue (#0072B2) or orange (#E69F00) appear: the data marks use the palette
    colours = {tuple(c) for c in np.unique(image, axis=0)}
    assert {(0, 114, 178), (230, 159, 0)} & colours
    svg = (run / "figures" / f"{name}.svg").read_text()
    assert svg.lstrip().startswith("<?xml") and "<svg" in svg
    assert {"ranking": "(nats", "leaves": "(nats)", "khat": "Pareto k"}[name] in svg    # labelled axis, text kept as text
