"""The section "How reliable is this choice?": the cost of one replicate from the task journal, the SBC
status read from docs/validation.md as bench/sbc.py writes it, and the section in the fake run's report."""
from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np

from leafcv.report.html import Tables
from leafcv.report.reliability import read_validation, replicate_cost, sbc_html, selection_html
from leafcv.runfolder import RunPaths


def _run(folder):
    """The part of a report's RunFolder that the selection part reads."""
    return SimpleNamespace(path=folder, paths=RunPaths(folder), manifest={})


def _simulation(folder, reps, candidates, k: int):
    """A simulation folder as `leafcv simulate` writes it, from the given tables; coverage of one quantity."""
    import pandas as pd

    sim = folder / "simulation"
    sim.mkdir()
    (sim / "settings.json").write_text(json.dumps({"structure": "gen", "chains": 2, "warmup": 100, "draws": 100,
                                                   "leaves_per_level": None, "level_of": None}))
    pd.DataFrame(reps).to_csv(sim / "replicates.csv", index=False)
    pd.DataFrame(candidates).to_csv(sim / "candidates.csv", index=False)
    pd.DataFrame({"quantity": ["b0[vcmax25]"], "coverage": [0.5], "replicates": [k]}).to_csv(sim / "coverage.csv", index=False)


def _journal(folder, events):
    (folder / "tasks").mkdir(parents=True, exist_ok=True)
    (folder / "tasks" / "journal.jsonl").write_text("\n".join(json.dumps(e) for e in events) + "\n{cut line")


def test_replicate_cost_sums_each_tasks_last_finish(tmp_path):
    _journal(tmp_path, [
        {"event": "run", "time": "2026-12-04T10:00:00", "workers": 2},
        {"event": "start", "time": "2026-12-04T10:00:00", "key": "a"},
        {"event": "start", "time": "2026-12-04T10:00:05", "key": "b"},
        {"event": "done", "time": "2026-12-04T10:01:00", "key": "a", "seconds": 58.5},
        {"event": "done", "time": "2026-12-04T10:02:05", "key": "b"},            # no seconds: 120 s from start
        {"event": "done", "time": "2026-12-04T10:03:00", "key": "a", "seconds": 61.5},   # a rerun: the last counts
    ])
    cost = replicate_cost(tmp_path)
    assert cost == {"seconds": 61.5 + 120.0, "tasks": 2, "wall": 180.0, "workers": 2}
    run = _run(tmp_path)
    text = selection_html(run, Tables(tmp_path / "tables"))
    assert "3.0 min summed" in text and "3.0 min from the first" in text and "2 worker(s)" in text
    # without a simulation: the command that would run it, and 20 replicates' expected wall time
    assert "leafcv simulate" in text and "not been estimated" in text and "60.0 min of wall time" in text


def test_no_journal_says_the_cost_is_unknown(tmp_path):
    assert replicate_cost(tmp_path) is None
    assert "unknown" in selection_html(_run(tmp_path), Tables(tmp_path / "tables"))


def test_sbc_status_not_yet_run_names_the_script(tmp_path):
    assert read_validation(tmp_path / "validation.md") is None
    text = sbc_html(SimpleNamespace(manifest={}), None)
    assert "Not yet run" in text and "bench/sbc.py" in text


def test_validation_doc_written_by_the_sbc_script_is_read_back(tmp_path):
    from bench import sbc

    rng = np.random.default_rng(1)
    folder = tmp_path / "sbc"
    for r in range(30):
        path = sbc.rep_path(folder, "s1", r)
        path.parent.mkdir(parents=True, exist_ok=True)
        ranks = {"uniform quantity": int(rng.integers(0, 101)), "stuck quantity": 100}   # always the top rank
        path.write_text(json.dumps({"status": "ok", "ranks": ranks, "n_draws": 100, "structure": "s1",
                                    "replicate": r, "data": {"share_negative": 0.0},
                                    "diagnostics": {"divergences": 0, "max_rhat": 1.0, "grade": "converged"}}))
    sbc.rep_path(folder, "s1", 30).write_text(json.dumps({"status": "failed", "reason": "RuntimeError: no init",
                                                          "structure": "s1", "replicate": 30}))
    doc = tmp_path / "docs" / "validation.md"
    sbc.write_doc(folder, ("s1",), 31, "test settings", doc)
    v = read_validation(doc)
    assert v.version and v.date and v.settings == "test settings"
    assert "30 fitted of 31 planned, 1 could not be fitted" in v.replicates
    result = {r["quantity"]: r["result"] for r in v.rows}
    assert result == {"uniform quantity": "pass", "stuck quantity": "FAIL"}
    assert (doc.parent / "validation" / "sbc-s1.png").stat().st_size > 1000
    text = sbc_html(SimpleNamespace(manifest={"versions": {"leafcv": "0.0.0-other"}}), v)
    assert "1 of 2 checked quantities FAILED" in text and "stuck quantity (s1)" in text
    assert "this run used leafcv 0.0.0-other" in text


def test_the_report_has_the_section(written):
    _, _, html = written
    assert '<section id="reliability"><h2>How reliable is this choice?</h2>' in html
    assert "Prior sensitivity of the chosen structure" in html and "How reliable is this choice on a study like this one?" in html


def test_a_simulation_is_shown_in_place_of_its_cost(tmp_path):
    """With RUNDIR/simulation written by `leafcv simulate`, the part shows its shares, figure and tables."""
    _simulation(tmp_path, {"replicate": [1, 1, 2, 2], "structure": ["gen", "rival"] * 2, "delta_generating": [0, 6.0, 0, -1.0]},
                {"structure": ["gen", "rival"], "generating": [True, False], "replicates": [2, 2],
                 "share_first": [0.5, 0.5], "share_not_told_apart_from_first": [1.0, 0.5], "share_unranked": [0.0, 0.0],
                 "delta_q05": [0.0, -0.7], "delta_median": [0.0, 2.5], "delta_q95": [0.0, 5.6]}, 2)
    tables = Tables(tmp_path / "tables")
    text = selection_html(_run(tmp_path), tables)
    assert "2 replicate studies were drawn from the posterior of <b>gen</b>" in text
    assert "gen ranked first in 50 % of the replicate studies and was not told apart from the first (leafcv's rule) in 100 %" in text
    assert "not been estimated" not in text
    assert (tmp_path / "figures" / "simulation.png").exists() and (tmp_path / "tables" / "simulation_candidates.csv").exists()
    assert "b0[vcmax25]" in text


def test_replicates_in_which_the_generating_structure_was_not_ranked_are_said(tmp_path):
    # 4 replicates: gen first in 2, unranked (fits did not converge) in 1, ranked second in 1
    _simulation(tmp_path, {"replicate": [1, 1, 2, 2, 3, 3, 4, 4], "structure": ["gen", "rival"] * 4,
                           "ranked": [True, True, True, True, False, True, True, True],
                           "first": [True, False, True, False, False, True, False, True],
                           "why_not_ranked": ["", "", "", "", "fits did not converge", "", "", ""],
                           "delta_generating": [0, 6.0, 0, 5.0, 0, 1.0, 0, -1.0]},
                {"structure": ["gen", "rival"], "generating": [True, False], "replicates": [4, 4],
                 "share_first": [0.5, 0.5], "share_not_told_apart_from_first": [0.75, 0.5], "share_unranked": [0.25, 0.0],
                 "delta_q05": [0.0, -0.7], "delta_median": [0.0, 2.5], "delta_q95": [0.0, 5.6]}, 4)
    text = selection_html(_run(tmp_path), Tables(tmp_path / "tables"))
    assert ("It was not ranked in 1 of 4 replicates (fits did not converge: 1); each counts as a replicate it did "
            "not win. Among the 3 in which it was ranked, it ranked first in 2.") in text

