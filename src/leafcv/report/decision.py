"""The decision in words: the best structure, which others cannot be told apart from it, what the
stacking weights are and are not, and the question answered from one-term contrasts.

Every "told apart" here is leafcv's one decision rule, :func:`leafcv.ranking.told_apart` (through
:func:`leafcv.ranking.pair_verdict`), the same the ranking's warnings and sentences use: |Δelpd| < 4
nats (Sivula, Magnusson, Matamoros & Vehtari 2020), or within 2·sqrt(SE_diff² + MCSE_a² + MCSE_b²)
plus both structures' summed quadrature bounds (the factor 2: common practice, no source), or, with
fewer than 10 units, a difference that one unit's removal undoes, is not a preference. Contrasts
between any two ranked structures are paired over the per-unit elpd of pointwise.csv with the SE
``sqrt(G · var(d_g, ddof=1))`` (Vehtari, Gelman & Gabry 2017); each structure's MCSE and summed
quadrature bound are read from ranking.csv.

Tests: tests/report/test_report_decision.py, tests/report/test_report_page.py.
"""
from __future__ import annotations

import pandas as pd

from ..ranking import FEW_UNITS, SMALL_DIFF, overshadowing_notes, pair_verdict, summary_notes, units_word
from .html import Column, Tables, esc, number
from .run import RunFolder
from .terms import Terms, one_term_pairs


def contrasts(run: RunFolder, terms: dict[str, Terms]) -> pd.DataFrame:
    """Every pair of ranked structures differing in one term: the term in words, Δelpd (first −
    second, the first ranked higher), its SE, whether the two can be told apart and, if not, why."""
    names = list(run.ranked["structure"]) if run.pointwise is not None else []
    rows = []
    for a, b, words in one_term_pairs(names, terms):
        diff, se, verdict = pair_verdict(run.ranking, a, b, run.pointwise)
        rows.append({"first": a, "second": b, "difference": words, "elpd_diff": diff, "se_diff": se,
                     "told_apart": verdict.told_apart, "why_not": verdict.why()})
    return pd.DataFrame(rows, columns=["first", "second", "difference", "elpd_diff", "se_diff", "told_apart",
                                       "why_not"])


def per_unit_table(run: RunFolder) -> pd.DataFrame | None:
    """With fewer than FEW_UNITS units and two ranked structures: per unit, the elpd of the two leading
    structures, their difference, and the total difference without that unit; else None."""
    ranked = run.ranked
    pw = run.pointwise
    if pw is None or len(ranked) < 2 or len(pw) >= FEW_UNITS:
        return None
    a, b = str(ranked.iloc[0]["structure"]), str(ranked.iloc[1]["structure"])
    if f"elpd:{a}" not in pw or f"elpd:{b}" not in pw:
        return None
    d = pw[f"elpd:{a}"].to_numpy(float) - pw[f"elpd:{b}"].to_numpy(float)
    return pd.DataFrame({"unit": pw.iloc[:, 0].astype(str), f"elpd:{a}": pw[f"elpd:{a}"], f"elpd:{b}": pw[f"elpd:{b}"],
                         "difference": d, "difference_without_unit": d.sum() - d})


def _few_units_html(run: RunFolder, tables: Tables) -> str:
    table = per_unit_table(run)
    if table is None:
        return ""
    a, b = (c.removeprefix("elpd:") for c in table.columns[1:3])
    return (f"<p>With only {len(table)} {esc(units_word(run.unit))} the SE of a difference is unreliable. Per "
            f"{esc(run.unit)}, the two leading structures, their difference, and the total difference without that "
            f"{esc(run.unit)} (the leave-one-unit-out check of the decision rule: a lead is clear only if every value "
            f"of the last column keeps the sign of the total and is at least {SMALL_DIFF:g} nats):</p>"
            + tables.render("few_units", table, [
                Column("unit", run.unit), Column(f"elpd:{a}", f"elpd {a}", ".1f"), Column(f"elpd:{b}", f"elpd {b}", ".1f"),
                Column("difference", f"{a} − {b}", ".1f"),
                Column("difference_without_unit", "total difference without this unit", ".1f")],
                f"Per-{run.unit} elpd of the two leading structures (nats)."))


def decision_html(run: RunFolder, terms: dict[str, Terms], tables: Tables) -> str:
    """The section's HTML (and tables/contrasts.csv)."""
    parts: list[str] = []
    if run.missing or not run.finished:
        lacking = ", ".join(run.missing) if run.missing else "none missing, but the run has no finish time"
        parts.append(f'<div class="warn"><b>Unfinished run.</b> The manifest lists {len(run.structures)} structures; '
                     f"structures without a result: {esc(lacking)}. What follows covers only the finished "
                     "structures; run <code>leafcv compare</code> again to finish it.</div>")
    for note in run.notes:
        parts.append(f'<div class="warn">{esc(note)}.</div>')
    overshadowing = overshadowing_notes(run.ranking) if run.ranking is not None else []
    if run.ranking is None:
        parts.append("<p>No ranking has been written for this run yet (no ranking.csv).</p>")
        return "\n".join(parts)
    ranked = run.ranked
    units = units_word(run.unit)
    n_units = len(run.pointwise) if run.pointwise is not None else 0
    if ranked.empty:
        parts.append("<p><b>No structure could be ranked</b>: every structure's fits failed their diagnostics or "
                     "could not be scored reliably (see the ranking and the diagnostics).</p>")
    else:
        best = ranked.iloc[0]
        name = esc(best["structure"])
        lead = (f"{name} is the best among the reliably scored structures</b>: among them it predicts held-out "
                f"{units} best" if overshadowing else f"The best structure is {name}</b>: it predicts held-out {units} best")
        parts.append('<div class="box">' + "".join(f"<p><b>Announced first:</b> {esc(x)}</p>" for x in overshadowing)
                     + f"<p><b>{lead} (elpd {number(best['elpd'], '.1f')}, SE {number(best['se'], '.1f')}, over "
                     f"{n_units} {units}).</p>")
        close = []
        for _, r in ranked.iloc[1:].iterrows():
            _, se, verdict = pair_verdict(run.ranking, r["structure"], best["structure"], run.pointwise, n_units)
            if not verdict.told_apart:
                close.append((r, se, verdict))
        if len(ranked) == 1:
            parts.append("<p>It is the only ranked structure.</p>")
        elif close:
            listed = "; ".join(f"{esc(r['structure'])} (Δelpd {number(r['elpd_diff'], '.1f')} ± "
                               f"{number(se, '.1f')}: {esc(v.why())})" for r, se, v in close)
            parts.append(f"<p>Not told apart from it (leafcv's decision rule, see Methods): {listed}. The data do "
                         "not prefer one of these over the other; choose among them on other grounds (simplicity, "
                         "the question asked).</p>")
        else:
            parts.append(f"<p>Every other ranked structure is told apart from it: at least {SMALL_DIFF:g} nats "
                         "behind, beyond 2 SE of the difference widened by the Monte Carlo SEs and the summed "
                         "quadrature bounds (see Methods).</p>")
        weights = ", ".join(f"{esc(r['structure'])} {number(r['weight'], '.2f')}" for _, r in ranked.iterrows())
        parts.append(f"<p>Stacking weights: {weights}. They are the weights of the mix of the structures' predictive "
                     "distributions that best predicts a held-out leaf (Yao et al. 2018). They are <b>not</b> "
                     "posterior probabilities that a structure is true: structures that predict alike share "
                     "weight or one of them takes it all, and a structure with weight 0 can predict almost as "
                     "well as the best.</p></div>")
    if run.question:
        parts.append(f"<h3>The question</h3><p>The comparison file asks: <i>{esc(run.question)}</i></p>")
    else:
        parts.append("<h3>The question</h3><p>The comparison file states no question (neither a top-level "
                     "<code>question</code> key nor a comment line starting “Question”).</p>")
    table = contrasts(run, terms)
    if table.empty:
        missing_terms = [s for s in ranked["structure"] if s not in terms] if not ranked.empty else []
        why = (f" (the terms of {', '.join(missing_terms)} are not recorded in the run folder)" if missing_terms else "")
        parts.append(f"<p>No two ranked structures differ in exactly one term{esc(why)}, so the answer rests on "
                     "the ranking as a whole.</p>")
    else:
        parts.append("<p>Answered from the contrasts between ranked structures that differ in exactly one term "
                     f"(Δelpd = first − second, paired over the {n_units} {units}):</p><ul>")
        for _, r in table.iterrows():
            verdict = (f"told apart: {esc(r['first'] if r['elpd_diff'] > 0 else r['second'])} predicts better"
                       if r["told_apart"] else f"cannot be told apart ({esc(r['why_not'])})")
            parts.append(f"<li>{esc(r['difference'])}: Δelpd {number(r['elpd_diff'], '.1f')} ± "
                         f"{number(r['se_diff'], '.1f')} nats — {verdict}.</li>")
        parts.append("</ul>")
        shown = table.assign(told_apart=table["told_apart"].map({True: "yes", False: "no"}))
        parts.append(tables.render("contrasts", shown, [
            Column("first", "first"), Column("second", "second"), Column("difference", "the one term that differs"),
            Column("elpd_diff", "Δelpd (nats)", ".1f"), Column("se_diff", "SE_diff", ".1f"),
            Column("told_apart", "told apart"), Column("why_not", "why not")], "One-term contrasts."))
    parts.append(_few_units_html(run, tables))
    notes = summary_notes(run.ranking, n_units, run.unit, run.pointwise) if n_units else []
    if notes:
        parts.append("<h3>Notes from the ranking</h3><ul>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>")
    return "\n".join(parts)
