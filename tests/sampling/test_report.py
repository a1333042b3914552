"""The report of a real run (the shared quick-demo run of tests/sampling/conftest.py), as a reader sees it
in headless Chromium: every image loads, every section is there, the numbers on the page equal ranking.csv
and the tables after rounding to the digits shown, and each figure's plotted data is the run's own."""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from ..report.conftest import page_tables
from ..report.test_report_browser import _checked_dom, _run, chromium  # noqa: F401  (a fixture)
from ..report.test_report_page import SECTIONS, shown_equals

pytestmark = [pytest.mark.browser]


def test_the_quick_demo_report_renders_with_the_runs_numbers(demo_run, chromium, tmp_path):  # noqa: F811
    _, _, out, _ = demo_run
    html = (out / "report.html").read_text()
    attrs, dom = _checked_dom(chromium, tmp_path, html)
    assert int(attrs["data-images"]) == html.count("<img ") == 5
    assert json.loads(attrs["data-broken"].replace("&quot;", '"')) == []
    assert attrs["data-sections"].split() == SECTIONS
    tables = page_tables(dom)
    ranking = pd.read_csv(out / "ranking.csv")
    rows = tables["tables/ranking.csv"]
    assert [r["structure"] for r in rows] == list(ranking["structure"])
    for row, (_, r) in zip(rows, ranking.iterrows()):
        for col in ("elpd", "se", "elpd_diff", "se_diff", "weight", "mcse", "rmse", "r2", "max_khat"):
            assert shown_equals(row[col], r[col]), (col, row[col], r[col])
    for name in ("population_estimates", "leaf_estimates", "prediction_scores"):
        csv = pd.read_csv(out / "tables" / f"{name}.csv")
        shown = tables[f"tables/{name}.csv"]
        assert len(shown) == len(csv)
        for row, (_, r) in zip(shown, csv.iterrows()):
            for col, cell in row.items():
                if col in csv.columns and isinstance(r[col], (float, np.floating)):
                    assert shown_equals(cell, r[col]), (name, col, cell, r[col])
    # what the figures plot is the run's own: the best structure's predictions, its per-leaf elpd
    best = str(ranking.loc[ranking["rank"] == 1, "structure"].iloc[0])
    plotted = pd.read_csv(out / "figures" / "predicted_observed.csv")
    own = pd.read_csv(out / "predictions" / f"{best}-points.csv")
    np.testing.assert_allclose(plotted.loc[plotted["structure"] == best, "predicted"], own["predicted"])
    leaves = pd.read_csv(out / "figures" / "leaves.csv")
    pointwise = pd.read_csv(out / "pointwise.csv")
    other = leaves["other"].iloc[0]
    np.testing.assert_allclose(leaves.loc[leaves["other"] == other, "delta"],
                               pointwise[f"elpd:{best}"] - pointwise[f"elpd:{other}"])
    khat = pd.read_csv(out / "figures" / "khat.csv")
    stored = json.loads((out / "results" / f"{best}.json").read_text())["details"]["psis_khat"]
    np.testing.assert_allclose(khat.loc[khat["structure"] == best, "psis_khat"], stored)
    refit = khat[(khat["structure"] == best) & (khat["method"] != "psis")]
    assert refit["khat"].isna().all() and np.isfinite(refit["psis_khat"]).all()
    shot = tmp_path / "report.png"
    height = int(attrs["data-height"])
    done = _run(chromium, tmp_path / "profile2", f"--screenshot={shot}", f"--window-size=1240,{height}", (out / "report.html").as_uri())
    assert done.returncode == 0 and shot.stat().st_size > 50_000
