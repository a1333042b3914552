"""The main job (leafcv.compare.run_comparison) on the quick demo, read from the session's one run
(``demo_run`` in tests/sampling/conftest.py): auto against exact refits, the ranking of the generating
structure, the run folder and resume, and the report rewritten from the results."""
from __future__ import annotations

import json

import numpy as np
import pytest

from leafcv.compare import run_comparison


def test_auto_agrees_with_exact_refits_on_spot_checks(demo_run):
    # Issue target (c): auto within 0.1 nats per leaf of exact leave-one-leaf-out on 3 random leaves.
    _, _, out, _ = demo_run
    res = json.loads((out / "results" / "traits-month-fixed.json").read_text())
    spots = res["details"]["spot_checks"]
    assert len(spots) == 3
    for s in spots:
        # within the stated tolerance max(0.1 nats, 3 x combined MCSE) plus both quadrature bounds, and never
        # silently: the check is stored
        assert abs(s["elpd_psis"] - s["elpd_exact"]) <= s["tolerance"], s
        expected = max(0.1, 3 * np.hypot(s["mcse_psis"], s["mcse_exact"])) + s["bound_psis"] + s["bound_exact"]
        assert s["tolerance"] == pytest.approx(expected, rel=1e-12)      # the same sum, added in another order
        assert not s["disagree"]


def test_generating_structure_ranks_first_or_within_2_se(demo_run):
    # Issue target (d): the data were simulated from "traits-month-fixed".
    table = demo_run[3]
    row = table.set_index("structure").loc["traits-month-fixed"]
    assert row["rank"] == 1 or abs(row["elpd_diff"]) < 2 * row["se_diff"]
    assert table.iloc[-1]["structure"] == "leaf-vcmax-alpha"   # without the traits, new leaves are predicted worse


def test_run_folder_and_resume(demo_run):
    comp, dataset, out, table = demo_run
    cols = ["structure", "rank", "elpd", "se", "mcse", "quad_bound", "elpd_diff", "se_diff", "weight", "rmse", "r2",
            "rmse_aci", "r2_aci", "rmse_aq", "r2_aq", "n_refits", "max_khat", "converged", "warnings"]
    assert list(table.columns) == cols          # DESIGN.md, "Ranking table columns", plus quad_bound
    import pandas as pd

    csv = pd.read_csv(out / "ranking.csv")
    assert list(csv.columns) == cols
    assert all(pd.api.types.is_numeric_dtype(csv[c]) for c in cols if c not in ("structure", "warnings"))
    assert np.all(csv["mcse"] > 0) and np.all(csv["mcse"] < csv["se"])
    manifest = json.loads((out / "manifest.json").read_text())
    assert len(manifest["data_sha256"]) == 64 and manifest["settings"]["method"] == "auto"
    assert "pystan" in manifest["versions"] and "finished" in manifest
    point = (out / "pointwise.csv").read_text().splitlines()
    assert len(point) == dataset.n_leaves + 1
    # a re-run reuses every finished result whose inputs match, and recomputes nothing
    logs = []
    again = run_comparison(comp, dataset, out, log=logs.append)
    assert sum("reusing" in line for line in logs) == 2
    np.testing.assert_allclose(again["elpd"].to_numpy(float), table["elpd"].to_numpy(float))


def test_report_rewrites_the_ranking_from_results(demo_run):
    from leafcv.compare import rewrite_report

    _, _, out, table = demo_run
    before = (out / "ranking.csv").read_text()
    (out / "ranking.csv").unlink()
    text = rewrite_report(out)
    assert "traits-month-fixed" in text
    assert (out / "ranking.csv").read_text() == before
