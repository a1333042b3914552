"""Ranking of structures by how well they predict a new leaf (or a new level of a grouping).

Totals and differences are computed here from the per-unit elpd, with the sample variance
(``ddof=1``): ``se = sqrt(G · var(elpd_g, ddof=1))`` and, paired over units with
d_g = elpd_g(structure) − elpd_g(best), ``elpd_diff = Σ d_g`` and
``se_diff = sqrt(G · var(d_g, ddof=1))`` (Vehtari, Gelman & Gabry 2017, Stat Comput
27:1413-1432, eq. 23 and sec. 5.2, recalled from memory; ArviZ 0.23 uses ``ddof=0``). Only the
stacking weights (Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis 13:917-1007) come from
ArviZ's ``compare`` through :mod:`leafcv.cv.arviz_bridge`; :func:`stacking_weights` is an
independent implementation used to cross-check them.

Structures graded "failed" and structures that could not be scored reliably are listed after the
ranked ones, without a rank and without a stacking weight: they are never silently averaged in.
Structures graded "marginal" are ranked, with a warning.

Every column of the table is numeric except ``structure`` and ``warnings``; held-out RMSE and R²
per curve type have their own columns ``rmse_<curve type>`` and ``r2_<curve type>``.
"""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy.optimize import minimize
from scipy.special import logsumexp

from .cv.arviz_bridge import compare_results
from .cv.result import CVResult, check_comparable

# columns without the per-curve-type pairs, which go after "r2" (see table_columns)
COLUMNS = [
    "structure", "rank", "elpd", "se", "mcse", "elpd_diff", "se_diff", "weight",
    "rmse", "r2", "n_refits", "max_khat", "converged", "warnings",
]
SMALL_DIFF = 4.0        # Sivula, Magnusson, Matamoros & Vehtari 2020: |Δelpd| < 4 is small
SE_MULTIPLE = 2.0       # "within 2 SE": common practice, no source
FEW_LEAVES = 100        # Sivula et al. 2020: below ~100 units the normal approximation is rough
MANY_STRUCTURES = 11    # McLatchie & Vehtari 2024: beyond ~11 candidates selection is biased
NOT_RANKED_PREFIX = "not ranked: "
NOT_RANKED = NOT_RANKED_PREFIX + "fits did not converge"
MARGINAL = "marginal convergence"
MARGINAL_WARNING = f"{MARGINAL}: some fits passed their diagnostics only marginally"
SMALL_DIFF_WARNING = f"difference to the best is small (|elpd_diff| < {SMALL_DIFF:g})"
WITHIN_SE_WARNING = f"within {SE_MULTIPLE:g} SE of the best"


def units_word(unit: str) -> str:
    """How counts of held-out units read in sentences: "leaves" or "levels of <unit>"."""
    return "leaves" if unit == "leaf" else f"levels of {unit}"


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

def curve_types(results: Sequence[CVResult]) -> list[str]:
    """Curve types named in any result's ``rmse`` or ``r2`` (key ``"all"`` excluded), sorted."""
    return sorted({k for r in results for k in (*r.rmse, *r.r2)} - {"all"})


def table_columns(types: Sequence[str]) -> list[str]:
    """:data:`COLUMNS` with one ``rmse_<type>, r2_<type>`` pair per curve type after ``r2``."""
    at = COLUMNS.index("r2") + 1
    pairs = [c for t in types for c in (f"rmse_{t}", f"r2_{t}")]
    return [*COLUMNS[:at], *pairs, *COLUMNS[at:]]


def _best_first(group: list[CVResult]) -> list[CVResult]:
    """Results by decreasing total elpd, non-finite totals last; ``sorted`` is stable, so ties keep
    their order."""
    return sorted(group, key=lambda r: (not np.isfinite(r.elpd), -r.elpd if np.isfinite(r.elpd) else 0.0))


def _ordered(results: Sequence[CVResult]) -> tuple[list[CVResult], list[CVResult]]:
    """(ranked, unranked) results, each best first; ranked are those with ``ranked_ok``."""
    return (_best_first([r for r in results if r.ranked_ok]),
            _best_first([r for r in results if not r.ranked_ok]))


def _competition_ranks(elpds: list[float]) -> list[int]:
    """Ranks 1, 2, ... for values sorted best first; exactly equal values share the lower rank."""
    ranks: list[int] = []
    for pos, value in enumerate(elpds):
        ranks.append(ranks[-1] if pos and value == elpds[pos - 1] else pos + 1)
    return ranks


def paired_difference(result: CVResult, best: CVResult) -> tuple[float, float]:
    """elpd difference to the best structure and its standard error, from paired per-unit values.

    Parameters
    ----------
    result, best
        Results over the same units in the same order.

    Returns
    -------
    tuple of float
        ``elpd(result) − elpd(best)`` (equal to Σ d_g; computed from the totals so that it is
        exactly <= 0 when ``best`` has the highest total) and ``sqrt(G · var(d_g, ddof=1))``,
        NaN when G < 2.
    """
    d = result.elpd_i - best.elpd_i
    se = float(np.sqrt(d.size * np.var(d, ddof=1))) if d.size > 1 else float("nan")
    return result.elpd - best.elpd, se


def _unranked_reason(result: CVResult) -> str:
    """``"not ranked: ..."``: the fits did not converge, the structure could not be scored, or both."""
    reasons = (["fits did not converge"] if result.grade == "failed" else []) + ([result.unscored] if result.unscored else [])
    return NOT_RANKED_PREFIX + " and ".join(reasons)


def _khat_warning(result: CVResult) -> str | None:
    """A sentence when some PSIS-scored unit's k-hat is above min(1 − 1/log10 S, 0.7)
    (Vehtari et al. 2024); units scored otherwise have no k-hat and are not counted."""
    high = result.n_psis_high
    if not high:
        return None
    scored = int(np.sum(np.isfinite(result.pareto_k)))
    return (f"Pareto k-hat above {result.khat_threshold:.2f} for {high} of {scored} {units_word(result.unit)} "
            f"scored by PSIS (max {result.max_khat:.2f}; Vehtari et al. 2024)")


def _row_warnings(result: CVResult, is_reference: bool, is_ranked: bool, diff: float, se_diff: float) -> str:
    """The '; '-joined warnings of one row."""
    notes: list[str] = []
    if not is_ranked:
        notes.append(_unranked_reason(result))
    elif result.grade == "marginal" and not any(w.lower().startswith(MARGINAL) for w in result.warnings):
        notes.append(MARGINAL_WARNING)
    notes.extend(result.warnings)
    if not is_reference and np.isfinite(diff):
        if abs(diff) < SMALL_DIFF:
            notes.append(SMALL_DIFF_WARNING)
        if abs(diff) < SE_MULTIPLE * se_diff:
            notes.append(WITHIN_SE_WARNING)
    khat = _khat_warning(result)
    if khat:
        notes.append(khat)
    return "; ".join(notes)


def _row(res: CVResult, rank_value: object, weight: float, reference: CVResult | None,
         types: list[str], is_ranked: bool) -> dict[str, object]:
    """One row of the table."""
    if reference is None:
        diff, se_diff = float("nan"), float("nan")
    else:
        diff, se_diff = paired_difference(res, reference)
    row: dict[str, object] = {
        "structure": res.structure, "rank": rank_value, "elpd": res.elpd, "se": res.se, "mcse": res.mcse,
        "elpd_diff": diff, "se_diff": se_diff, "weight": weight,
        "rmse": float(res.rmse.get("all", np.nan)), "r2": float(res.r2.get("all", np.nan)),
    }
    for t in types:
        row[f"rmse_{t}"] = float(res.rmse.get(t, np.nan))
        row[f"r2_{t}"] = float(res.r2.get(t, np.nan))
    row.update({
        "n_refits": res.n_refits, "max_khat": res.max_khat, "converged": int(res.converged),
        "warnings": _row_warnings(res, res is reference, is_ranked, diff, se_diff),
    })
    return row


def rank(results: list[CVResult]) -> pd.DataFrame:
    """Rank structures by their leave-one-unit-out elpd.

    Parameters
    ----------
    results
        One result per structure, over the same units (same order), all leave-one-out or all
        grouped K-fold.

    Returns
    -------
    pandas.DataFrame
        One row per structure, ranked ones best first, then the unranked ones; columns
        :func:`table_columns` of the curve types found. ``rank`` (nullable integer) starts at 1,
        exactly tied elpd share a rank, and it is NA for unranked structures (grade "failed" or
        not scored reliably). ``elpd_diff`` and ``se_diff`` are relative to the best ranked
        structure (for an unranked row ``elpd_diff`` may be positive; when nothing is ranked,
        relative to the structure with the highest finite elpd, for information). ``weight`` is
        the stacking weight among ranked structures (NaN for unranked ones). ``converged`` is 1
        for grade "converged", else 0. Every column but ``structure`` and ``warnings`` is numeric.

    Raises
    ------
    ValueError
        If the results are not comparable (see :func:`leafcv.cv.result.check_comparable`; the
        message names the structures).
    """
    check_comparable(results)
    ranked, unranked = _ordered(results)
    finite = [r for r in unranked if np.isfinite(r.elpd)]
    reference = ranked[0] if ranked else (finite[0] if finite else None)
    weights = compare_results({r.structure: r for r in ranked}) if ranked else pd.Series(dtype=float)
    ranks: list[object] = [*_competition_ranks([r.elpd for r in ranked]), *[pd.NA] * len(unranked)]
    types = curve_types(results)
    rows = [_row(res, ranks[pos], float(weights[res.structure]) if pos < len(ranked) else np.nan,
                 reference, types, pos < len(ranked))
            for pos, res in enumerate([*ranked, *unranked])]
    columns = table_columns(types)
    table = pd.DataFrame(rows, columns=columns)
    table["rank"] = table["rank"].astype("Int64")
    table["n_refits"] = table["n_refits"].astype("int64")
    table["converged"] = table["converged"].astype("int64")
    numeric = [c for c in columns if c not in ("structure", "rank", "n_refits", "converged", "warnings")]
    table[numeric] = table[numeric].astype(float)
    return table


# ----------------------------------------------------------------------------------------------
# sentences and text for the report and the terminal

def _failed(row: pd.Series) -> bool:
    """Whether an unranked row is unranked because its fits failed (its warnings start with
    :data:`NOT_RANKED`, written by :func:`rank`), rather than only because it could not be scored."""
    return str(row["warnings"]).startswith(NOT_RANKED)


def _not_ranked_why(row: pd.Series) -> str:
    """Why an unranked row is unranked, as a clause."""
    return "its fits did not pass their diagnostics" if _failed(row) else \
        "it could not be scored reliably (see its warnings)"


def _overshadowing_note(table: pd.DataFrame) -> str | None:
    """A sentence when an unranked structure's elpd exceeds the best ranked one's by more than
    SE_MULTIPLE paired SEs, else None."""
    ranked = table[table["rank"].notna()]
    unranked = table[table["rank"].isna()]
    if ranked.empty:
        return None
    better = unranked[(unranked["elpd_diff"] > 0) & (unranked["elpd_diff"] > SE_MULTIPLE * unranked["se_diff"])]
    if better.empty:
        return None
    lead = f"Among ranked structures {ranked.iloc[0]['structure']} has the highest elpd, but unranked "
    if len(better) == 1:
        row = better.iloc[0]
        return (lead + f"{row['structure']} scored {row['elpd_diff']:.1f} nats higher (SE {row['se_diff']:.1f}): "
                f"{_not_ranked_why(row)}, so neither can be recommended without a refit.")
    parts = [f"{row['structure']} by {row['elpd_diff']:.1f} nats (SE {row['se_diff']:.1f}; {_not_ranked_why(row)})"
             for _, row in better.iterrows()]
    return lead + f"structures scored higher: {', '.join(parts)}; none of them can be recommended without a refit."


def _lead_sentence(table: pd.DataFrame, unit: str, overshadowed: bool) -> str | None:
    """Which ranked structure leads and whether its lead over the runner-up is clear.

    When an unranked structure scored clearly higher (``overshadowed``), the sentence speaks of
    the lead among ranked structures only and never calls the leader best.
    """
    ranked = table[table["rank"].notna()]
    if ranked.empty:
        return None
    best = ranked.iloc[0]
    name = best["structure"]
    if len(ranked) == 1:
        return None if overshadowed else f"{name} is the only ranked structure, so there is nothing to compare it with."
    runner = ranked.iloc[1]
    if runner["rank"] == best["rank"]:
        among = " among ranked structures" if overshadowed else ""
        return f"{name} and {runner['structure']} are tied for the {'highest' if overshadowed else 'best'} elpd{among}."
    gap, se = abs(float(runner["elpd_diff"])), float(runner["se_diff"])
    numbers = f"{gap:.1f} nats, SE {se:.1f}"
    lead = f"Among ranked structures, {name}'s lead over {runner['structure']} ({numbers})"
    if gap >= SMALL_DIFF and gap >= SE_MULTIPLE * se:
        new = "new leaves" if unit == "leaf" else f"new levels of {unit}"
        return f"{lead} is clear." if overshadowed else \
            f"{name} predicts {new} best; its lead over {runner['structure']} ({numbers}) is clear."
    reasons = []
    if gap < SMALL_DIFF:
        reasons.append(f"smaller than {SMALL_DIFF:g} nats")
    if not np.isfinite(se):
        reasons.append(f"without an SE (fewer than 2 {units_word(unit)})")
    elif gap < SE_MULTIPLE * se:
        reasons.append(f"within {SE_MULTIPLE:g} SE")
    why = f"is not clear: it is {' and '.join(reasons)}."
    return f"{lead} {why}" if overshadowed else \
        f"{name} has the highest elpd, but its lead over {runner['structure']} ({numbers}) {why}"


def summary_notes(table: pd.DataFrame, n_leaves: int, unit: str = "leaf") -> list[str]:
    """Plain sentences about a ranking table for the report.

    Parameters
    ----------
    table
        Output of :func:`rank`.
    n_leaves
        Number of held-out units (leaves, or levels of ``unit``) the structures were scored on.
    unit
        What a held-out unit is: ``"leaf"`` or a grouping name such as ``"species"``.

    Returns
    -------
    list of str
        First, an unranked structure that scored clearly higher than every ranked one, if any;
        the leading structure and whether its lead is clear; unranked and marginal structures;
        caveats on few units (Sivula et al. 2020) and many structures (McLatchie & Vehtari
        2024); what the weights mean.
    """
    if table.empty:
        raise ValueError("the ranking table is empty")
    units = units_word(unit)
    overshadowing = _overshadowing_note(table)
    notes = [overshadowing] if overshadowing else []
    lead = _lead_sentence(table, unit, overshadowed=overshadowing is not None)
    if lead:
        notes.append(lead)
    is_ranked = table["rank"].notna()
    unranked = table[~is_ranked]
    listed = ", ".join(f"{row['structure']} ({'fits did not converge' if _failed(row) else 'not scored reliably'})"
                       for _, row in unranked.iterrows())
    if unranked.shape[0] == len(table):
        notes.append(f"No structure could be ranked ({listed}): the elpd values are shown for information only "
                     "and should not be relied on.")
    elif not unranked.empty:
        notes.append(f"{len(unranked)} structure(s) not ranked are listed last without a rank: {listed}.")
    marginal = table.loc[is_ranked & (table["converged"] == 0), "structure"].tolist()
    if marginal:
        notes.append(f"Ranked although their fits passed diagnostics only marginally (see the warnings): {', '.join(marginal)}.")
    if n_leaves < FEW_LEAVES:
        notes.append(f"With fewer than {FEW_LEAVES} {units} (here {n_leaves}) the normal approximation of the SE of "
                     "differences is rough (Sivula et al. 2020).")
    if len(table) > MANY_STRUCTURES:
        notes.append(f"With {len(table)} structures compared, picking the best of them is itself optimistic: the winner's "
                     "lead is biased upwards (selection bias; McLatchie & Vehtari 2024).")
    if table["weight"].notna().sum() > 1:
        notes.append("Stacking weights say how to combine the structures' predictions; they are not model probabilities "
                     "(Yao et al. 2018).")
    return notes


def _cell(column: str, value: object, ranked: bool) -> str:
    """Text of one table cell; ``ranked`` tells a marginal structure (ranked, not converged) from a failed one."""
    if value is pd.NA or value is None or (isinstance(value, float) and np.isnan(value)):
        return "-"
    if column in ("elpd", "se", "elpd_diff", "se_diff"):
        return f"{value:.1f}"
    if column in ("mcse", "weight", "max_khat"):
        return f"{value:.2f}"
    if column in ("rmse", "r2"):
        return f"{value:.3g}"
    if column == "converged":
        return "yes" if value else ("marginal" if ranked else "NO")
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
        The per-curve-type columns are left out (they are in the CSV).
    """
    shown = [c for c in COLUMNS if c != "warnings"]
    ranked = table["rank"].notna().tolist()
    text = {c: [c] + [_cell(c, v, r) for v, r in zip(table[c], ranked)] for c in shown}
    width = {c: max(len(s) for s in text[c]) for c in shown}
    lines = []
    for i in range(len(table) + 1):
        cells = [text[c][i].ljust(width[c]) if c == "structure" else text[c][i].rjust(width[c]) for c in shown]
        lines.append("  ".join(cells).rstrip())
    flagged = [(s, w) for s, w in zip(table["structure"], table["warnings"]) if w]
    if flagged:
        lines.append("")
        lines.append("Warnings:")
        lines.extend(f"  {s}: {w}" for s, w in flagged)
    return "\n".join(lines)
