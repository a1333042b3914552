"""The simulation part of "How reliable is this choice?": what `leafcv simulate` found (read from
``RUNDIR/simulation``, written by `leafcv.simulation_summary`), as words, a figure with its data and two
tables. No sampler runs.

Tests: tests/report/test_reliability.py.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib import rc_context
from matplotlib.figure import Figure

from ..simulation_summary import CANDIDATES_FILE, COVERAGE_FILE, FOLDER, INTERVAL, REPLICATES_FILE
from .figures import GREY, PALETTE, STYLE, WIDTH_IN, save
from .html import Column, Tables, esc, figure, number


def read_simulation(rundir: Path) -> dict | None:
    """The simulation's settings and tables, or None when ``rundir`` has none (or an unfinished one)."""
    folder = rundir / FOLDER
    if not (folder / CANDIDATES_FILE).is_file() or not (folder / "settings.json").is_file():
        return None
    cands = pd.read_csv(folder / CANDIDATES_FILE)
    if cands.empty:
        return None
    return {"settings": json.loads((folder / "settings.json").read_text()), "candidates": cands,
            "coverage": pd.read_csv(folder / COVERAGE_FILE),
            "replicates": pd.read_csv(folder / REPLICATES_FILE)}


def simulation_figure(data: pd.DataFrame, generating: str) -> Figure:
    """Left: per candidate, the share of replicates it ranked first and the share it was not told apart
    from the first. Right: Δelpd (generating − candidate) in each replicate, per rival."""
    with rc_context(STYLE):
        names = list(data["structure"].drop_duplicates())
        n = len(names)
        fig = Figure(figsize=(WIDTH_IN, 1.4 + 0.45 * n))
        left, right = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1, 1.3]}, sharey=True)
        y = -np.arange(n)
        first = data.groupby("structure", sort=False)["share_first"].first().reindex(names).to_numpy(float)
        near = data.groupby("structure", sort=False)["share_not_told_apart"].first().reindex(names).to_numpy(float)
        left.barh(y, 100 * near, height=0.6, color="#C6DBEF", label="not told apart from the first")
        left.barh(y, 100 * first, height=0.36, color=PALETTE[0], label="ranked first")
        left.set_xlim(0, 100)
        left.set_xlabel("% of replicate studies")
        left.set_yticks(y, [f"{s}\n(generating)" if s == generating else s for s in names])
        for k, s in enumerate(names):
            d = data.loc[(data["structure"] == s) & np.isfinite(data["delta_generating"]), "delta_generating"]
            if s == generating or d.empty:
                continue
            jitter = np.linspace(-0.15, 0.15, len(d)) if len(d) > 1 else np.zeros(1)
            right.plot(d, y[k] + jitter, "o", ms=3.5, color=PALETTE[1], alpha=0.8)
            right.plot([d.quantile(0.05), d.quantile(0.95)], [y[k] - 0.3] * 2, color=GREY, lw=2)
        right.axvline(0, color="black", lw=0.8)
        right.axvspan(-4, 4, color="#E8E8E8", zorder=0)
        right.set_xlabel("Δelpd, generating − candidate (nats)")
        fig.legend(*left.get_legend_handles_labels(), loc="lower center", ncol=2, frameon=False)
        fig.tight_layout(rect=(0, 0.45 / fig.get_figheight(), 1, 1))
    return fig


def simulation_html(rundir: Path, tables: Tables, figdir: Path) -> str | None:
    """The part's HTML, or None without a simulation."""
    sim = read_simulation(rundir)
    if sim is None:
        return None
    st, cands, cov, reps = sim["settings"], sim["candidates"], sim["coverage"], sim["replicates"]
    gen = st["structure"]
    k = int(reps["replicate"].nunique())
    design = ("this run's design (the same leaves, traits, levels and points)" if not st.get("leaves_per_level")
              else f"a design resized to {st['leaves_per_level']} leaves in every level of {esc(st['level_of'])} "
                   "(each a copy of one of that level's leaves, with new effects)")
    row = cands.set_index("structure").loc[gen] if gen in set(cands["structure"]) else None
    parts = [f"<p>{k} replicate studies were drawn from the posterior of <b>{esc(gen)}</b> on {design}: in each, "
             "one posterior draw of the population parameters, new effects for every level and leaf from their "
             "fitted distributions and new residuals, then compared over this run's candidates like the run "
             f"itself, at {st['chains']} chains × ({st['warmup']} + {st['draws']}) draws (command "
             "<code>leafcv simulate</code>; the run's own settings may be higher).</p>"]
    if row is not None:
        parts.append(f"<div class=box>{esc(gen)} ranked first in {100 * row['share_first']:.0f} % of the replicate "
                     f"studies and was not told apart from the first (leafcv's rule) in "
                     f"{100 * row['share_not_told_apart_from_first']:.0f} %. "
                     + (f"With {k} replicates a share is known to about ±{100 * np.sqrt(0.25 / k):.0f} percentage "
                        "points (one binomial SE at 50 %)." if k else "") + _unranked_words(reps, gen, k) + "</div>")
    data = reps.merge(cands[["structure", "share_first", "share_not_told_apart_from_first"]], on="structure")
    data = data.rename(columns={"share_not_told_apart_from_first": "share_not_told_apart"})
    plotted = data[["structure", "replicate", "share_first", "share_not_told_apart", "delta_generating"]]
    b64 = save(simulation_figure(plotted, gen), plotted, "simulation", figdir, tables.figures)
    parts.append(figure(b64, "simulation", "Shares of replicate studies won, and Δelpd per rival",
                        f"Left: how often each candidate ranked first (dark) and was not told apart from the first "
                        f"(light) in {k} replicate studies drawn from {esc(gen)}. Right: Δelpd of {esc(gen)} minus "
                        "each rival in every replicate (dots; grey bar 5–95 %; shaded ±4 nats)."))
    parts.append(tables.render("simulation_candidates", cands, [
        Column("structure", "structure"), Column("share_first", "ranked first", lambda v: number(100 * v, ".0f") + " %"),
        Column("share_not_told_apart_from_first", "not told apart from the first",
               lambda v: number(100 * v, ".0f") + " %"),
        Column("share_unranked", "not ranked", lambda v: number(100 * v, ".0f") + " %"),
        Column("delta_q05", "Δelpd 5 %", ".1f"), Column("delta_median", "Δelpd median", ".1f"),
        Column("delta_q95", "Δelpd 95 %", ".1f")],
        f"Per candidate over {k} replicate studies; Δelpd is {esc(gen)} minus the candidate."))
    if len(cov):
        low = cov[cov["coverage"] < INTERVAL - 2 * np.sqrt(INTERVAL * (1 - INTERVAL) / max(k, 1))]
        parts.append(f"<p>Coverage: the {INTERVAL:.0%} central intervals of {esc(gen)}'s population parameters held "
                     f"the values the replicates were drawn from in {cov['coverage'].min():.0%} to "
                     f"{cov['coverage'].max():.0%} of replicates (expected {INTERVAL:.0%}; with {k} replicates a "
                     f"coverage below {INTERVAL - 2 * np.sqrt(INTERVAL * (1 - INTERVAL) / max(k, 1)):.0%} is more "
                     "than two binomial SEs low"
                     + (f": {esc(', '.join(low['quantity']))}" if len(low) else ": none is") + ").</p>")
        parts.append(tables.render("simulation_coverage", cov, [
            Column("quantity", "quantity"), Column("coverage", "coverage", lambda v: number(100 * v, ".0f") + " %"),
            Column("replicates", "replicates", ".0f")], f"Coverage of {esc(gen)}'s {INTERVAL:.0%} intervals."))
    return "\n".join(parts)


def _unranked_words(reps: pd.DataFrame, gen: str, k: int) -> str:
    """Words on the replicates in which the generating structure was not ranked (each counts as a loss)."""
    if "ranked" not in reps:
        return ""
    own = reps[reps["structure"] == gen]
    missing = own[~own["ranked"].astype(bool)]
    if missing.empty:
        return ""
    why = (missing["why_not_ranked"].fillna("not stated").replace("", "not stated") if "why_not_ranked" in missing
           else pd.Series(["not stated"] * len(missing)))
    reasons = "; ".join(f"{esc(r)}: {n}" for r, n in why.value_counts().items())
    ranked = own[own["ranked"].astype(bool)]
    return (f" It was not ranked in {len(missing)} of {k} replicates ({reasons}); each counts as a replicate it did "
            f"not win. Among the {len(ranked)} in which it was ranked, it ranked first in {int(ranked['first'].sum())}.")

