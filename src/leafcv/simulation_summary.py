"""What a simulation (`leafcv.simulate`) says: its replicates' rankings and fits summed up, as CSV.

This module reads a simulation (its folder, the fits' population draws) and never imports `leafcv.simulate`,
which writes one; the report reads simulations through it.

Written into the simulation's folder:
- ``replicates.csv``: one row per (replicate, candidate): rank (why not, when unranked), elpd, Δelpd to the replicate's first
  structure and whether leafcv's rule tells them apart (`leafcv.ranking.pair_verdict`), and Δelpd of
  the generating structure minus the candidate with its paired SE;
- ``candidates.csv``: per candidate, how often it ranked first, how often it was not told apart from
  the first (the first itself included), and the 5 %, 50 % and 95 % points of Δelpd (generating minus
  candidate) over the replicates;
- ``coverage.csv``: per population quantity of the generating structure, how often its 90 % central
  posterior interval in a replicate's fit held the value the replicate was drawn from.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from .ranking import NOT_RANKED_PREFIX, pair_verdict
from .runfolder import RunPaths, is_finished, read_pointwise, read_ranking

REPLICATES_FILE = "replicates.csv"
CANDIDATES_FILE = "candidates.csv"
COVERAGE_FILE = "coverage.csv"

#: The folder of a simulation inside the run folder, by default.
FOLDER = "simulation"
#: Population quantities whose intervals are checked for coverage, in the fit file's names.
POPULATION = ("b0", "beta", "tau", "tau_leaf", "sigma", "nu")
#: The central posterior interval whose coverage is counted.
INTERVAL = 0.90


def posterior_draws(fit_path: Path) -> tuple[dict[str, np.ndarray], dict[str, list[str]]]:
    """Draws of a saved fit flattened over chains (name -> (S, ...)) and, for each population
    quantity, the labels of its entries (from the file's coordinates)."""
    import xarray as xr

    with xr.open_dataset(fit_path, group="posterior", engine="h5netcdf") as post:
        draws = {k: post[k].values.reshape((-1,) + post[k].shape[2:]) for k in post.data_vars}
        labels = {}
        for name in POPULATION:
            if name in post.data_vars:
                dims = [d for d in post[name].dims if d not in ("chain", "draw")]
                labels[name] = ([f"{name}[{v}]" for v in post[name][dims[0]].values.astype(str)] if dims
                                else [name])
    return draws, labels


def why_not_ranked(warnings) -> str:
    """The reason a ranking row gives for leaving a structure unranked: the clause after
    `leafcv.ranking.NOT_RANKED_PREFIX` in its warnings (e.g. "fits did not converge"), or "not stated"."""
    text = str(warnings) if isinstance(warnings, str) else ""
    if NOT_RANKED_PREFIX not in text:
        return "not stated"
    return text.split(NOT_RANKED_PREFIX, 1)[1].split(";", 1)[0].strip() or "not stated"


def _replicate_rows(k: int, run: Path, generating: str) -> list[dict]:
    paths = RunPaths(run)
    table = read_ranking(paths.ranking)
    pointwise = read_pointwise(paths.pointwise) if paths.pointwise.exists() else None
    ranked = table[table["rank"].notna()]
    first = str(ranked.iloc[0]["structure"]) if not ranked.empty else None
    rows = []
    for _, row in table.iterrows():
        name = str(row["structure"])
        out = {"replicate": k, "structure": name, "rank": row["rank"], "elpd": float(row["elpd"]),
               "first": first == name, "ranked": bool(pd.notna(row["rank"])),
               "why_not_ranked": "" if pd.notna(row["rank"]) else why_not_ranked(row.get("warnings"))}
        if first is not None and name != first:
            diff, se, verdict = pair_verdict(table, name, first, pointwise)
            out.update({"diff_to_first": diff, "se_to_first": se, "told_apart_from_first": verdict.told_apart})
        else:
            out.update({"diff_to_first": 0.0 if first else np.nan, "se_to_first": np.nan,
                        "told_apart_from_first": False})
        if pointwise is not None and f"elpd:{generating}" in pointwise and f"elpd:{name}" in pointwise:
            d = pointwise[f"elpd:{generating}"].to_numpy(float) - pointwise[f"elpd:{name}"].to_numpy(float)
            out["delta_generating"] = float(np.sum(d))
            out["se_delta_generating"] = float(np.sqrt(d.size * np.var(d, ddof=1))) if d.size > 1 else np.nan
        else:
            out["delta_generating"] = out["se_delta_generating"] = np.nan
        rows.append(out)
    return rows


def _coverage_rows(k: int, run: Path, generating: str, truth: dict[str, float], interval: float) -> list[dict]:
    fit = RunPaths(run).fit(generating)
    if not fit.exists():
        return []
    draws, labels = posterior_draws(fit)
    lo, hi = (1 - interval) / 2, 1 - (1 - interval) / 2
    rows = []
    for name, labs in labels.items():
        values = draws[name].reshape(len(draws[name]), -1)
        for j, lab in enumerate(labs):
            if lab not in truth:
                continue
            q_lo, q_hi = np.quantile(values[:, j], [lo, hi])
            rows.append({"replicate": k, "quantity": lab, "true": truth[lab], "q_lo": float(q_lo),
                         "q_hi": float(q_hi), "covered": bool(q_lo <= truth[lab] <= q_hi)})
    return rows


def summarise(folder: str | Path) -> dict[str, pd.DataFrame]:
    """Sum up the finished replicates of the simulation in ``folder``; write and return the tables."""
    folder = Path(folder)
    settings = json.loads((folder / "settings.json").read_text())
    generating = settings["structure"]
    reps, cover = [], []
    for rep in sorted(folder.glob("replicate-*")):
        run = rep / "run"
        if not is_finished(run):
            continue
        k = int(rep.name.split("-")[1])
        truth = json.loads((rep / "truth.json").read_text())["values"]
        reps += _replicate_rows(k, run, generating)
        cover += _coverage_rows(k, run, generating, truth, INTERVAL)
    replicates = pd.DataFrame(reps, columns=["replicate", "structure", "rank", "elpd", "first", "ranked",
                                             "why_not_ranked", "diff_to_first", "se_to_first", "told_apart_from_first",
                                             "delta_generating", "se_delta_generating"])
    n = replicates["replicate"].nunique()
    cands = []
    for name, g in replicates.groupby("structure", sort=False):
        d = g["delta_generating"].to_numpy(float)
        d = d[np.isfinite(d)]
        cands.append({"structure": name, "generating": name == generating, "replicates": len(g),
                      "share_first": float(g["first"].mean()),
                      "share_not_told_apart_from_first": float((g["ranked"] & ~g["told_apart_from_first"].astype(bool)).mean()),
                      "share_unranked": float((~g["ranked"].astype(bool)).mean()),
                      "delta_q05": float(np.quantile(d, 0.05)) if d.size else np.nan,
                      "delta_median": float(np.median(d)) if d.size else np.nan,
                      "delta_q95": float(np.quantile(d, 0.95)) if d.size else np.nan})
    candidates = pd.DataFrame(cands, columns=["structure", "generating", "replicates", "share_first",
                                              "share_not_told_apart_from_first", "share_unranked", "delta_q05",
                                              "delta_median", "delta_q95"])
    coverage_rows = pd.DataFrame(cover, columns=["replicate", "quantity", "true", "q_lo", "q_hi", "covered"])
    coverage = (coverage_rows.groupby("quantity", sort=False)["covered"].agg(["mean", "size"]).reset_index()
                .rename(columns={"mean": "coverage", "size": "replicates"}))
    replicates.to_csv(folder / REPLICATES_FILE, index=False)
    candidates.to_csv(folder / CANDIDATES_FILE, index=False)
    coverage.to_csv(folder / COVERAGE_FILE, index=False)
    (folder / "coverage_by_replicate.csv").write_text(coverage_rows.to_csv(index=False))
    return {"replicates": replicates, "candidates": candidates, "coverage": coverage, "n_replicates": n}
