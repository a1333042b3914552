"""Run-folder output of the main job, without sampling: atomic writes and their file mode, result
files (JSON round trip), ranking.csv, ranking.txt and pointwise.csv.

Outside references: POSIX open(2)/umask(2) (a file created with mode 0o666 gets 0o666 & ~umask,
e.g. 0o644 under umask 022); RFC 8259 (JSON has no NaN or Infinity; Python's ``json`` rejects them
with ``parse_constant``); pandas' CSV reader for the column types.
"""
from __future__ import annotations

import json
import os
import stat

import numpy as np
import pandas as pd
import pytest

from leafcv.compare import (
    RESULT_VERSION, _result_from_json, _result_to_json, pointwise_table, spot_check_line, write_atomic,
    write_ranking,
)
from leafcv.cv.result import CVResult

# ArviZ 0.23's compare (stacking weights) uses an inplace sort that pandas 3.1 deprecates
pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")

LEAVES = ("L001", "L002", "L003", "L004", "L005")


def full_result() -> CVResult:
    """A result with every field set, NaN in each per-entry array and in one metric, an infinite MCSE."""
    return CVResult(
        structure="leaf-vcmax", method="auto", leaves=LEAVES, elpd_i=[-40.5, -41.25, -39.0, -45.125, -42.0],
        n_draws=2000, pareto_k=[0.12, np.nan, 0.4, 0.81, np.nan], n_refits=3, grade="marginal",
        warnings=("marginal convergence: bulk ESS 350 for tau", "1 spot check"),
        rmse={"all": 0.61, "aci": 0.5, "aq": np.nan}, r2={"all": 0.93},
        method_i=("psis", "refit", "psis", "psis", "refit"), mcse_i=[0.02, 0.05, np.nan, 0.03, np.inf],
        quad_bound_i=[0.001, np.nan, 0.002, 0.0, 0.003], unscored="quadrature did not converge for leaf L004",
        unit="leaf",
    )


def _refuse_constant(name: str) -> None:
    raise ValueError(f"non-standard JSON constant {name}")


# ------------------------------------------------------------------------------------------
# atomic writes

@pytest.mark.parametrize("umask,mode", [(0o022, 0o644), (0o077, 0o600), (0o002, 0o664)],
                         ids=["umask022", "umask077", "umask002"])
def test_write_atomic_gives_the_mode_of_an_ordinary_open(tmp_path, umask, mode):
    # POSIX: creating a file with mode 0o666 under umask u gives 0o666 & ~u
    old = os.umask(umask)
    try:
        path = tmp_path / "sub" / "ranking.csv"
        write_atomic(path, "a,b\n1,2\n")
        reference = tmp_path / "reference.txt"
        reference.write_text("x")
    finally:
        os.umask(old)
    assert stat.S_IMODE(path.stat().st_mode) == mode
    assert stat.S_IMODE(reference.stat().st_mode) == mode       # what open() itself gives
    assert path.read_text() == "a,b\n1,2\n"
    assert [p.name for p in path.parent.iterdir()] == ["ranking.csv"]    # no temporary file left


# ------------------------------------------------------------------------------------------
# result files

def test_result_json_round_trip_with_every_field_and_nan():
    res = full_result()
    details = {"refit_leaves": ["L002", "L005"], "spot_checks": [{"leaf": "L003", "khat": float("nan"),
                                                                   "elpd_psis": -39.0}]}
    text = _result_to_json(res, details, "abc123")
    raw = json.loads(text, parse_constant=_refuse_constant)      # strict JSON: NaN written as null
    assert raw["version"] == RESULT_VERSION == 2
    assert raw["mcse_i"][2] is None and raw["pareto_k"][1] is None and raw["rmse"]["aq"] is None
    assert raw["mcse_i"][4] == "inf"
    assert raw["details"]["spot_checks"][0]["khat"] is None
    key, back, det = _result_from_json(text)
    assert key == "abc123" and det["refit_leaves"] == ["L002", "L005"]
    for name in ("structure", "method", "leaves", "n_draws", "n_refits", "grade", "warnings", "method_i",
                 "unscored", "unit"):
        assert getattr(back, name) == getattr(res, name), name
    for name in ("elpd_i", "pareto_k", "mcse_i", "quad_bound_i"):
        np.testing.assert_array_equal(getattr(back, name), getattr(res, name), err_msg=name)   # NaN == NaN here
    assert back.r2 == res.r2 and back.rmse["aci"] == 0.5 and np.isnan(back.rmse["aq"])
    assert _result_to_json(back, det, "abc123") == text      # written again from what was read: the same file


def test_unit_other_than_leaf_round_trips():
    res = CVResult("s", "exact", ("sp1", "sp2", "sp3"), [-300.0, -280.5, -310.0], 1000, unit="species",
                   mcse_i=[0.1, 0.2, 0.3])
    _, back, _ = _result_from_json(_result_to_json(res, {}, "k"))
    assert back.unit == "species" and back.method_i == ("exact",) * 3 and back.leaves == res.leaves


def test_result_files_of_format_1_are_still_read():
    old = {"key": "k1", "structure": "s", "method": "exact", "leaves": list(LEAVES),
           "elpd_i": [-1.0, -2.0, -3.0, -4.0, -5.0], "n_draws": 400, "pareto_k": None, "n_refits": 5,
           "converged": False, "warnings": ["2 of 6 fits did not converge"], "rmse": {"all": 0.7},
           "r2": {"all": 0.8}, "details": {"notes": []}}
    key, res, _ = _result_from_json(json.dumps(old))
    assert key == "k1" and res.grade == "failed" and res.unit == "leaf" and res.method_i == ("exact",) * 5
    assert np.isnan(res.mcse_i).all() and np.isnan(res.pareto_k).all()


# ------------------------------------------------------------------------------------------
# ranking.csv, ranking.txt, pointwise.csv

def test_pointwise_table_columns_and_values():
    res = full_result()
    other = CVResult("other", "exact", LEAVES, [-41.0, -42.0, -40.0, -44.0, -43.0], 1000)
    table = pointwise_table([res, other])
    assert list(table.columns) == [
        "leaf", "elpd:leaf-vcmax", "method:leaf-vcmax", "mcse:leaf-vcmax", "quad_bound:leaf-vcmax",
        "khat:leaf-vcmax", "elpd:other", "method:other", "mcse:other", "quad_bound:other", "khat:other"]
    assert list(table["method:leaf-vcmax"]) == ["psis", "refit", "psis", "psis", "refit"]
    assert np.isnan(table["khat:leaf-vcmax"].iloc[1]) and table["khat:leaf-vcmax"].iloc[3] == 0.81
    assert table["khat:other"].isna().all() and list(table["method:other"]) == ["exact"] * 5
    species = CVResult("s", "exact", ("sp1", "sp2"), [-300.0, -280.5], 1000, unit="species")
    assert list(pointwise_table([species]).columns)[0] == "species"


def test_spot_check_lines():
    new = {"leaf": "L003", "khat": 0.312, "elpd_psis": -45.2149, "elpd_exact": -45.19, "mcse_psis": 0.031,
           "mcse_exact": 0.04, "disagree": False}
    assert spot_check_line("s", new) == ("spot check L003 in s: PSIS -45.21 ± 0.03 vs exact refit -45.19 ± 0.04 "
                                         "nats (k-hat 0.31)")
    assert spot_check_line("s", dict(new, disagree=True)).endswith(
        "(k-hat 0.31) — DISAGREES: the exact value is used")
    old = {"leaf": "L004", "khat": 0.2, "elpd_auto": -30.0, "elpd_exact": -30.05}
    assert spot_check_line("t", old) == "spot check L004 in t: PSIS -30.00 vs exact refit -30.05 nats (k-hat 0.20)"


def test_write_ranking_writes_numeric_csv_text_and_pointwise(tmp_path):
    base = np.array([-40.0, -41.0, -39.5, -45.0, -42.0])
    ok = CVResult("ok", "auto", LEAVES, base, 2000, pareto_k=[0.1, 0.2, 0.3, 0.2, 0.1], mcse_i=[0.01] * 5,
                  rmse={"all": 0.5, "aci": 0.45, "aq": 0.6}, r2={"all": 0.9, "aci": 0.92, "aq": 0.85})
    failed = CVResult("bad", "auto", LEAVES, base - 2.0, 2000, grade="failed")
    details = {"ok": {"spot_checks": [{"leaf": "L003", "khat": 0.3, "elpd_psis": -39.5, "elpd_exact": -39.4,
                                       "mcse_psis": 0.02, "mcse_exact": 0.03, "disagree": True}]},
               "bad": {}}
    text, table = write_ranking(tmp_path, [ok, failed], details, len(LEAVES))
    back = pd.read_csv(tmp_path / "ranking.csv")
    assert list(back.columns) == list(table.columns)
    assert {"rmse_aci", "r2_aci", "rmse_aq", "r2_aq", "mcse"} <= set(back.columns)
    for column in back.columns:
        if column not in ("structure", "warnings"):
            assert pd.api.types.is_numeric_dtype(back[column]), column
    assert list(back["converged"]) == [1, 0] and np.isnan(back["rank"].iloc[1])
    assert "spot check L003 in ok: PSIS -39.50 ± 0.02 vs exact refit -39.40 ± 0.03 nats (k-hat 0.30) — DISAGREES" in text
    assert (tmp_path / "ranking.txt").read_text() == text
    point = pd.read_csv(tmp_path / "pointwise.csv")
    assert list(point["leaf"]) == list(LEAVES) and point["khat:bad"].isna().all()
    for name in ("ranking.csv", "ranking.txt", "pointwise.csv"):
        assert stat.S_IMODE((tmp_path / name).stat().st_mode) == 0o666 & ~_current_umask()


def _current_umask() -> int:
    old = os.umask(0)
    os.umask(old)
    return old


def test_a_rerun_reuses_finished_structures_and_rebuilds_missing_files_from_the_task_store(quick_demo, tmp_path):
    """A finished structure is reused; one whose predictions file is gone is assembled again from the
    stored tasks, without a single sampler call, into the same file."""
    from dataclasses import replace

    from leafcv.compare import run_comparison
    from leafcv.spec import SamplerSpec

    from .fakes import FakeEngine

    comparison, dataset, _ = quick_demo
    comp = replace(comparison, structures=(comparison.structure("leaf-vcmax-alpha"),))
    out = tmp_path / "run"
    sampler = SamplerSpec(chains=2, warmup=10, draws=60, seed=3)

    def run():
        logs: list[str] = []
        engine = FakeEngine()
        run_comparison(comp, dataset, out, engine=engine, spot_checks=0, sampler=sampler, log=logs.append)
        return logs, engine

    _, first = run()
    assert first.calls
    logs, engine = run()
    assert any("reusing" in m for m in logs) and engine.calls == []
    curves = out / "predictions" / "leaf-vcmax-alpha-curves.csv"
    before = curves.read_bytes()
    curves.unlink()
    logs, engine = run()
    assert any("computing again" in m for m in logs) and engine.calls == []
    assert curves.read_bytes() == before
