"""Ranking of structures by how well they predict a new leaf.

Differences between structures are paired over leaves: with d_g = elpd_g(structure) − elpd_g(best),
``elpd_diff = Σ d_g`` and ``se_diff = sqrt(G · var(d_g))`` with ``ddof=0``, ArviZ 0.23's ``dse``
(``arviz.stats.stats.compare``: ``np.sqrt(len(diff) * np.var(diff))``). Stacking weights
(Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis 13:917-1007) come from ArviZ's
``compare`` through :mod:`leafcv.cv.arviz_bridge`; :func:`stacking_weights` is an independent
implementation used to cross-check them.

Structures whose fits did not all converge are listed after the others, without a rank and
without a stacking weight: they are never silently averaged in.

The ``rmse`` and ``r2`` columns hold floats when every result has at most the key ``"all"``;
otherwise each cell is a string such as ``"aci 0.61; aq 0.42; all 0.55"`` (curve types in
alphabetical order, ``all`` last, three significant digits), so one CSV column serves both cases.
"""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy.optimize import minimize
from scipy.special import logsumexp

from .cv.arviz_bridge import compare_results
from .cv.result import CVResult, check_comparable

COLUMNS = [
    "structure", "rank", "elpd", "se", "elpd_diff", "se_diff", "weight",
    "rmse", "r2", "n_refits", "max_khat", "converged", "warnings",
]
SMALL_DIFF = 4.0        # Sivula, Magnusson, Matamoros & Vehtari 2020: |Δelpd| < 4 is small
SE_MULTIPLE = 2.0       # "within 2 SE": common practice, no source
FEW_LEAVES = 100        # Sivula et al. 2020: below ~100 units the normal approximation is rough
MANY_STRUCTURES = 11    # McLatchie & Vehtari 2024: beyond ~11 candidates selection is biased
NOT_RANKED = "not ranked: fits did not converge"
RANKED_ANYWAY = "ranked although its fits did not converge (no structure converged)"
SMALL_DIFF_WARNING = f"difference to the best is small (|elpd_diff| < {SMALL_DIFF:g})"
WITHIN_SE_WARNING = f"within {SE_MULTIPLE:g} SE of the best"


# ----------------------------------------------------------------------------------------------
# stacking weights, independent of ArviZ

def _negative_mean_log_score(z: np.ndarray, elpd: np.ndarray) -> tuple[float, np.ndarray]:
    """Objective −(1/G) Σ_g log Σ_k w_k exp(elpd_gk), w = softmax(z), and its gradient in z.

    With responsibilities p_gk = w_k exp(elpd_gk) / Σ_j w_j exp(elpd_gj) and P_k = Σ_g p_gk,
    ∂/∂z_k of the unscaled objective is G w_k − P_k (chain rule through log-softmax).
    """
    n_leaves = elpd.shape[0]
    log_w = z - logsumexp(z)
    joint = elpd + log_w[np.newaxis, :]
    per_leaf = logsumexp(joint, axis=1)
    resp = np.exp(joint - per_leaf[:, np.newaxis])
    grad = (n_leaves * np.exp(log_w) - resp.sum(axis=0)) / n_leaves
    return float(-per_leaf.mean()), grad


def stacking_weights(elpd_pointwise: np.ndarray) -> np.ndarray:
    """Stacking weights maximising Σ_g log Σ_k w_k exp(elpd_gk) over the simplex.

    Parameters
    ----------
    elpd_pointwise
        Per-leaf elpd, shape (G, K): G leaves, K structures.

    Returns
    -------
    numpy.ndarray
        Weights, shape (K,), non-negative and summing to 1.

    Notes
    -----
    The simplex is parameterised by a softmax and the objective is minimised by BFGS with its
    analytic gradient. Each leaf's row is shifted by its maximum first (the optimum does not
    move) and log-sum-exp keeps the sums stable however negative the elpd.

    References
    ----------
    Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis 13:917-1007, eq. 4 (stacking of
    predictive distributions with the log score).
    """
    elpd = np.asarray(elpd_pointwise, dtype=float)
    if elpd.ndim != 2 or elpd.shape[0] < 1 or elpd.shape[1] < 1:
        raise ValueError(f"elpd_pointwise must be a (leaves, structures) matrix, got shape {elpd.shape}")
    if not np.all(np.isfinite(elpd)):
        raise ValueError("elpd_pointwise must be finite")
    n_models = elpd.shape[1]
    if n_models == 1:
        return np.ones(1)
    elpd = elpd - elpd.max(axis=1, keepdims=True)
    fit = minimize(
        _negative_mean_log_score, np.zeros(n_models), args=(elpd,), jac=True,
        method="BFGS", options={"gtol": 1e-10, "maxiter": 10_000},
    )
    z = fit.x
    return np.exp(z - logsumexp(z))


# ----------------------------------------------------------------------------------------------
# the ranking table

def _ordered(results: Sequence[CVResult]) -> tuple[list[CVResult], list[CVResult]]:
    """(ranked, unranked) results, each best first; ties keep the input order."""
    ranked = [r for r in results if r.converged] or list(results)
    unranked = [r for r in results if not r.converged] if len(ranked) < len(results) else []
    return _best_first(ranked), _best_first(unranked)


def _best_first(group: list[CVResult]) -> list[CVResult]:
    """Results by decreasing total elpd; ``sorted`` is stable, so ties keep their order."""
    return sorted(group, key=lambda r: -r.elpd)


def _competition_ranks(elpds: list[float]) -> list[int]:
    """Ranks 1, 2, ... for values sorted best first; exactly equal values share the lower rank."""
    ranks: list[int] = []
    for pos, value in enumerate(elpds):
        ranks.append(ranks[-1] if pos and value == elpds[pos - 1] else pos + 1)
    return ranks


def paired_difference(result: CVResult, best: CVResult) -> tuple[float, float]:
    """elpd difference to the best structure and its standard error, from paired per-leaf values.

    Parameters
    ----------
    result, best
        Results over the same leaves in the same order.

    Returns
    -------
    tuple of float
        ``elpd(result) − elpd(best)`` (equal to Σ d_g; computed from the totals so that it is
        exactly <= 0 when ``best`` has the highest total) and ``sqrt(G · var(d_g))``, ddof=0.
    """
    d = result.elpd_i - best.elpd_i
    return result.elpd - best.elpd, float(np.sqrt(d.size * np.var(d)))


def _khat_warning(result: CVResult) -> str | None:
    """A sentence when some leaf's k-hat is above min(1 − 1/log10 S, 0.7) (Vehtari et al. 2024)."""
    if result.pareto_k is None:
        return None
    threshold = result.khat_threshold
    high = int(np.sum(result.pareto_k > threshold))
    if not high:
        return None
    return (f"Pareto k-hat above {threshold:.2f} for {high} of {result.n_leaves} leaves "
            f"(max {result.max_khat:.2f}; Vehtari et al. 2024)")


def _row_warnings(result: CVResult, is_best: bool, ranked: bool, all_failed: bool,
                  diff: float, se_diff: float) -> str:
    """The '; '-joined warnings of one row."""
    notes: list[str] = []
    if not ranked:
        notes.append(NOT_RANKED)
    elif all_failed:
        notes.append(RANKED_ANYWAY)
    notes.extend(result.warnings)
    if not is_best:
        if abs(diff) < SMALL_DIFF:
            notes.append(SMALL_DIFF_WARNING)
        if abs(diff) < SE_MULTIPLE * se_diff:
            notes.append(WITHIN_SE_WARNING)
    khat = _khat_warning(result)
    if khat:
        notes.append(khat)
    return "; ".join(notes)


def _metric_cells(metrics: list[dict[str, float]]) -> list[float] | list[str]:
    """Floats when no result has a key other than "all", else compact strings (see module doc)."""
    if all(set(m) <= {"all"} for m in metrics):
        return [float(m.get("all", np.nan)) for m in metrics]
    cells = []
    for m in metrics:
        keys = sorted(k for k in m if k != "all") + (["all"] if "all" in m else [])
        cells.append("; ".join(f"{k} {m[k]:.3g}" for k in keys))
    return cells


def rank(results: list[CVResult]) -> pd.DataFrame:
    """Rank structures by their leave-one-leaf-out elpd.

    Parameters
    ----------
    results
        One result per structure, over the same leaves (same order) and method.

    Returns
    -------
    pandas.DataFrame
        One row per structure, best first, columns :data:`COLUMNS`. ``rank`` starts at 1 (pandas
        NA for structures whose fits did not converge; exactly tied elpd share a rank);
        ``elpd_diff`` and ``se_diff`` are relative to the best ranked structure (for an unranked
        row ``elpd_diff`` may be positive); ``weight`` is the stacking weight among ranked
        structures (NaN for unranked ones).

    Raises
    ------
    ValueError
        If the results differ in leaves or method (the message names the structures), have
        duplicate names or non-finite per-leaf elpd.
    """
    check_comparable(results)
    ranked, unranked = _ordered(results)
    all_failed = not any(r.converged for r in results)
    best = ranked[0]
    weights = compare_results({r.structure: r for r in ranked})["weight"]
    ranks: list[object] = [*_competition_ranks([r.elpd for r in ranked]), *[pd.NA] * len(unranked)]
    rows = []
    for pos, res in enumerate([*ranked, *unranked]):
        is_ranked = pos < len(ranked)
        diff, se_diff = paired_difference(res, best)
        rows.append({
            "structure": res.structure,
            "rank": ranks[pos],
            "elpd": res.elpd,
            "se": res.se,
            "elpd_diff": diff,
            "se_diff": se_diff,
            "weight": float(weights[res.structure]) if is_ranked else np.nan,
            "n_refits": res.n_refits,
            "max_khat": res.max_khat,
            "converged": res.converged,
            "warnings": _row_warnings(res, pos == 0, is_ranked, all_failed, diff, se_diff),
        })
    table = pd.DataFrame(rows)
    ordered = [*ranked, *unranked]
    table["rmse"] = _metric_cells([r.rmse for r in ordered])
    table["r2"] = _metric_cells([r.r2 for r in ordered])
    table["rank"] = table["rank"].astype("Int64")
    table["converged"] = table["converged"].astype(bool)
    return table[COLUMNS]


# ----------------------------------------------------------------------------------------------
# sentences and text for the report and the terminal

def _lead_sentence(table: pd.DataFrame) -> str:
    """Which structure is best and whether its lead over the runner-up is clear."""
    ranked = table[table["rank"].notna()]
    best = ranked.iloc[0]
    if len(ranked) == 1:
        return f"{best['structure']} is the only ranked structure, so there is nothing to compare it with."
    runner = ranked.iloc[1]
    gap, se = abs(float(runner["elpd_diff"])), float(runner["se_diff"])
    numbers = f"{gap:.1f} nats, SE {se:.1f}"
    if runner["rank"] == best["rank"]:
        return f"{best['structure']} and {runner['structure']} are tied for the best elpd."
    if gap >= SMALL_DIFF and gap >= SE_MULTIPLE * se:
        return f"{best['structure']} predicts new leaves best; its lead over {runner['structure']} ({numbers}) is clear."
    reasons = []
    if gap < SMALL_DIFF:
        reasons.append(f"smaller than {SMALL_DIFF:g} nats")
    if gap < SE_MULTIPLE * se:
        reasons.append(f"within {SE_MULTIPLE:g} SE")
    return (f"{best['structure']} has the highest elpd, but its lead over {runner['structure']} "
            f"({numbers}) is not clear: it is {' and '.join(reasons)}.")


def summary_notes(table: pd.DataFrame, n_leaves: int) -> list[str]:
    """Plain sentences about a ranking table for the report.

    Parameters
    ----------
    table
        Output of :func:`rank`.
    n_leaves
        Number of leaves the structures were scored on.

    Returns
    -------
    list of str
        The best structure and whether its lead is clear; convergence; caveats on few leaves
        (Sivula et al. 2020) and many structures (McLatchie & Vehtari 2024); what the weights mean.
    """
    if table.empty:
        raise ValueError("the ranking table is empty")
    notes = [_lead_sentence(table)]
    failed = table.loc[~table["converged"].astype(bool), "structure"].tolist()
    if len(failed) == len(table):
        notes.append("No structure's fits all converged: the ranking is shown for information only and should not be relied on.")
    elif failed:
        notes.append(f"{len(failed)} structure(s) whose fits did not converge are listed last without a rank: {', '.join(failed)}.")
    if n_leaves < FEW_LEAVES:
        notes.append(f"With fewer than {FEW_LEAVES} leaves (here {n_leaves}) the normal approximation of the SE of "
                     "differences is rough (Sivula et al. 2020).")
    if len(table) > MANY_STRUCTURES:
        notes.append(f"With {len(table)} structures compared, picking the best of them is itself optimistic: the winner's "
                     "lead is biased upwards (selection bias; McLatchie & Vehtari 2024).")
    if table["weight"].notna().sum() > 1:
        notes.append("Stacking weights say how to combine the structures' predictions; they are not model probabilities "
                     "(Yao et al. 2018).")
    return notes


def _cell(column: str, value: object) -> str:
    """Text of one table cell."""
    if value is pd.NA or value is None or (isinstance(value, float) and np.isnan(value)):
        return "-"
    if column in ("elpd", "se", "elpd_diff", "se_diff"):
        return f"{value:.1f}"
    if column in ("weight", "max_khat"):
        return f"{value:.2f}"
    if column in ("rmse", "r2") and isinstance(value, float):
        return f"{value:.3g}"
    if column == "converged":
        return "yes" if value else "NO"
    return str(value)


def format_ranking(table: pd.DataFrame) -> str:
    """A fixed-width text rendering of a ranking table, warnings listed below it.

    Parameters
    ----------
    table
        Output of :func:`rank`.

    Returns
    -------
    str
        Header line, one line per structure, then one line per structure that has warnings.
    """
    shown = [c for c in COLUMNS if c != "warnings"]
    text = {c: [c] + [_cell(c, v) for v in table[c]] for c in shown}
    width = {c: max(len(s) for s in text[c]) for c in shown}
    left = {"structure", "rmse", "r2"}
    lines = []
    for i in range(len(table) + 1):
        cells = [text[c][i].ljust(width[c]) if c in left else text[c][i].rjust(width[c]) for c in shown]
        lines.append("  ".join(cells).rstrip())
    flagged = [(s, w) for s, w in zip(table["structure"], table["warnings"]) if w]
    if flagged:
        lines.append("")
        lines.append("Warnings:")
        lines.extend(f"  {s}: {w}" for s, w in flagged)
    return "\n".join(lines)
