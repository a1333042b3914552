"""Diagnostics of every fit that fed every score, and the accuracy of the scores: sampler
diagnostics and retries per fit, spot checks of PSIS against exact refits, Pareto k-hat per unit,
Monte Carlo error and quadrature accuracy per structure. Everything comes from results/*.json."""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..cv.result import khat_threshold
from .html import Column, Tables, esc
from ..jsonio import json_float, json_floats
from .run import RunFolder

FIT_COLUMNS = ["structure", "role", "attempt", "seed", "used", "chains", "warmup", "draws", "adapt_delta",
               "max_rhat", "min_ess_bulk", "min_ess_tail", "divergences", "treedepth_hits", "min_ebfmi",
               "grade", "retry_cause", "problems", "seconds"]


def fits_table(run: RunFolder) -> pd.DataFrame:
    """One row per fit made (full data, refits, folds; every attempt) with its diagnostics.

    ``used`` is "yes" for the attempt whose draws fed the score, "retried" for an earlier attempt
    of such a fit, "spot check" for a spot-check refit that agreed with PSIS (recorded, not scored).
    """
    rows = []
    for name, res in run.results.items():
        for f in res.get("details", {}).get("fits", []):
            contributes, kept = f.get("contributes", True), f.get("kept", True)
            used = "yes" if contributes and kept else ("retried" if contributes else "spot check")
            rows.append({"structure": name, "role": f.get("role", ""), "attempt": f.get("attempt"),
                         "seed": f.get("seed"), "used": used, "chains": f.get("chains"), "warmup": f.get("warmup"),
                         "draws": f.get("draws"), "adapt_delta": f.get("adapt_delta"),
                         "max_rhat": json_float(f.get("max_rhat")), "min_ess_bulk": json_float(f.get("min_ess_bulk")),
                         "min_ess_tail": json_float(f.get("min_ess_tail")), "divergences": f.get("divergences"),
                         "treedepth_hits": f.get("treedepth_hits"), "min_ebfmi": json_float(f.get("min_ebfmi")),
                         "grade": f.get("grade", ""), "retry_cause": f.get("retry_cause", ""),
                         "problems": "; ".join(f.get("problems", [])), "seconds": json_float(f.get("seconds"))})
    return pd.DataFrame(rows, columns=FIT_COLUMNS)


def scoring_table(run: RunFolder) -> pd.DataFrame:
    """Per structure: grade, draws, fits, accuracy of its score (MCSE, quadrature) and times."""
    rows = []
    mcse = dict(zip(run.ranking["structure"], run.ranking["mcse"])) if run.ranking is not None else {}
    for name, res in run.results.items():
        det = res.get("details", {})
        fits = det.get("fits", [])
        used = [f for f in fits if f.get("contributes", True) and f.get("kept", True)]
        n = len(res.get("leaves", []))
        mcse_i = json_floats(res.get("mcse_i"), n)
        bound = json_floats(res.get("quad_bound_i"), n)
        rows.append({
            "structure": name, "method": res.get("method", ""), "grade": res.get("grade", ""),
            "n_draws": res.get("n_draws"), "fits_made": len(fits), "fits_used": len(used),
            "retries": sum(1 for f in fits if int(f.get("attempt", 1)) > 1),
            "n_refits": res.get("n_refits"), "max_rhat": _worst(used, "max_rhat", max),
            "min_ess_bulk": _worst(used, "min_ess_bulk", min), "min_ess_tail": _worst(used, "min_ess_tail", min),
            "divergences": sum(int(f.get("divergences") or 0) for f in used),
            "treedepth_hits": sum(int(f.get("treedepth_hits") or 0) for f in used),
            "min_ebfmi": _worst(used, "min_ebfmi", min), "mcse": float(mcse.get(name, np.nan)),
            "max_mcse_i": float(np.nanmax(mcse_i)) if np.isfinite(mcse_i).any() else np.nan,
            "max_quad_bound": float(np.nanmax(bound)) if np.isfinite(bound).any() else np.nan,
            "escalated_cells": det.get("escalated_cells"), "brute_force_cells": det.get("brute_force_cells"),
            "unresolved_cells": det.get("unresolved_cells"), "unresolved": ", ".join(det.get("unresolved", [])),
            "full_fit_seconds": json_float(det.get("full_fit_seconds")),
            "quadrature_seconds": json_float(det.get("quadrature_seconds")),
            "refit_seconds": json_float(det.get("refit_seconds")),
        })
    return pd.DataFrame(rows)


def _worst(fits: list[dict], key: str, pick) -> float:
    values = [json_float(f.get(key)) for f in fits]
    values = [v for v in values if np.isfinite(v)]
    return float(pick(values)) if values else float("nan")


def spot_table(run: RunFolder) -> pd.DataFrame:
    rows = []
    for name, res in run.results.items():
        for s in res.get("details", {}).get("spot_checks", []):
            rows.append({"structure": name, "leaf": s.get("leaf"), "khat": json_float(s.get("khat")),
                         "elpd_psis": json_float(s.get("elpd_psis", s.get("elpd_auto"))),
                         "mcse_psis": json_float(s.get("mcse_psis")), "elpd_exact": json_float(s.get("elpd_exact")),
                         "mcse_exact": json_float(s.get("mcse_exact")), "bound_psis": json_float(s.get("bound_psis")),
                         "bound_exact": json_float(s.get("bound_exact")), "tolerance": json_float(s.get("tolerance")),
                         "agrees": "no: exact value used" if s.get("disagree") else "yes",
                         "refit_grade": s.get("refit_grade", "")})
    return pd.DataFrame(rows, columns=["structure", "leaf", "khat", "elpd_psis", "mcse_psis", "elpd_exact",
                                       "mcse_exact", "bound_psis", "bound_exact", "tolerance", "agrees", "refit_grade"])


def thresholds(run: RunFolder) -> dict[str, float]:
    """The k-hat threshold min(1 − 1/log10 S, 0.7) of each structure's draws (Vehtari et al. 2024)."""
    out = {}
    for name, res in run.results.items():
        s = res.get("n_draws")
        out[name] = khat_threshold(int(s)) if s and int(s) >= 2 else float("nan")
    return out


def diagnostics_html(run: RunFolder, tables: Tables, khat_figure_html: str) -> str:
    """The section's HTML (tables/scoring.csv, fits.csv, spot_checks.csv)."""
    parts = []
    grades = run.manifest.get("grades", {})
    if grades:
        parts.append("<p>Every fit is graded (the grade of a structure is the worst grade of the fits that fed its "
                     "score):</p><ul>" + "".join(f"<li><b>{esc(k)}</b>: {esc(v)}</li>" for k, v in grades.items())
                     + "</ul>")
    if run.missing:
        parts.append(f"<p>No diagnostics for the structures without a result: {esc(', '.join(run.missing))}.</p>")
    scoring = scoring_table(run)
    if not scoring.empty:
        parts.append("<h3>Per structure: the fits that fed its score</h3>")
        sampler = ["structure", "method", "grade", "n_draws", "fits_used", "fits_made", "retries", "max_rhat",
                   "min_ess_bulk", "min_ess_tail", "divergences", "treedepth_hits", "min_ebfmi"]
        parts.append(tables.render("scoring_fits", scoring[sampler], [
            Column("structure", "structure"), Column("grade", "grade"),
            Column("n_draws", "draws", ".0f"), Column("fits_used", "fits used", ".0f"),
            Column("retries", "retries", ".0f"),
            Column("max_rhat", "max R-hat", ".3f"), Column("min_ess_bulk", "min ESS bulk", ".0f"),
            Column("min_ess_tail", "min ESS tail", ".0f"), Column("divergences", "divergences", ".0f"),
            Column("treedepth_hits", "tree-depth hits", ".0f"), Column("min_ebfmi", "min E-BFMI", ".2f")],
            "R-hat (max), ESS (min), divergences and tree-depth hits (sums) and E-BFMI (min) over the fits whose "
            "draws fed the score; draws: the posterior draws behind each score."))
        parts.append("<h3>Per structure: accuracy of the score</h3>")
        accuracy = ["structure", "n_refits", "mcse", "max_mcse_i", "max_quad_bound", "escalated_cells",
                    "brute_force_cells", "unresolved_cells", "unresolved", "full_fit_seconds", "quadrature_seconds",
                    "refit_seconds"]
        parts.append(tables.render("scoring_accuracy", scoring[accuracy], [
            Column("structure", "structure"), Column("n_refits", "exact refits", ".0f"),
            Column("mcse", "MCSE of elpd", ".2f"), Column("max_mcse_i", "max MCSE of a unit", ".2f"),
            Column("max_quad_bound", "max quadrature bound", ".2g"),
            Column("escalated_cells", "escalated cells", ".0f"), Column("brute_force_cells", "brute-force cells", ".0f"),
            Column("unresolved_cells", "unresolved cells", ".0f"), Column("unresolved", "units beyond tolerance")],
            "Monte Carlo SE (nats) of the structure's elpd and the largest of a single unit's; the largest bound on "
            "a unit's quadrature error (nats); quadrature cells (leaf × draw) escalated to finer rules, to the "
            "brute-force rule, and whose rules never agreed (wall times and the method in the CSV)."))
    fits = fits_table(run)
    if not fits.empty:
        parts.append("<h3>Every fit</h3><p>Full-data fits, exact refits and folds, every attempt, with the cause of "
                     "each retry. <i>used</i>: yes = its draws fed a score; retried = an earlier attempt of such a "
                     "fit; spot check = a refit that agreed with PSIS, recorded only.</p>")
        parts.append(tables.render("fits", fits, [
            Column("structure", "structure"), Column("role", "fit"), Column("attempt", "attempt", ".0f"),
            Column("seed", "seed", ".0f"), Column("used", "used"),
            Column("draws", "draws per chain", ".0f"), Column("max_rhat", "max R-hat", ".3f"),
            Column("min_ess_bulk", "ESS bulk", ".0f"), Column("min_ess_tail", "ESS tail", ".0f"),
            Column("divergences", "div.", ".0f"), Column("treedepth_hits", "tree-depth hits", ".0f"),
            Column("min_ebfmi", "E-BFMI", ".2f"), Column("grade", "grade")],
            "Sampler diagnostics per fit (chains, warm-up, adapt_delta, the problems found and the retry causes "
            "are in the CSV)."))
        retried = fits[fits["retry_cause"].astype(bool)]
        if not retried.empty:
            parts.append("<p>Retries and their causes:</p><ul>" + "".join(
                f"<li>{esc(r['structure'])}, {esc(r['role'])}, attempt {r['attempt']}: {esc(r['retry_cause'])}</li>"
                for _, r in retried.iterrows()) + "</ul>")
    spots = spot_table(run)
    if not spots.empty:
        parts.append("<h3>Spot checks: PSIS against exact refits</h3>")
        parts.append(tables.render("spot_checks", spots, [
            Column("structure", "structure"), Column("leaf", "unit"), Column("khat", "k̂", ".2f"),
            Column("elpd_psis", "PSIS elpd", ".2f"), Column("mcse_psis", "MCSE", ".2f"),
            Column("elpd_exact", "exact elpd", ".2f"), Column("mcse_exact", "MCSE", ".2f"),
            Column("bound_psis", "bound (PSIS)", ".3f"), Column("bound_exact", "bound (exact)", ".3f"),
            Column("tolerance", "tolerance", ".2f"), Column("agrees", "agrees")],
            "Units chosen at random (seeded) among those not flagged by k̂; a disagreement beyond the tolerance, "
            "max(0.1 nats, 3 × the combined MCSE) plus both values' quadrature bounds, replaces the PSIS value by "
            "the exact one."))
    parts.append("<h3>Pareto k̂ per unit</h3>" + khat_figure_html)
    warned = [(n, r.get("warnings", []), r.get("details", {}).get("notes", [])) for n, r in run.results.items()]
    lines = [f"<li><b>{esc(n)}</b>: {esc('; '.join(dict.fromkeys([*w, *nt])))}</li>" for n, w, nt in warned if w or nt]
    if lines:
        parts.append("<h3>Warnings and notes of each structure</h3><ul>" + "".join(lines) + "</ul>")
    return "\n".join(parts)
