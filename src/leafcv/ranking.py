"""Ranking of structures by how well they predict a new leaf (or a new level of a grouping).

Totals and differences are computed here from the per-unit elpd, with the sample variance
(``ddof=1``): ``se = sqrt(G · var(elpd_g, ddof=1))`` and, paired over units with
d_g = elpd_g(structure) − elpd_g(best), ``elpd_diff = Σ d_g`` and
``se_diff = sqrt(G · var(d_g, ddof=1))`` (Vehtari, Gelman & Gabry 2017, Stat Comput
27:1413-1432, eq. 23 and sec. 5.2, recalled from memory; ArviZ 0.23 uses ``ddof=0``). Only the
stacking weights (Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis 13:917-1007) come from
ArviZ's ``compare`` through :mod:`leafcv.cv.arviz_bridge`; :func:`stacking_weights` (in :mod:`leafcv.stacking`)
is an independent implementation used to cross-check them.

Structures graded "failed" and structures that could not be scored reliably are listed after the
ranked ones, without a rank and without a stacking weight: they are never silently averaged in.
Structures graded "marginal" are ranked, with a warning.

Every column of the table is numeric except ``structure`` and ``warnings``; held-out RMSE and R²
per curve type have their own columns ``rmse_<curve type>`` and ``r2_<curve type>``. ``quad_bound``
is the structure's summed per-unit quadrature bound (nats).

One decision rule (:func:`told_apart`) serves the table's warnings, the sentences below it and the
report: two structures a and b are *not told apart* when

- |Δelpd| < 4 nats (Sivula, Magnusson, Matamoros & Vehtari 2020), or
- |Δelpd| <= 2·sqrt(SE_diff² + MCSE_a² + MCSE_b²) + B_a + B_b, where MCSE is a structure's Monte
  Carlo SE of its total and B the sum of its per-unit quadrature bounds (the factor 2: common
  practice, no source; a bound of +inf, or an SE that is NaN, means they cannot be told apart), or
- with fewer than 10 held-out units, dropping any one unit changes the sign of the difference or
  brings it below 4 nats (a leave-one-unit-out check: common practice, no source).

A structure that could not be ranked but whose score is above the best ranked one's (elpd_diff > 0)
is named first, and the leader is then only "the best among the reliably scored structures".
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .cv.arviz_bridge import compare_results
from .cv.result import CVResult, check_comparable
from .stacking import _negative_mean_log_score, stacking_weights  # noqa: F401  (re-exported)
from .data.dataset import LEAF_TERM

# columns without the per-curve-type pairs, which go after "r2" (see table_columns)
COLUMNS = [
    "structure", "rank", "elpd", "se", "mcse", "quad_bound", "elpd_diff", "se_diff", "weight",
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
FEW_UNITS = 10         # below this, a lead must survive dropping any one unit: common practice, no source
NOT_TOLD_APART = "not told apart from the best"
#: The rule in words, for the report's methods text (see the module docstring).
RULE_WORDS = (f"Two structures are not told apart when their difference is smaller than {SMALL_DIFF:g} nats "
              f"(Sivula et al. 2020), or when |Δelpd| ≤ {SE_MULTIPLE:g}·√(SE_diff² + MCSE_a² + MCSE_b²) "
              "+ B_a + B_b, the standard error of the paired difference widened by both structures' Monte Carlo "
              "SEs, plus both structures' summed per-unit quadrature bounds B (the factor "
              f"{SE_MULTIPLE:g}: common practice, no source). With fewer than {FEW_UNITS} held-out units the SE "
              "of a difference is itself unreliable, so a difference must also keep its sign and stay at least "
              f"{SMALL_DIFF:g} nats whenever any one unit is dropped (a leave-one-unit-out check; common "
              "practice, no source).")


def units_word(unit: str) -> str:
    """How counts of held-out units read in sentences: "leaves" or "levels of <unit>"."""
    return "leaves" if unit == LEAF_TERM else f"levels of {unit}"


# ----------------------------------------------------------------------------------------------
# the decision rule

@dataclass(frozen=True)
class Verdict:
    """Whether two structures can be told apart (:func:`told_apart`); when not, why, in words."""

    told_apart: bool
    reasons: tuple[str, ...] = ()
    margin: float = float("nan")    # 2·sqrt(SE_diff² + MCSE_a² + MCSE_b²) + B_a + B_b, nats

    def why(self) -> str:
        """The reasons joined into one clause ("" when told apart)."""
        return " and ".join(self.reasons)


def summed_bound(quad_bound_i: Sequence[float]) -> float:
    """A structure's summed per-unit quadrature bounds (nats), as the decision rule weighs them.

    NaN when no unit has a bound (not computed: a result made without quadrature, e.g. built by hand;
    the rule counts it as 0); +inf when any unit's bound is +inf, or when some units have a bound and
    others none (the missing ones are unknown, so the rule cannot tell the structure apart); else
    the sum.
    """
    b = np.asarray(quad_bound_i, dtype=float)
    missing = np.isnan(b)
    if b.size == 0 or missing.all():
        return float("nan")
    if missing.any() or np.any(np.isinf(b)):
        return float("inf")
    return float(np.sum(b))


def _drop_one(per_unit: np.ndarray, unit_ids: Sequence[str] | None) -> str | None:
    """With fewer than FEW_UNITS units, why dropping one unit undoes the difference (None if it does not)."""
    d = np.asarray(per_unit, dtype=float)
    if d.size < 2 or d.size >= FEW_UNITS:
        return None
    total = float(np.sum(d))
    sign = 1.0 if total >= 0 else -1.0
    rest = total - d                       # the difference without each unit in turn
    worst = int(np.argmin(sign * rest))
    if sign * rest[worst] >= SMALL_DIFF:
        return None
    name = str(unit_ids[worst]) if unit_ids is not None else f"unit {worst + 1}"
    change = "changing its sign" if sign * rest[worst] < 0 else f"less than {SMALL_DIFF:g} in size"
    return (f"undone when {name} alone is dropped (with only {d.size} units the difference goes from {total:+.1f} "
            f"to {rest[worst]:+.1f} nats, {change}; leave-one-unit-out check)")


def told_apart(diff: float, se_diff: float, mcse: tuple[float, float] = (np.nan, np.nan),
               bounds: tuple[float, float] = (np.nan, np.nan), per_unit: Sequence[float] | None = None,
               unit_ids: Sequence[str] | None = None) -> Verdict:
    """leafcv's one decision rule: can two structures a and b be told apart?

    Parameters
    ----------
    diff, se_diff
        Δelpd = elpd_a − elpd_b and the SE of the paired difference.
    mcse
        Monte Carlo SEs of the two totals; NaN (not computed) counts as 0.
    bounds
        The two structures' summed quadrature bounds (:func:`summed_bound`); NaN (not computed)
        counts as 0, +inf means they cannot be told apart.
    per_unit
        The per-unit differences d_g (Σ d_g = diff); with fewer than :data:`FEW_UNITS` of them the
        difference must also keep its sign and stay >= 4 nats when any one unit is dropped.
    unit_ids
        The units' names, for the reasons.

    Returns
    -------
    Verdict
        Not told apart when |Δ| < 4 nats (Sivula et al. 2020); when the SE is NaN; when a bound is
        infinite; when |Δ| <= 2·sqrt(SE_diff² + MCSE_a² + MCSE_b²) + B_a + B_b (the factor 2:
        common practice, no source); or when the leave-one-unit-out check fails. ``reasons`` lists
        every one that applies.
    """
    diff, se = float(diff), float(se_diff)
    if not np.isfinite(diff):
        return Verdict(False, ("without a finite difference",))
    gap = abs(diff)
    reasons: list[str] = []
    if gap < SMALL_DIFF:
        reasons.append(f"smaller than {SMALL_DIFF:g} nats")
    ma, mb = (0.0 if np.isnan(m) else float(m) for m in mcse)
    ba, bb = (0.0 if np.isnan(b) else float(b) for b in bounds)
    margin = float("nan")
    if np.isnan(se):
        reasons.append("without an SE of the difference")
    elif np.isinf(ba) or np.isinf(bb):
        margin = float("inf")
        reasons.append("not measured to a stated accuracy (a summed quadrature bound is unknown or unbounded)")
    else:
        margin = SE_MULTIPLE * float(np.sqrt(se**2 + ma**2 + mb**2)) + ba + bb
        if gap <= SE_MULTIPLE * se:
            reasons.append(f"within {SE_MULTIPLE:g} SE of the difference ({SE_MULTIPLE * se:.1f} nats)")
        elif gap <= margin:
            reasons.append(f"within the margin {SE_MULTIPLE:g}·√(SE_diff² + MCSE_a² + MCSE_b²) + B_a + B_b = "
                           f"{SE_MULTIPLE:g}·√({se:.2f}² + {ma:.2f}² + {mb:.2f}²) + {ba:.2f} + {bb:.2f} = {margin:.1f} "
                           "nats (B: summed quadrature bounds)")
    if per_unit is not None:
        dropped = _drop_one(np.asarray(per_unit, dtype=float), unit_ids)
        if dropped:
            reasons.append(dropped)
    return Verdict(not reasons, tuple(reasons), margin)


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


def result_verdict(result: CVResult, reference: CVResult) -> Verdict:
    """:func:`told_apart` for a result against the reference (best ranked) result, from their
    per-unit values, MCSEs and summed quadrature bounds."""
    diff, se_diff = paired_difference(result, reference)
    return told_apart(diff, se_diff, (result.mcse, reference.mcse),
                      (summed_bound(result.quad_bound_i), summed_bound(reference.quad_bound_i)),
                      result.elpd_i - reference.elpd_i, result.leaves)


def _row_warnings(result: CVResult, is_ranked: bool, verdict: Verdict | None) -> str:
    """The '; '-joined warnings of one row (``verdict``: against the best, None for the best itself)."""
    notes: list[str] = []
    if not is_ranked:
        notes.append(_unranked_reason(result))
    elif result.grade == "marginal" and not any(w.lower().startswith(MARGINAL) for w in result.warnings):
        notes.append(MARGINAL_WARNING)
    notes.extend(result.warnings)
    if verdict is not None and not verdict.told_apart:
        notes.append(f"{NOT_TOLD_APART}: {verdict.why()}")
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
    verdict = result_verdict(res, reference) if reference is not None and res is not reference \
        and np.isfinite(diff) else None
    row: dict[str, object] = {
        "structure": res.structure, "rank": rank_value, "elpd": res.elpd, "se": res.se, "mcse": res.mcse,
        "quad_bound": summed_bound(res.quad_bound_i), "elpd_diff": diff, "se_diff": se_diff, "weight": weight,
        "rmse": float(res.rmse.get("all", np.nan)), "r2": float(res.r2.get("all", np.nan)),
    }
    for t in types:
        row[f"rmse_{t}"] = float(res.rmse.get(t, np.nan))
        row[f"r2_{t}"] = float(res.r2.get(t, np.nan))
    row.update({
        "n_refits": res.n_refits, "max_khat": res.max_khat, "converged": int(res.converged),
        "warnings": _row_warnings(res, is_ranked, verdict),
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
        for grade "converged", else 0. ``quad_bound`` is the summed per-unit quadrature bound
        (:func:`summed_bound`: NaN when not computed, inf when some unit has none). A row not told
        apart from the best (:func:`told_apart`) says so in its warnings, with the reasons. Every
        column but ``structure`` and ``warnings`` is numeric.

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


def _value(row: pd.Series, column: str) -> float:
    """A numeric cell, NaN when the column is absent (a ranking.csv written before it existed)."""
    value = row.get(column, np.nan)
    return float("nan") if value is None or value is pd.NA else float(value)


def pair_verdict(table: pd.DataFrame, a: str, b: str, pointwise: pd.DataFrame | None = None,
                 n_units: int | None = None) -> tuple[float, float, Verdict]:
    """(Δelpd = a − b, its SE, :func:`told_apart`) for two structures of a ranking table.

    When ``b`` is the table's reference (the best ranked structure) Δ and SE are a's
    ``elpd_diff`` and ``se_diff``, exactly as :func:`rank` judged them; otherwise they are paired
    over the units of ``pointwise`` (pointwise.csv: the unit column first, then ``elpd:<structure>``;
    SE NaN without it). MCSE and summed quadrature bounds come from the table's rows. With fewer
    than :data:`FEW_UNITS` units (``n_units``, else the length of ``pointwise``) and no per-unit
    values the difference is not told apart.
    """
    rows = table.set_index("structure")
    ra, rb = rows.loc[a], rows.loc[b]
    ranked = table[table["rank"].notna()]
    reference = str(ranked.iloc[0]["structure"]) if not ranked.empty else None
    per_unit = ids = None
    if pointwise is not None and f"elpd:{a}" in pointwise and f"elpd:{b}" in pointwise:
        per_unit = pointwise[f"elpd:{a}"].to_numpy(float) - pointwise[f"elpd:{b}"].to_numpy(float)
        ids = [str(u) for u in pointwise.iloc[:, 0]]
    if b == reference:
        diff, se = _value(ra, "elpd_diff"), _value(ra, "se_diff")
    else:
        diff = _value(ra, "elpd") - _value(rb, "elpd")
        se = float(np.sqrt(per_unit.size * np.var(per_unit, ddof=1))) \
            if per_unit is not None and per_unit.size > 1 else float("nan")
    verdict = told_apart(diff, se, (_value(ra, "mcse"), _value(rb, "mcse")),
                         (_value(ra, "quad_bound"), _value(rb, "quad_bound")), per_unit, ids)
    n = n_units if n_units is not None else (len(pointwise) if pointwise is not None else None)
    if per_unit is None and n is not None and 1 < n < FEW_UNITS and verdict.told_apart:
        verdict = Verdict(False, (f"with only {n} units, the per-unit values needed for the leave-one-unit-out "
                                  "check are not available",), verdict.margin)
    return diff, se, verdict


def overshadowing_notes(table: pd.DataFrame) -> list[str]:
    """One sentence per structure that could not be ranked but scored above the best ranked one
    (``elpd_diff`` > 0, whatever its SE), highest first; empty when there is none (or nothing is
    ranked). The report's decision box shows the same sentences."""
    ranked = table[table["rank"].notna()]
    if ranked.empty:
        return []
    leader = str(ranked.iloc[0]["structure"])
    unranked = table[table["rank"].isna()]
    higher = unranked[np.isfinite(unranked["elpd_diff"].to_numpy(float)) & (unranked["elpd_diff"] > 0)]
    higher = higher.sort_values("elpd_diff", ascending=False, kind="stable")
    out = []
    for k, (_, row) in enumerate(higher.iterrows()):
        name = row["structure"]
        who = f"{name}'s fits did not pass their diagnostics" if _failed(row) else \
            f"{name} could not be scored reliably"
        would = "would make it the best" if k == 0 else f"would place it above {leader}"
        out.append(f"{who}; its score, {row['elpd_diff']:.1f} nats higher, {would}; see Diagnostics.")
    return out


def _numbers(runner: pd.Series, se: float) -> str:
    return f"{abs(float(runner['elpd_diff'])):.1f} nats, SE {se:.1f}"


def _lead_sentence(table: pd.DataFrame, unit: str, overshadowed: bool, pointwise: pd.DataFrame | None,
                   n_units: int) -> str | None:
    """Which ranked structure leads and whether its lead over the runner-up is clear (:func:`told_apart`).

    When an unranked structure scored higher (``overshadowed``) the leader is only "the best among
    the reliably scored structures"."""
    ranked = table[table["rank"].notna()]
    if ranked.empty:
        return None
    best = ranked.iloc[0]
    name = best["structure"]
    among = "the best among the reliably scored structures"
    if len(ranked) == 1:
        return f"{name} is {among}, and the only one." if overshadowed else \
            f"{name} is the only ranked structure, so there is nothing to compare it with."
    runner = ranked.iloc[1]
    if runner["rank"] == best["rank"]:
        return (f"{name} and {runner['structure']} are tied for the highest elpd among the reliably scored "
                "structures." if overshadowed else f"{name} and {runner['structure']} are tied for the best elpd.")
    _, se, verdict = pair_verdict(table, runner["structure"], name, pointwise, n_units)
    numbers = _numbers(runner, se)
    if verdict.told_apart:
        new = "new leaves" if unit == LEAF_TERM else f"new levels of {unit}"
        return f"{name} is {among}; its lead over {runner['structure']} ({numbers}) is clear." if overshadowed else \
            f"{name} predicts {new} best; its lead over {runner['structure']} ({numbers}) is clear."
    why = f"is not clear: it is {verdict.why()}."
    return f"{name} is {among}, but its lead over {runner['structure']} ({numbers}) {why}" if overshadowed else \
        f"{name} has the highest elpd, but its lead over {runner['structure']} ({numbers}) {why}"


def few_units_note(n_units: int, unit: str) -> str | None:
    """With fewer than :data:`FEW_UNITS` units: the SE of a difference is unreliable, and what is asked instead."""
    if n_units >= FEW_UNITS:
        return None
    return (f"With only {n_units} {units_word(unit)}, the SE of a difference over so few units is unreliable: a lead "
            f"is called clear only if it also keeps its sign and stays at least {SMALL_DIFF:g} nats whenever any "
            "single unit is dropped (leave-one-unit-out check; common practice, no source).")


def summary_notes(table: pd.DataFrame, n_leaves: int, unit: str = "leaf",
                  pointwise: pd.DataFrame | None = None) -> list[str]:
    """Plain sentences about a ranking table for the report.

    Parameters
    ----------
    table
        Output of :func:`rank`.
    n_leaves
        Number of held-out units (leaves, or levels of ``unit``) the structures were scored on.
    unit
        What a held-out unit is: ``"leaf"`` or a grouping name such as ``"species"``.
    pointwise
        The per-unit elpd (pointwise.csv's layout), for the leave-one-unit-out check with fewer
        than :data:`FEW_UNITS` units; without it such a lead is not called clear.

    Returns
    -------
    list of str
        First, each unranked structure that scored above the best ranked one
        (:func:`overshadowing_notes`); the leading structure and whether its lead is clear
        (:func:`told_apart`); unranked and marginal structures; caveats on few units (Sivula et
        al. 2020; fewer than 10: common practice, no source) and many structures (McLatchie &
        Vehtari 2024); what the weights mean.
    """
    if table.empty:
        raise ValueError("the ranking table is empty")
    units = units_word(unit)
    notes = overshadowing_notes(table)
    lead = _lead_sentence(table, unit, bool(notes), pointwise, n_leaves)
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
    few = few_units_note(n_leaves, unit) if is_ranked.sum() > 1 else None
    if few:
        notes.append(few)
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
    if column in ("mcse", "quad_bound", "weight", "max_khat"):
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
