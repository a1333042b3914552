"""Response curves within a leaf's points (`leafcv.data.reading` calls `find_curves`): the curve id and
type (A–Ci or A–Q) of every point, from a mapped curve column or, without one, from the PPFD levels
within each leaf; problems with curves; one note on how they were found. Tests: tests/test_data_reading.py.
"""
from __future__ import annotations

import re

import numpy as np

from .messages import rows as _rows

# Common practice, no source.
PPFD_LEVEL_TOLERANCE = 0.02        # relative: PPFD values this close form one light level
PPFD_LEVEL_FLOOR = 1.0             # umol m-2 s-1: absolute tolerance near darkness
MIN_ACI_POINTS = 4                 # points at one light level that make an A-Ci curve
CONSTANT_CV = 0.02                 # a curve with both CVs below this does not vary
CV_MEAN_FLOOR = 1.0                # floor on |mean| in the CV, so dark (PPFD 0) curves stay finite


def indices_by(keys: np.ndarray) -> dict[object, np.ndarray]:
    """Row positions of each non-empty key, keys in order of first appearance."""
    present = np.flatnonzero(keys != "")
    groups: dict[object, list[int]] = {}
    for i in present:
        groups.setdefault(keys[i], []).append(int(i))
    return {k: np.asarray(v) for k, v in groups.items()}


def _cv(values: np.ndarray) -> float:
    """Coefficient of variation with |mean| floored at CV_MEAN_FLOOR."""
    return float(np.std(values) / max(abs(float(np.mean(values))), CV_MEAN_FLOOR))


def _light_levels(ppfd: np.ndarray) -> np.ndarray:
    """Level number of each point (-1 where PPFD is unknown): sorted values within tolerance of a level's first."""
    level = np.full(len(ppfd), -1)
    known = np.flatnonzero(np.isfinite(ppfd))
    current, anchor = -1, 0.0
    for i in known[np.argsort(ppfd[known], kind="stable")]:
        if current < 0 or ppfd[i] - anchor > max(PPFD_LEVEL_TOLERANCE * abs(anchor), PPFD_LEVEL_FLOOR):
            current, anchor = current + 1, ppfd[i]
        level[i] = current
    return level


def _split_leaf(ppfd: np.ndarray) -> list[np.ndarray]:
    """Positions of each curve of one leaf: one per light level with >= MIN_ACI_POINTS points, then the rest."""
    level = _light_levels(ppfd)
    sizes = np.bincount(level[level >= 0], minlength=1)
    big = [k for k in dict.fromkeys(level[level >= 0].tolist()) if sizes[k] >= MIN_ACI_POINTS]
    curves = [np.flatnonzero(level == k) for k in big]
    rest = np.flatnonzero((level >= 0) & ~np.isin(level, big))
    return curves + ([rest] if rest.size else [])


def find_curves(leaf: np.ndarray, curve_ids: np.ndarray | None, ci: np.ndarray | None, ppfd: np.ndarray | None,
            rows: np.ndarray, curve_name: str | None) -> tuple[np.ndarray, np.ndarray, list[str], list[str]]:
    """Curve id and type of every point, problems with curves, and one note on how they were found."""
    n = len(leaf)
    curve = np.full(n, "", dtype=object) if curve_ids is None else curve_ids.copy()
    kinds = np.full(n, "", dtype=object)
    if ci is None or ppfd is None:
        return curve, kinds, [], []
    problems = []
    for leaf_id, index in indices_by(leaf).items():
        parts = _split_leaf(ppfd[index]) if curve_ids is None else indices_by(curve_ids[index]).values()
        seen: dict[str, int] = {}
        for member in (index[part] for part in parts):
            kind, constant = _curve_kind(ci[member], ppfd[member])
            if constant:
                where = "points grouped by the PPFD rule" if curve_ids is None else f"curve {curve[member[0]]!r}"
                problems.append(f"leaf {leaf_id!r}, {where} ({_rows(rows[member])}): curve has constant Ci "
                                f"and PPFD; {_constant_advice(curve_name)}")
            if kind is None:
                continue
            kinds[member] = kind
            if curve_ids is None:
                seen[kind] = seen.get(kind, 0) + 1
                curve[member] = kind if seen[kind] == 1 else f"{kind}-{seen[kind]}"
            else:
                problems += _label_problem(leaf_id, curve[member[0]], kind, curve_name)
    return curve, kinds, problems, [_curve_note(curve, kinds, leaf, curve_name)]


def _curve_kind(ci: np.ndarray, ppfd: np.ndarray) -> tuple[str | None, bool]:
    """("aci" | "aq", _) from the larger CV; (None, True) when neither varies; (None, False) without data."""
    ok = np.isfinite(ci) & np.isfinite(ppfd)
    if not ok.any():
        return None, False
    cv_ci, cv_ppfd = _cv(ci[ok]), _cv(ppfd[ok])
    if cv_ci < CONSTANT_CV and cv_ppfd < CONSTANT_CV:
        return None, True
    return ("aci" if cv_ci > cv_ppfd else "aq"), False


def _constant_advice(curve_name: str | None) -> str:
    if curve_name is None:
        return ("within a leaf, points at one PPFD (within 2 %) form an A–Ci curve when there are at least "
                f"{MIN_ACI_POINTS}, and the rest form one curve; map a curve column under [data.columns] or "
                "remove these points")
    return f"a response curve needs Ci or PPFD to vary: check the ids in column {curve_name!r} or remove these points"


def _label_problem(leaf_id: object, curve_id: str, kind: str, curve_name: str | None) -> list[str]:
    """A curve id that names a type ('aci', 'A-Q', ...) must agree with the inferred type."""
    named = re.sub(r"[^a-z]", "", curve_id.lower())
    if named in ("aci", "aq") and named != kind:
        other, reads = ("Ci", "A–Ci") if kind == "aci" else ("PPFD", "A–Q")
        return [f"leaf {leaf_id!r}, curve {curve_id!r} (column {curve_name!r}) is labelled {curve_id!r} but its "
                f"{other} varies more, so it reads as an {reads} curve; check the label"]
    return []


def _curve_note(curve: np.ndarray, kinds: np.ndarray, leaf: np.ndarray, curve_name: str | None) -> str:
    pairs = {(l, c): k for l, c, k in zip(leaf, curve, kinds) if k}
    n_aci = sum(k == "aci" for k in pairs.values())
    n_aq = len(pairs) - n_aci
    if curve_name is None:
        how = (f"no curve column mapped: within each leaf, points whose PPFD agrees within 2 % form an A–Ci "
               f"curve when there are at least {MIN_ACI_POINTS} of them, and the remaining points form one more "
               f"curve; ")
    else:
        how = f"curves are the (leaf, {curve_name!r}) pairs; "
    return (how + f"curve type inferred per curve from the relative spread (coefficient of variation) of Ci and "
            f"PPFD: {n_aci} A–Ci, {n_aq} A–Q")
