"""write_report: the run folder's report.html, figures/ and tables/.

Sections, in order: the decision in words; the ranking figure and table; which leaves decide it;
held-out predictions; what the chosen structure estimates; how reliable the choice is (prior sensitivity,
calibration of the program, selection reliability); diagnostics; priors and model options; methods text and
references; reproduction. Reads only the run folder (through `leafcv.report.run`; the comparison and
data files only for a folder written before study.json existed, and for the prior sensitivity, which
refits nothing but needs the data, `leafcv.manifest.run_inputs`); runs no sampler.

Tests: tests/report/test_report_page.py, tests/report/test_compare_writes_report.py,
tests/report/test_report_estimates.py, tests/sampling/test_report.py.
"""
from __future__ import annotations

import logging
import time
from pathlib import Path

import pandas as pd

from ..errors import UserInputError
from ..ranking import SMALL_DIFF, units_word
from . import figures
from .decision import decision_html
from .diagnostics import diagnostics_html, thresholds
from .estimates import labelled, leaf_table, population_table
from .files import write_text
from .html import Column, Tables, esc, figure, number, page
from .methods import methods_html, priors_html, reproduction_html
from .predictions import predictions_html
from .reliability import reliability_html
from .run import RunFolder, leaf_groups, load_run
from .terms import structure_terms
from ..data.dataset import LEAF_TERM

log = logging.getLogger("leafcv")


def _ranking_html(run: RunFolder, tables: Tables) -> str:
    if run.ranking is None:
        return "<p>No ranking.csv in the run folder yet.</p>"
    data = figures.ranking_data(run.ranking)
    fig = figures.ranking_figure(data, SMALL_DIFF)
    b64 = figures.save(fig, data, "ranking", run.paths.figures, tables.figures)
    caption = ("Δelpd of each structure against the best (nats; 0 = the best), with ±1 SE (thick) and ±2 SE (thin) "
               "of the paired difference; shaded: within 4 nats of the best. Structures not ranked are shown apart "
               "in grey with the reason.")
    parts = [figure(b64, "ranking", "Ranking of the structures by elpd difference to the best", caption)]
    table = run.ranking.copy()
    table["grade"] = [("yes" if c else "marginal") if pd.notna(r) else ("NO" if str(w).startswith("not ranked: fits")
                      else "not scored") for c, r, w in zip(table["converged"], table["rank"], table["warnings"])]
    cols = [Column("rank", "rank", ".0f"), Column("structure", "structure"), Column("elpd", "elpd", ".1f"),
            Column("se", "SE", ".1f"), Column("elpd_diff", "Δelpd", ".1f"), Column("se_diff", "SE_diff", ".1f"),
            Column("weight", "weight", ".2f"), Column("mcse", "MCSE", ".2f"),
            *([Column("quad_bound", "quad. bound", ".2f")] if "quad_bound" in table else []), Column("rmse", "RMSE", ".3g"),
            Column("r2", "R²", ".3g"),
            Column("n_refits", "refits", ".0f"), Column("max_khat", "max k̂", ".2f"), Column("grade", "converged")]
    parts.append(tables.render("ranking", table, cols,
                               "The ranking (ranking.csv): elpd in nats; RMSE (µmol m⁻² s⁻¹) and R² of held-out "
                               "predictions of all points (per curve type in the CSV); quad. bound: the structure's summed "
                               "per-unit quadrature bounds (nats); max k̂ over units scored by PSIS."))
    warned = [(s, w) for s, w in zip(table["structure"], table["warnings"]) if w]
    if warned:
        parts.append("<p>Warnings:</p><ul>" + "".join(f"<li><b>{esc(s)}</b>: {esc(w)}</li>" for s, w in warned)
                     + "</ul>")
    return "\n".join(parts)


def _leaves_html(run: RunFolder, tables: Tables, group: str | None) -> str:
    ranked = run.ranked
    if run.pointwise is None or len(ranked) < 2:
        return "<p>Fewer than two ranked structures: there is no contrast to break down by leaf.</p>"
    best, others = str(ranked.iloc[0]["structure"]), [str(s) for s in ranked["structure"].iloc[1:3]]
    units = units_word(run.unit)
    groups, columns, where = leaf_groups(run) if run.unit == LEAF_TERM else (None, [], "")
    if group is not None and group not in columns:
        raise UserInputError(str(run.path), [f"--group {group!r} is not a group column of this run's data; "
                                             f"valid: {', '.join(columns) or 'none'}"])
    group = group or (columns[0] if columns and groups is not None else None)
    data = figures.leaves_data(run.pointwise, run.unit, best, others, groups, group)
    fig = figures.leaves_figure(data, run.unit, group)
    b64 = figures.save(fig, data, "leaves", run.paths.figures, tables.figures)
    note = (f"Coloured by {esc(group)} ({esc(where)})." if group else
            (f"Not grouped: {esc(where)}." if where else "Not grouped."))
    parts = [f"<p>Per-unit Δelpd = elpd({esc(best)}) − elpd(other), for the next "
             f"{'two' if len(others) == 2 else 'one'} in the ranking; above zero, {esc(best)} predicts that unit's "
             f"points better. The bars of a panel sum to the total difference. {note}</p>",
             figure(b64, "leaves", "Per-leaf elpd differences", f"Which {units} decide the ranking.")]
    top = data[data["labelled"]]
    for other in others:
        t = top[top["other"] == other].reindex(top[top["other"] == other]["delta"].abs().sort_values(ascending=False).index)
        listed = ", ".join(f"{esc(r[run.unit])} ({number(r['delta'], '+.1f')})" for _, r in t.iterrows())
        parts.append(f"<p>Largest |Δ| against {esc(other)}: {listed}.</p>")
    if group:
        by = data.groupby(["other", "group"], sort=True)["delta"].agg(["sum", "count"]).reset_index()
        by.columns = ["other", group, "delta_sum", "units"]
        parts.append(tables.render("leaves_by_group", by, [
            Column("other", "against"), Column(group, group), Column("units", units, ".0f"),
            Column("delta_sum", "Σ Δelpd (nats)", ".1f")],
            f"Per-unit differences summed within each level of {esc(group)}."))
    return "\n".join(parts)


def _estimates_html(run: RunFolder, tables: Tables, structure: str | None) -> tuple[str, str]:
    chosen = structure or run.best
    if chosen is None:
        return "What the chosen structure estimates", "<p>No structure is ranked and none was chosen.</p>"
    title = f"What {chosen} estimates"
    path = run.paths.fit(chosen)
    why = "chosen with --structure" if structure else "the best ranked structure"
    if not path.exists():
        return title, f"<p>{esc(chosen)} ({why}) has no saved fit (fits/{esc(chosen)}.nc).</p>"
    from ..cv.arviz_bridge import open_fit

    idata = open_fit(path)
    ok, reason = labelled(idata)
    if not ok:
        return title, (f"<p>{esc(chosen)} ({why}): no estimates are shown because its saved fit "
                       f"fits/{esc(chosen)}.nc cannot be read by meaning: {esc(reason)}.</p>")
    pop = population_table(idata)
    parts = [f"<p>{esc(chosen)} ({why}), from its fit to all data (fits/{esc(chosen)}.nc). Medians with 90 % "
             "intervals (5 % and 95 % posterior quantiles). Intercepts are at the reference traits (the centring "
             "values) and reference levels; × is the multiplicative change of a parameter on a log link, an odds "
             "ratio the change on a logit link; SDs are on the link scale (on the log scale an SD of s means "
             "leaves typically differ by a factor of about exp(s)).</p>"]
    num = [Column("median", "median", ".3g"), Column("q05", "5 %", ".3g"), Column("q95", "95 %", ".3g")]
    parts.append(tables.render("population_estimates", pop,
                               [Column("quantity", "quantity"), Column("scale", "scale"), *num],
                               "Population-level estimates."))
    leaves = leaf_table(idata)
    if leaves is None:
        parts.append("<p>The fit has no per-leaf values (leaf_value), so no per-leaf table.</p>")
    else:
        params = [c for c in leaves.columns if c != "leaf" and not c.endswith(("_q05", "_q95"))]
        groups, columns, _ = leaf_groups(run)
        cols = [Column("leaf", "leaf")]
        if groups is not None and columns:
            leaves = groups.merge(leaves, on="leaf", how="right")[["leaf", *columns, *leaves.columns[1:]]]
            cols += [Column(g, g) for g in columns]
        for p in params:
            cols += [Column(p, p, ".3g"), Column(f"{p}_q05", "5 %", ".3g"), Column(f"{p}_q95", "95 %", ".3g")]
        parts.append(tables.render("leaf_estimates", leaves, cols,
                                   "Per-leaf values on the natural scale (Vcmax25, Jmax25, Rd25 in µmol m⁻² s⁻¹; "
                                   "α in mol mol⁻¹; θ dimensionless), medians and 90 % intervals."))
    return title, "\n".join(parts)


def _diagnostics_section(run: RunFolder, tables: Tables) -> str:
    if run.pointwise is None:
        return diagnostics_html(run, tables, "<p>No pointwise.csv: no k̂ per unit.</p>")
    names = [s for s in run.results if f"khat:{s}" in run.pointwise]
    psis = {s: run.results[s].get("details", {}).get("psis_khat") for s in names}
    data = figures.khat_data(run.pointwise, run.unit, names, thresholds(run), {s: k for s, k in psis.items() if k})
    b64 = figures.save(figures.khat_figure(data, run.unit), data, "khat", run.paths.figures, tables.figures)
    html = figure(b64, "khat", "Pareto k-hat per unit and structure",
                  "Pareto k̂ of each unit's PSIS estimate (Vehtari et al. 2024); above the threshold the unit was "
                  "refitted exactly (hollow: the PSIS k̂ of a refitted unit, where the run kept it).")
    return diagnostics_html(run, tables, html)


def _remove_stale(folder: Path, written: list[str]) -> None:
    """Remove the CSV, PNG and SVG files of an earlier report that this one did not write again (a
    table or figure of another structure must not stay beside the new ones)."""
    if folder.is_dir():
        for path in folder.iterdir():
            if path.suffix in (".csv", ".png", ".svg") and path.name not in written:
                path.unlink()


def write_report(rundir: str | Path, structure: str | None = None, group: str | None = None) -> Path:
    """Write ``RUNDIR/report.html``, ``RUNDIR/figures/`` and ``RUNDIR/tables/`` from a run folder.

    Parameters
    ----------
    rundir
        A run folder written by ``leafcv compare`` (finished or not).
    structure
        The structure whose estimates are shown (default: the best ranked one).
    group
        The group column the per-leaf differences are coloured by (default: the first group column
        of the data).

    Returns
    -------
    pathlib.Path
        The path of report.html.

    Raises
    ------
    UserInputError
        When the folder has no manifest, or ``structure`` or ``group`` is not one of the run's.
    """
    start = time.perf_counter()
    run = load_run(Path(rundir))
    if structure is not None and structure not in run.structures:
        raise UserInputError(str(run.path), [f"no structure {structure!r} in this run; valid: {', '.join(run.structures)}"])
    tables = Tables(run.paths.tables)
    terms = structure_terms(run.manifest)
    title, estimates = _estimates_html(run, tables, structure)
    sections = [
        ("decision", "The decision in words", decision_html(run, terms, tables)),
        ("ranking", "Ranking", _ranking_html(run, tables)),
        ("leaves", "Which leaves decide it", _leaves_html(run, tables, group)),
        ("predictions", "Held-out predictions", predictions_html(run, tables)),
        ("estimates", title, estimates),
        ("reliability", "How reliable is this choice?", reliability_html(run, tables, structure)),
        ("diagnostics", "Diagnostics", _diagnostics_section(run, tables)),
        ("priors", "Priors and model options", priors_html(run, tables)),
        ("methods", "Methods text", methods_html(run)),
        ("reproduction", "Reproduction", reproduction_html(run, tables)),
    ]
    status = f"finished {run.manifest['finished']}" if run.finished else "NOT FINISHED"
    subtitle = (f"Run folder {esc(run.path)}; comparison {esc(run.manifest.get('comparison', '?'))}; "
                f"{len(run.results)} of {len(run.structures)} structures scored; {esc(status)}. "
                "Written by leafcv report from the run folder alone.")
    _remove_stale(run.paths.tables, tables.written)
    _remove_stale(run.paths.figures, tables.figures)
    path = run.paths.report
    write_text(path, page("leafcv report: which structure predicts new leaves best", subtitle, sections))
    log.info("report written to %s (%.0f kB, %.1f s)", path, path.stat().st_size / 1024, time.perf_counter() - start)
    return path
