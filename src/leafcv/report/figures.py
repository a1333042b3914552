"""The report's figures: each built from one table, which is written beside it as CSV, so what a
figure shows is exactly its CSV.

Figures are drawn on :class:`matplotlib.figure.Figure` objects (the Agg canvas; pyplot and its global
backend are never touched, so a notebook's own plotting is left alone), sized for the text width of
an A4 page (6.7 in), in the colour-blind-safe palette of Okabe & Ito (2008, "Color Universal Design").

Tests: tests/report/test_report_figures.py, tests/report/test_report_predictions.py.
"""
from __future__ import annotations

import base64
import io
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib import rc_context
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter
from matplotlib.transforms import blended_transform_factory

from .files import write_bytes, write_text
from ..data.dataset import LEAF_TERM

#: Okabe & Ito 2008 palette, ordered for categories (yellow late: low contrast on white).
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442", "#000000")
GREY = "#767676"
WIDTH_IN = 6.7          # text width of an A4 page with 2 cm margins, inches
STYLE = {"font.size": 9, "axes.titlesize": 9.5, "axes.labelsize": 9, "xtick.labelsize": 8, "ytick.labelsize": 8,
         "legend.fontsize": 8, "axes.spines.top": False, "axes.spines.right": False, "svg.fonttype": "none",
         "font.family": "DejaVu Sans"}
SYMLOG_BEYOND = 60.0    # nats: a wider x range is drawn on a symmetric log scale (linear within ±10)
LABELLED_LEAVES = 5


def colour(k: int) -> str:
    return PALETTE[k % len(PALETTE)]


def save(fig: Figure, data: pd.DataFrame, name: str, figdir: Path, written: list[str] | None = None) -> str:
    """Write ``figdir/<name>.png``, ``.svg`` and ``.csv`` (their names appended to ``written``); return the
    PNG as base64 for embedding."""
    png = io.BytesIO()
    fig.savefig(png, format="png", dpi=200)
    svg = io.BytesIO()
    fig.savefig(svg, format="svg")
    write_bytes(figdir / f"{name}.png", png.getvalue())
    write_bytes(figdir / f"{name}.svg", svg.getvalue())
    write_text(figdir / f"{name}.csv", data.to_csv(index=False))
    if written is not None:
        written += [f"{name}.png", f"{name}.svg", f"{name}.csv"]
    return base64.b64encode(png.getvalue()).decode("ascii")


# ----------------------------------------------------------------------------------------------
# ranking

def ranking_data(ranking: pd.DataFrame) -> pd.DataFrame:
    """What the ranking figure plots: per structure (ranking.csv order) its Δelpd against the best,
    ±1 and ±2 SE_diff, whether it is ranked and, if not, why."""
    ranked = ranking["rank"].notna().to_numpy()
    d = ranking["elpd_diff"].to_numpy(float)
    se = ranking["se_diff"].to_numpy(float)
    reason = [("" if r else str(w).split("; ")[0]) for r, w in zip(ranked, ranking["warnings"])]
    return pd.DataFrame({
        "structure": ranking["structure"], "status": np.where(ranked, "ranked", "not ranked"),
        "rank": ranking["rank"], "elpd_diff": d, "se_diff": se,
        "low_1se": d - se, "high_1se": d + se, "low_2se": d - 2 * se, "high_2se": d + 2 * se, "reason": reason,
    })


def ranking_figure(data: pd.DataFrame, small: float) -> Figure:
    """Δelpd against the best with ±1 SE (thick) and ±2 SE (thin) bars; unranked rows apart, in grey,
    with their reason; the band within ``small`` nats of the best shaded."""
    with rc_context(STYLE):
        n = len(data)
        ranked = data["status"].eq("ranked").to_numpy()
        gap = 0.8 if ranked.any() and (~ranked).any() else 0.0
        y = np.array([-(k + (gap if not ranked[k] else 0.0)) for k in range(n)])
        fig = Figure(figsize=(WIDTH_IN, 1.3 + 0.42 * n + gap * 0.42))
        ax = fig.subplots()
        ax.axvspan(-small, 0, color="#E8E8E8", zorder=0, label=f"within {small:g} nats of the best")
        ax.axvline(0, color="black", lw=0.8, zorder=1)
        for k, row in data.iterrows():
            c = PALETTE[0] if ranked[k] else GREY
            if not np.isfinite(row["elpd_diff"]):
                ax.text(0, y[k], "  no finite elpd", va="center", fontsize=8, color=GREY)
                continue
            if np.isfinite(row["se_diff"]) and row["se_diff"] > 0:
                ax.plot([row["low_2se"], row["high_2se"]], [y[k]] * 2, color=c, lw=1.0, solid_capstyle="butt")
                ax.plot([row["low_1se"], row["high_1se"]], [y[k]] * 2, color=c, lw=3.2, solid_capstyle="butt")
            ax.plot(row["elpd_diff"], y[k], "o", color=c, mfc=c if ranked[k] else "white", ms=6, zorder=3)
        labels = [f"{s}" + (f"\n({r})" if r else "") for s, r in zip(data["structure"], data["reason"])]
        ax.set_yticks(y, labels)
        for tick, r in zip(ax.get_yticklabels(), ranked):
            tick.set_color("black" if r else GREY)
        lo = np.nanmin(np.r_[data["low_2se"].to_numpy(float), data["elpd_diff"].to_numpy(float), -small])
        hi = np.nanmax(np.r_[data["high_2se"].to_numpy(float), data["elpd_diff"].to_numpy(float), 0.0])
        if hi - lo > SYMLOG_BEYOND:
            ax.set_xscale("symlog", linthresh=10)
            ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}".replace("-", "−")))
            ax.set_xlabel("Δelpd against the best (nats; logarithmic beyond ±10)")
            ax.set_xlim(lo * 1.3 if lo < -10 else lo - 1, max(hi, 0) + 2)
        else:
            ax.set_xlabel("Δelpd against the best (nats)")
            pad = 0.05 * (hi - lo)
            ax.set_xlim(lo - pad, hi + pad)
        if gap:
            first_unranked = y[~ranked].max()
            ax.axhline(first_unranked + 0.5 + gap / 2, color=GREY, lw=0.6, ls=":")
        ax.set_ylim(y.min() - 0.6, 0.6)
        handles, names = ax.get_legend_handles_labels()
        handles += [Line2D([], [], color=PALETTE[0], lw=3.2), Line2D([], [], color=PALETTE[0], lw=1.0)]
        names += ["±1 SE of the difference", "±2 SE of the difference"]
        if (~ranked).any():
            handles.append(Line2D([], [], color=GREY, marker="o", mfc="white", ls="none"))
            names.append("not ranked (shown for information)")
        ncol = 2 if len(handles) > 3 else 3
        fig.legend(handles, names, loc="lower center", ncol=ncol, frameon=False, bbox_to_anchor=(0.5, 0.0))
        rows = -(-len(handles) // ncol)
        fig.tight_layout(rect=(0, (0.08 + 0.2 * rows) / fig.get_figheight(), 1, 1))
    return fig


# ----------------------------------------------------------------------------------------------
# which leaves decide it

def leaves_data(pointwise: pd.DataFrame, unit: str, best: str, others: list[str],
                groups: pd.DataFrame | None, group: str | None) -> pd.DataFrame:
    """Per unit and contrast, elpd(best) − elpd(other) from pointwise.csv, with the unit's group and
    whether it is among the LABELLED_LEAVES largest |Δ| of its contrast."""
    rows = []
    ids = pointwise[unit].astype(str)
    level = pd.Series(["all"] * len(ids))
    if groups is not None and group:
        level = ids.map(dict(zip(groups["leaf"].astype(str), groups[group].astype(str)))).fillna("(unknown)")
    for other in others:
        delta = pointwise[f"elpd:{best}"].to_numpy(float) - pointwise[f"elpd:{other}"].to_numpy(float)
        order = np.argsort(-np.abs(np.nan_to_num(delta, nan=0.0)), kind="stable")
        top = np.zeros(len(delta), bool)
        top[order[:LABELLED_LEAVES]] = True
        rows.append(pd.DataFrame({unit: ids, "group": level, "best": best, "other": other, "delta": delta,
                                  "labelled": top}))
    return pd.concat(rows, ignore_index=True)


def leaves_figure(data: pd.DataFrame, unit: str, group: str | None) -> Figure:
    """One panel per contrast: a bar per unit, grouped and coloured by its group, the largest |Δ| labelled."""
    others = list(dict.fromkeys(data["other"]))
    levels = sorted(data["group"].unique())
    col = {g: colour(k) for k, g in enumerate(levels)}
    with rc_context(STYLE):
        fig = Figure(figsize=(WIDTH_IN, 0.6 + 2.3 * len(others)))
        axes = np.atleast_1d(fig.subplots(len(others), 1, squeeze=False)[:, 0])
        for ax, other in zip(axes, others):
            d = data[data["other"] == other].copy()
            d = d.sort_values(["group", "delta"], ascending=[True, False], kind="stable").reset_index(drop=True)
            x = np.arange(len(d)) + np.searchsorted(levels, d["group"]) * 0.8
            ax.bar(x, d["delta"], width=0.8, color=[col[g] for g in d["group"]])
            ax.axhline(0, color="black", lw=0.7)
            span = np.nanmax(np.abs(d["delta"])) if len(d) else 1.0
            for xi, (_, r) in zip(x, d.iterrows()):
                if r["labelled"]:
                    off = 0.04 * span * (1 if r["delta"] >= 0 else -1)
                    ax.text(xi, r["delta"] + off, str(r[unit]), rotation=90, fontsize=7,
                            ha="center", va="bottom" if r["delta"] >= 0 else "top")
            ax.set_ylim(min(0, np.nanmin(d["delta"])) - 0.4 * span, max(0, np.nanmax(d["delta"])) + 0.4 * span)
            best = d["best"].iloc[0]
            ax.set_title(f"{best} against {other}: total {np.nansum(d['delta']):.1f} nats", loc="left")
            ax.set_ylabel("Δelpd per " + ("leaf" if unit == LEAF_TERM else unit) + " (nats)")
            if len(levels) > 1:
                centres = [x[d["group"].to_numpy() == g].mean() for g in levels if (d["group"] == g).any()]
                ax.set_xticks(centres, [g for g in levels if (d["group"] == g).any()])
            elif len(d) <= 30:
                ax.set_xticks(x, d[unit], rotation=90, fontsize=6.5)
            else:
                ax.set_xticks([])
        axes[-1].set_xlabel((f"{'leaves' if unit == 'leaf' else 'levels of ' + unit}, grouped by {group}"
                             if group and len(levels) > 1 else ("leaves" if unit == LEAF_TERM else f"levels of {unit}"))
                            + f" (the {LABELLED_LEAVES} largest |Δ| labelled; above 0 the best predicts it better)")
        fig.tight_layout()
    return fig


# ----------------------------------------------------------------------------------------------
# Pareto k-hat per unit

def khat_data(pointwise: pd.DataFrame, unit: str, structures: list[str], thresholds: dict[str, float],
              psis_khat: dict[str, list] | None = None) -> pd.DataFrame:
    """Per unit and structure: k-hat (NaN unless scored by PSIS), how it was scored, the threshold, and
    ``psis_khat``: the PSIS k-hat of every unit, refitted ones too, where the run stored it."""
    rows = []
    for s in structures:
        if f"khat:{s}" not in pointwise:
            continue
        psis = (psis_khat or {}).get(s)
        khat = pointwise[f"khat:{s}"].to_numpy(float)
        rows.append(pd.DataFrame({unit: pointwise[unit].astype(str), "structure": s, "khat": khat,
                                  "psis_khat": np.asarray(psis, float) if psis is not None and len(psis) == len(khat)
                                  else khat,
                                  "method": pointwise[f"method:{s}"].astype(str),
                                  "threshold": thresholds.get(s, np.nan)}))
    return pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(
        columns=[unit, "structure", "khat", "psis_khat", "method", "threshold"])


def khat_figure(data: pd.DataFrame, unit: str) -> Figure:
    """k-hat per unit, one colour per structure, each structure's threshold dashed; units scored by
    an exact refit (no k-hat kept) marked along the top."""
    structures = list(dict.fromkeys(data["structure"]))
    units = list(dict.fromkeys(data[unit]))
    pos = {u: k for k, u in enumerate(units)}
    markers = "osD^vP*X"
    with rc_context(STYLE):
        fig = Figure(figsize=(WIDTH_IN, 3.4))
        ax = fig.subplots()
        top = blended_transform_factory(ax.transData, ax.transAxes)
        width = 0.8 / max(len(structures), 1)
        for k, s in enumerate(structures):
            d = data[data["structure"] == s]
            x = np.array([pos[u] for u in d[unit]]) + (k - (len(structures) - 1) / 2) * width
            ax.plot(x, d["khat"], markers[k % len(markers)], color=colour(k), ms=4, label=s, ls="none")
            thr = d["threshold"].iloc[0]
            if np.isfinite(thr):
                same = data["threshold"].nunique() == 1
                ax.axhline(thr, color=GREY if same else colour(k), ls="--", lw=0.9)
            refit = d["method"].to_numpy() != "psis"
            if refit.any():
                ax.plot(x[refit], np.full(refit.sum(), 0.97), "|", color=colour(k), ms=8, mew=1.6, transform=top)
                ax.plot(x[refit], d["psis_khat"].to_numpy(float)[refit], markers[k % len(markers)], color=colour(k),
                        mfc="white", ms=4, ls="none")
        finite = data["psis_khat" if "psis_khat" in data else "khat"].to_numpy(float)
        finite = finite[np.isfinite(finite)]
        top_value = max([*finite, *data["threshold"].dropna().to_numpy(float), 0.5])
        ax.set_ylim(min([*finite, 0.0]) - 0.05, top_value + 0.15)
        handles, names = ax.get_legend_handles_labels()
        handles += [Line2D([], [], color=GREY, ls="--", lw=0.9), Line2D([], [], color=GREY, marker="|", ms=8, mew=1.6,
                                                                        ls="none")]
        names += ["k̂ threshold min(1 − 1/log10 S, 0.7)", "scored by an exact refit (its PSIS k̂ hollow)"]
        fig.legend(handles, names, loc="upper center", ncol=2 if len(handles) > 3 else len(handles), frameon=False,
                   bbox_to_anchor=(0.5, 1.0))
        ax.set_ylabel("Pareto k̂")
        ax.set_xlabel("leaf" if unit == LEAF_TERM else f"level of {unit}")
        if len(units) <= 40:
            ax.set_xticks(range(len(units)), units, rotation=90, fontsize=6.5)
        else:
            step = int(np.ceil(len(units) / 40))
            ax.set_xticks(range(0, len(units), step), units[::step], rotation=90, fontsize=6.5)
        rows = -(-len(handles) // (2 if len(handles) > 3 else len(handles)))
        fig.tight_layout(rect=(0, 0, 1, 1 - (0.1 + 0.2 * rows) / fig.get_figheight()))
    return fig
