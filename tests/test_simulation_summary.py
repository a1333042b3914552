"""The summary of a simulation (`leafcv.simulation_summary`) on made-up replicate folders: shares of wins
and of "not told apart" by leafcv's rule, Δelpd quantiles, and interval coverage counted by hand."""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from leafcv.simulation_summary import summarise, why_not_ranked


def _replicate(folder, k, elpd: dict[str, list[float]], truth: dict[str, float], post_b0: np.ndarray):
    run = folder / f"replicate-{k:03d}" / "run"
    (run / "fits").mkdir(parents=True)
    pw = pd.DataFrame({"leaf": [f"L{i}" for i in range(len(next(iter(elpd.values()))))]}
                      | {f"elpd:{n}": v for n, v in elpd.items()})
    pw.to_csv(run / "pointwise.csv", index=False)
    totals = {n: float(np.sum(v)) for n, v in elpd.items()}
    order = sorted(totals, key=lambda n: -totals[n])
    best = order[0]
    rows = []
    for r, n in enumerate(order):
        d = np.asarray(elpd[n]) - np.asarray(elpd[best])
        rows.append({"structure": n, "rank": r + 1, "elpd": totals[n], "se": 1.0, "mcse": 0.0, "quad_bound": 0.0,
                     "elpd_diff": float(d.sum()), "se_diff": float(np.sqrt(d.size * np.var(d, ddof=1)))})
    pd.DataFrame(rows).to_csv(run / "ranking.csv", index=False)
    (run / "manifest.json").write_text(json.dumps({"finished": "now"}))
    (folder / f"replicate-{k:03d}" / "truth.json").write_text(json.dumps({"draw": 0, "values": truth}))
    ds = xr.Dataset({"b0": (("chain", "draw", "parameter"), post_b0[None])},
                    coords={"parameter": ["vcmax25", "alpha"]})
    ds.to_netcdf(run / "fits" / "gen.nc", group="posterior", engine="h5netcdf")


def test_summary_counts_wins_rule_and_coverage(tmp_path):
    (tmp_path / "settings.json").write_text(json.dumps({"structure": "gen"}))
    rng = np.random.default_rng(0)
    leaves = 30
    post = np.column_stack([rng.uniform(0, 1, 1000), rng.uniform(10, 11, 1000)])   # 90 % interval ~ [0.05, 0.95]
    # replicate 1: gen first by 30 nats (told apart from rival); rival's truth inside, alpha's outside
    _replicate(tmp_path, 1, {"gen": list(rng.normal(0, 0.1, leaves) + 1.0), "rival": list(rng.normal(0, 0.1, leaves))},
               {"b0[vcmax25]": 0.5, "b0[alpha]": 12.0}, post)
    # replicate 2: rival first by 0.3 nats (not told apart: < 4 nats); both truths inside
    _replicate(tmp_path, 2, {"gen": list(np.full(leaves, -0.01)), "rival": list(np.zeros(leaves))},
               {"b0[vcmax25]": 0.2, "b0[alpha]": 10.5}, post)
    # an unfinished replicate is left out
    (tmp_path / "replicate-003" / "run").mkdir(parents=True)
    t = summarise(tmp_path)
    assert t["n_replicates"] == 2
    c = t["candidates"].set_index("structure")
    assert c.loc["gen", "share_first"] == 0.5 and c.loc["rival", "share_first"] == 0.5
    assert c.loc["gen", "share_not_told_apart_from_first"] == 1.0       # first once, within 4 nats once
    assert c.loc["rival", "share_not_told_apart_from_first"] == 0.5     # 30 nats behind once, first once
    assert bool(c.loc["gen", "generating"]) and not bool(c.loc["rival", "generating"])
    d = sorted(t["replicates"].query("structure == 'rival'")["delta_generating"])
    assert d == pytest.approx([-0.3, 30.0], abs=1.0)
    cov = t["coverage"].set_index("quantity")["coverage"]
    assert cov["b0[vcmax25]"] == 1.0 and cov["b0[alpha]"] == 0.5
    for name in ("replicates.csv", "candidates.csv", "coverage.csv"):
        assert (tmp_path / name).exists()


def test_an_unranked_generating_structure_counts_as_a_loss_and_keeps_its_reason(tmp_path):
    (tmp_path / "settings.json").write_text(json.dumps({"structure": "gen"}))
    post = np.column_stack([np.linspace(0, 1, 100), np.linspace(10, 11, 100)])
    _replicate(tmp_path, 1, {"gen": [1.0] * 10, "rival": [0.0] * 10}, {"b0[vcmax25]": 0.5}, post)
    ranking = tmp_path / "replicate-001" / "run" / "ranking.csv"
    table = pd.read_csv(ranking)
    table["warnings"] = ""
    gen = table["structure"] == "gen"
    table.loc[gen, "rank"] = np.nan
    table.loc[gen, "warnings"] = "not ranked: fits did not converge; fits did not converge: 1 of 1 fits ..."
    table.loc[~gen, "rank"] = 1
    table.to_csv(ranking, index=False)
    t = summarise(tmp_path)
    c = t["candidates"].set_index("structure")
    assert c.loc["gen", "share_unranked"] == 1.0 and c.loc["gen", "share_first"] == 0.0
    assert c.loc["rival", "share_first"] == 1.0
    r = t["replicates"].set_index("structure")
    assert r.loc["gen", "why_not_ranked"] == "fits did not converge"
    assert pd.isna(r.loc["rival", "why_not_ranked"]) or r.loc["rival", "why_not_ranked"] == ""


@pytest.mark.parametrize("warnings,reason", [
    ("not ranked: fits did not converge; fits did not converge: 2 of 2 fits", "fits did not converge"),
    ("k-hat above 0.7; not ranked: a leaf's score is flagged", "a leaf's score is flagged"),
    ("", "not stated"), (float("nan"), "not stated")])
def test_the_reason_is_the_clause_after_not_ranked(warnings, reason):
    assert why_not_ranked(warnings) == reason

