"""The decision in words: the best structure, which others cannot be told apart from it, what the
stacking weights are and are not, and the question answered from one-term contrasts.

"Cannot be told apart" follows leafcv's ranking: a difference smaller than 4 nats (Sivula,
Magnusson, Matamoros & Vehtari 2020) or within 2 SE of the difference (common practice, no source).
Contrasts between any two ranked structures are computed from the per-unit elpd of pointwise.csv
with the paired SE ``sqrt(G · var(d_g, ddof=1))``, as :mod:`leafcv.ranking` does for differences to
the best (Vehtari, Gelman & Gabry 2017).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..ranking import NOT_RANKED_PREFIX, SE_MULTIPLE, SMALL_DIFF, summary_notes, units_word
from .html import Column, Tables, esc, number
from .run import RunFolder
from .terms import Terms, one_term_pairs


def distinguishable(diff: float, se: float) -> bool:
    """Whether a difference can be told apart: |Δ| ≥ 4 nats and |Δ| ≥ 2 SE (NaN SE: cannot)."""
    return bool(abs(diff) >= SMALL_DIFF and np.isfinite(se) and abs(diff) >= SE_MULTIPLE * se)


def paired(pointwise: pd.DataFrame, a: str, b: str) -> tuple[float, float]:
    """Σ (elpd_a − elpd_b) over units and its paired SE (NaN with fewer than 2 units)."""
    d = pointwise[f"elpd:{a}"].to_numpy(float) - pointwise[f"elpd:{b}"].to_numpy(float)
    se = float(np.sqrt(d.size * np.var(d, ddof=1))) if d.size > 1 else float("nan")
    return float(np.sum(d)), se


def contrasts(run: RunFolder, terms: dict[str, Terms]) -> pd.DataFrame:
    """Every pair of ranked structures differing in one term: the term in words, Δelpd (first −
    second, the first ranked higher), its SE, and whether the two can be told apart."""
    names = list(run.ranked["structure"]) if run.pointwise is not None else []
    rows = []
    for a, b, words in one_term_pairs(names, terms):
        diff, se = paired(run.pointwise, a, b)
        rows.append({"first": a, "second": b, "difference": words, "elpd_diff": diff, "se_diff": se,
                     "told_apart": distinguishable(diff, se)})
    return pd.DataFrame(rows, columns=["first", "second", "difference", "elpd_diff", "se_diff", "told_apart"])


def _overshadowed(run: RunFolder) -> list[str]:
    """Sentences for unranked structures that scored clearly above the best ranked one."""
    out = []
    for _, r in run.unranked.iterrows():
        d, se = float(r["elpd_diff"]), float(r["se_diff"])
        if np.isfinite(d) and d > 0 and d > SE_MULTIPLE * (se if np.isfinite(se) else 0.0):
            reason = str(r["warnings"]).split("; ")[0].removeprefix(NOT_RANKED_PREFIX) or "reason not stored"
            out.append(f"{esc(r['structure'])} scored {number(d, '.1f')} nats above the best ranked structure "
                       f"(SE {number(se, '.1f')}) but is not ranked ({esc(reason)}): neither it nor the best ranked "
                       "structure can be recommended without a refit.")
    return out


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
    for sentence in _overshadowed(run):
        parts.append(f'<div class="warn"><b>Announced first:</b> {sentence}</div>')
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
        word = "best ranked structure" if _overshadowed(run) else "best structure"
        among = " among the ranked structures" if _overshadowed(run) else ""
        parts.append(f'<div class="box"><p><b>The {word} is {esc(best["structure"])}</b>: it predicts '
                     f"held-out {units} best{among} (elpd {number(best['elpd'], '.1f')}, SE "
                     f"{number(best['se'], '.1f')}, over {n_units} {units}).</p>")
        close = [r for _, r in ranked.iloc[1:].iterrows() if not distinguishable(r["elpd_diff"], r["se_diff"])]
        if len(ranked) == 1:
            parts.append("<p>It is the only ranked structure.</p>")
        elif close:
            listed = "; ".join(f"{esc(r['structure'])} (Δelpd {number(r['elpd_diff'], '.1f')} ± "
                               f"{number(r['se_diff'], '.1f')})" for r in close)
            parts.append(f"<p>Not distinguishable from it (within {SE_MULTIPLE:g} SE of the difference or "
                         f"{SMALL_DIFF:g} nats): {listed}. The data do not prefer one of these over the other; "
                         "choose among them on other grounds (simplicity, the question asked).</p>")
        else:
            parts.append(f"<p>Every other ranked structure is more than {SMALL_DIFF:g} nats and more than "
                         f"{SE_MULTIPLE:g} SE of the difference behind it.</p>")
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
                       if r["told_apart"] else "cannot be told apart")
            parts.append(f"<li>{esc(r['difference'])}: Δelpd {number(r['elpd_diff'], '.1f')} ± "
                         f"{number(r['se_diff'], '.1f')} nats — {verdict}.</li>")
        parts.append("</ul>")
        shown = table.assign(told_apart=table["told_apart"].map({True: "yes", False: "no"}))
        parts.append(tables.render("contrasts", shown, [
            Column("first", "first"), Column("second", "second"), Column("difference", "the one term that differs"),
            Column("elpd_diff", "Δelpd (nats)", ".1f"), Column("se_diff", "SE_diff", ".1f"),
            Column("told_apart", "told apart")], "One-term contrasts."))
    notes = summary_notes(run.ranking, n_units, run.unit) if n_units else []
    if notes:
        parts.append("<h3>Notes from the ranking</h3><ul>" + "".join(f"<li>{esc(n)}</li>" for n in notes) + "</ul>")
    return "\n".join(parts)
