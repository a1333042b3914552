"""The held-out predictions section: its figures' plotted data are the run's predictions of the top ranked
structures (so a figure cannot show another structure's), its RMSE and R² are 1 − SSE/SST computed here,
and the two leaves shown are those with the lowest and highest elpd per point under the best."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from .conftest import page_tables


def test_the_scatter_shows_the_top_three_structures_predictions(written):
    run, _, html = written
    ranking = pd.read_csv(run / "ranking.csv")
    top = [s for s in ranking.dropna(subset=["rank"]).sort_values("rank")["structure"]][:3]
    plotted = pd.read_csv(run / "figures" / "predicted_observed.csv")
    assert list(dict.fromkeys(plotted["structure"])) == top
    for s in top:
        own = pd.read_csv(run / "predictions" / f"{s}-points.csv")
        mine = plotted[plotted["structure"] == s]
        np.testing.assert_allclose(mine["predicted"].to_numpy(), own["predicted"].to_numpy())
        np.testing.assert_allclose(mine["observed"].to_numpy(), own["observed"].to_numpy())
    scores = pd.read_csv(run / "tables" / "prediction_scores.csv")
    for s in top:
        own = pd.read_csv(run / "predictions" / f"{s}-points.csv")
        for kind, d in [("all", own)] + list(own.groupby("curve_type")):
            e = d["observed"] - d["predicted"]
            row = scores[(scores["structure"] == s) & (scores["curve_type"] == kind)].iloc[0]
            assert row["rmse"] == pytest.approx(np.sqrt(np.mean(e ** 2)))
            assert row["r2"] == pytest.approx(1 - np.sum(e ** 2) / np.sum((d["observed"] - d["observed"].mean()) ** 2))
    shown = page_tables(html)["tables/prediction_scores.csv"]
    assert [r["structure"] for r in shown] == list(scores["structure"])


def test_the_curves_are_those_of_the_worst_and_best_predicted_leaves_under_the_best_two(written):
    run, _, html = written
    ranking = pd.read_csv(run / "ranking.csv").dropna(subset=["rank"]).sort_values("rank")
    best, second = ranking["structure"].iloc[:2]
    pointwise = pd.read_csv(run / "pointwise.csv")
    points = pd.read_csv(run / "predictions" / f"{best}-points.csv")
    per_point = pointwise.set_index("leaf")[f"elpd:{best}"] / points.groupby("leaf").size()
    expected = {per_point.idxmin(), per_point.idxmax()}
    curves = pd.read_csv(run / "figures" / "predictive_curves.csv")
    assert set(curves["leaf"].astype(str)) == expected
    assert set(curves.loc[curves["kind"] == "predicted", "structure"]) == {best, second}
    for s in (best, second):
        own = pd.read_csv(run / "predictions" / f"{s}-curves.csv")
        for leaf in expected:
            mine = curves[(curves["structure"] == s) & (curves["leaf"] == leaf)]
            theirs = own[own["leaf"] == leaf]
            np.testing.assert_allclose(mine["mean"].to_numpy(), theirs["mean"].to_numpy())
            np.testing.assert_allclose(mine["q95"].to_numpy(), theirs["q95"].to_numpy())
    observed = curves[curves["kind"] == "observed"]
    assert len(observed) == sum(len(points[points["leaf"] == leaf]) for leaf in expected)
    assert "lowest elpd per point" in html and "highest elpd per point" in html


def test_a_run_without_predictions_says_how_to_add_them(fresh_run):
    import shutil

    from leafcv.report import write_report

    shutil.rmtree(fresh_run / "predictions")
    html = write_report(fresh_run).read_text()
    assert "No held-out predictions in this run folder" in html
    assert not (fresh_run / "figures" / "predicted_observed.png").exists()
