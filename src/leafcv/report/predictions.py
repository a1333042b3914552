"""The report's held-out predictions: predicted against observed A for the top structures, and the
predictive curves of the leaves predicted worst and best, from ``predictions/<structure>-points.csv``
and ``-curves.csv`` (written at scoring time by `leafcv.cv.predictions`)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from ..runfolder import RunPaths
from matplotlib import rc_context
from matplotlib.figure import Figure

from ..cv.predictions import VARIED
from .figures import GREY, STYLE, WIDTH_IN, colour, save
from .html import Column, Tables, esc, figure, number
from ..data.dataset import LEAF_TERM

CURVE_NAMES = {"aci": "A–Ci curves", "aq": "A–Q curves"}
AXIS = {"ci": "Ci (µmol mol⁻¹)", "ppfd": "PPFD (µmol m⁻² s⁻¹)"}
A_LABEL = "A (µmol m⁻² s⁻¹)"


def _read(folder: Path, structure: str, part: str) -> pd.DataFrame | None:
    """A predictions table, or None when it is missing or holds no rows."""
    path = RunPaths(folder).prediction(structure, part)
    try:
        table = pd.read_csv(path) if path.exists() else None
    except pd.errors.EmptyDataError:
        return None
    return None if table is None or table.empty else table


def scatter_data(points: dict[str, pd.DataFrame]) -> pd.DataFrame:
    """Every point of each structure (``points``: structure -> its points table): curve type, observed and
    held-out predicted A."""
    parts = [d.assign(structure=s)[["structure", "leaf", "curve", "curve_type", "observed", "predicted"]]
             for s, d in points.items()]
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def _varied_values(table: pd.DataFrame, varied: pd.Series) -> np.ndarray:
    """Each row's value of the quantity its curve varies (Ci or PPFD)."""
    return np.where(varied.to_numpy() == "ci", table["ci"].to_numpy(float), table["ppfd"].to_numpy(float))


def fit_scores(data: pd.DataFrame) -> pd.DataFrame:
    """RMSE and R² = 1 − SSE/SST per structure and curve type (and over all points)."""
    rows = []
    for s, d in data.groupby("structure", sort=False):
        for kind, e in [("all", d)] + list(d.groupby("curve_type", sort=True)):
            err = e["observed"] - e["predicted"]
            sst = float(np.sum((e["observed"] - e["observed"].mean()) ** 2))
            rows.append({"structure": s, "curve_type": kind, "points": len(e),
                         "rmse": float(np.sqrt(np.mean(err ** 2))),
                         "r2": 1 - float(np.sum(err ** 2)) / sst if sst > 0 else float("nan")})
    return pd.DataFrame(rows)


def scatter_figure(data: pd.DataFrame, scores: pd.DataFrame) -> Figure:
    kinds = sorted(data["curve_type"].unique())
    structures = list(dict.fromkeys(data["structure"]))
    with rc_context(STYLE):
        fig = Figure(figsize=(WIDTH_IN, 3.3))
        axes = np.atleast_1d(fig.subplots(1, len(kinds), squeeze=False)[0])
        for ax, kind in zip(axes, kinds):
            d = data[data["curve_type"] == kind]
            lo, hi = float(min(d["observed"].min(), d["predicted"].min())), float(max(d["observed"].max(),
                                                                                      d["predicted"].max()))
            ax.plot([lo, hi], [lo, hi], color=GREY, lw=0.8, ls="--", zorder=0)
            for k, s in enumerate(structures):
                e = d[d["structure"] == s]
                sc = scores[(scores["structure"] == s) & (scores["curve_type"] == kind)].iloc[0]
                ax.plot(e["observed"], e["predicted"], "osD"[k % 3], ms=2.6, alpha=0.55, color=colour(k), ls="none",
                        label=f"{s}: RMSE {sc['rmse']:.2f}, R² {sc['r2']:.3f}", zorder=3 + len(structures) - k)
            ax.set_title(CURVE_NAMES.get(kind, kind), loc="left")
            ax.set_xlabel("observed " + A_LABEL)
            ax.set_ylabel("held-out predicted " + A_LABEL)
            ax.legend(loc="upper left", frameon=False, fontsize=7, markerscale=2)
            ax.set_aspect("equal", adjustable="datalim")
        fig.tight_layout()
    return fig


def curve_leaves(run, best: str, points: pd.DataFrame) -> pd.DataFrame:
    """The leaves with the lowest and the highest elpd per point under ``best`` (``points``: its points)."""
    elpd = run.pointwise[[run.unit, f"elpd:{best}"]].rename(columns={run.unit: "leaf", f"elpd:{best}": "elpd"})
    n = points.groupby(points["leaf"].astype(str)).size().rename("points")
    t = elpd.assign(leaf=elpd["leaf"].astype(str)).merge(n, left_on="leaf", right_index=True)
    t["elpd_per_point"] = t["elpd"] / t["points"]
    t = t[np.isfinite(t["elpd_per_point"])].sort_values("elpd_per_point", kind="stable")
    low, high = t.iloc[0], t.iloc[-1]
    return pd.DataFrame([{**low.to_dict(), "which": "lowest elpd per point"},
                         {**high.to_dict(), "which": "highest elpd per point"}])


def curves_data(run, structures: list[str], leaves: pd.DataFrame, points: pd.DataFrame) -> pd.DataFrame:
    """Grid rows (mean, 5 % and 95 % of a new observation) of ``leaves`` under each structure, and their
    observed points (kind "observed", from ``points``, the first structure's points table)."""
    parts = []
    ids = set(leaves[LEAF_TERM].astype(str))
    for s in structures:
        c = _read(run.path, s, "curves")
        if c is not None:
            c = c[c["leaf"].astype(str).isin(ids)]
            parts.append(c.assign(structure=s, kind="predicted", x=_varied_values(c, c["varied"])))
    p = points[points["leaf"].astype(str).isin(ids)]
    varied = p["curve_type"].map(VARIED)
    parts.append(pd.DataFrame({"leaf": p["leaf"].astype(str), "curve_type": p["curve_type"], "varied": varied,
                               "x": _varied_values(p, varied), "observed": p["observed"],
                               "kind": "observed", "structure": ""}))
    out = pd.concat(parts, ignore_index=True)
    out["leaf"] = out["leaf"].astype(str)
    cols = ["kind", "structure", "leaf", "curve_type", "varied", "x", "mean", "q05", "q95", "observed"]
    return out.reindex(columns=cols)


def curves_figure(data: pd.DataFrame, leaves: pd.DataFrame, structures: list[str]) -> Figure:
    kinds = [k for k in ("aci", "aq") if (data["curve_type"] == k).any()]
    with rc_context(STYLE):
        fig = Figure(figsize=(WIDTH_IN, 2.5 * len(leaves) + 0.5))
        axes = fig.subplots(len(leaves), len(kinds), squeeze=False)
        for i, (_, lf) in enumerate(leaves.iterrows()):
            for j, kind in enumerate(kinds):
                ax = axes[i, j]
                d = data[(data["leaf"] == str(lf["leaf"])) & (data["curve_type"] == kind)]
                for k, s in enumerate(structures):
                    e = d[(d["kind"] == "predicted") & (d["structure"] == s)].sort_values("x")
                    if e.empty:
                        continue
                    ax.fill_between(e["x"], e["q05"], e["q95"], color=colour(k), alpha=0.18, lw=0)
                    ax.plot(e["x"], e["mean"], color=colour(k), lw=1.4, label=s)
                o = d[d["kind"] == "observed"]
                ax.plot(o["x"], o["observed"], "o", ms=3.2, color="black", label="observed")
                ax.set_title(f"{lf['leaf']} ({lf['which']}): {CURVE_NAMES.get(kind, kind)}", loc="left", fontsize=8.5)
                ax.set_xlabel(AXIS.get(str(d["varied"].iloc[0]) if len(d) else "", ""))
                ax.set_ylabel(A_LABEL)
        handles, names = axes[0, 0].get_legend_handles_labels()
        fig.legend(handles, names, loc="lower center", ncol=min(len(handles), 3), frameon=False, fontsize=7.5)
        fig.tight_layout(rect=(0, 0.35 / fig.get_figheight(), 1, 1))
    return fig


def predictions_html(run, tables: Tables) -> str:
    """The section: the scatter of the top three and the curves of two leaves under the best two."""
    ranked = [str(s) for s in run.ranked["structure"]] if run.ranking is not None else []
    points = {s: _read(run.path, s, "points") for s in ranked[:3]}
    points = {s: d for s, d in points.items() if d is not None}
    top = list(points)
    if not top:
        return ("<p>No held-out predictions in this run folder (predictions/, written by leafcv compare from "
                "this version on): run `leafcv compare` again to add them.</p>")
    data = scatter_data(points)
    scores = fit_scores(data)
    b64 = save(scatter_figure(data, scores), data, "predicted_observed", run.paths.figures, tables.figures)
    parts = [f"<p>Each point's net assimilation predicted without its own leaf (the held-out predictive mean) "
             f"against the observed value, for the top {len(top)} ranked structures; dashed: the 1:1 line.</p>",
             figure(b64, "predicted_observed", "Predicted against observed A",
                    "Held-out predictions by curve type, with RMSE (µmol m⁻² s⁻¹) and R² = 1 − SSE/SST."),
             tables.render("prediction_scores", scores, [
                 Column("structure", "structure"), Column("curve_type", "curves"), Column("points", "points", ".0f"),
                 Column("rmse", "RMSE", ".3g"), Column("r2", "R²", ".3g")],
                 "Held-out RMSE (µmol m⁻² s⁻¹) and R² by curve type.")]
    if run.pointwise is not None and f"elpd:{top[0]}" in run.pointwise and run.unit == LEAF_TERM:
        leaves = curve_leaves(run, top[0], points[top[0]])
        shown = top[:2]
        cd = curves_data(run, shown, leaves, points[top[0]])
        b64 = save(curves_figure(cd, leaves, shown), cd, "predictive_curves", run.paths.figures, tables.figures)
        which = "; ".join(f"{esc(r['leaf'])}, {esc(r['which'])} under {esc(top[0])} "
                          f"({number(r['elpd_per_point'], '.2f')} nats per point)" for _, r in leaves.iterrows())
        parts.append(f"<p>The observed A–Ci and A–Q points of two leaves ({which}) with the held-out predictive "
                     f"mean and the 90 % interval of a new observation under {' and '.join(esc(s) for s in shown)}. "
                     f"The other conditions of each curve are held at the medians of its points.</p>")
        parts.append(figure(b64, "predictive_curves", "Held-out predictive curves of two leaves",
                            "Lines: held-out predictive mean; bands: 90 % interval of a new observation; dots: the "
                            "leaf's observed points. Predicted without the leaf's own data (its effects drawn from "
                            "the population)."))
    return "\n".join(parts)
