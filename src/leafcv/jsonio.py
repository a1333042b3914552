"""Values to JSON and numbers back: the one converter of leafcv's records, results, engine data and inits
(`plain`), and the one reader of the numbers it wrote (`json_float`, `json_floats`).

Tests: tests/test_jsonio.py.
"""
from __future__ import annotations

from typing import Any

import numpy as np


def plain(value: Any, strict: bool = False) -> Any:
    """``value`` with NumPy arrays and scalars as Python lists and numbers, dict keys as strings and string
    subclasses (a `leafcv.errors.Problem`) as plain strings, ready for ``json.dumps``.

    ``strict``: also non-finite floats as strict JSON allows them: NaN as None (null), infinities as the
    strings ``"inf"`` and ``"-inf"`` (`json_float` reads them back). Otherwise they stay floats, which
    ``json.dumps`` writes as JavaScript's NaN and Infinity (exact round trips, e.g. the task store)."""
    if isinstance(value, dict):
        return {str(k): plain(v, strict) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v, strict) for v in value]
    if isinstance(value, np.ndarray):
        return plain(value.tolist(), strict)
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, str):
        return str(value)
    if strict and isinstance(value, float) and not np.isfinite(value):
        return None if np.isnan(value) else ("inf" if value > 0 else "-inf")
    return value


def json_float(value: object) -> float:
    """One number written by `plain` read back: null as NaN, "inf"/"-inf" as infinities."""
    return float("nan") if value is None else float(value)


def json_floats(values: list | None, n: int | None = None) -> np.ndarray | None:
    """An array written by `plain` read back as floats. None (not computed) stays None, or gives ``n``
    NaN when ``n`` is given."""
    if values is None:
        return None if n is None else np.full(n, np.nan)
    return np.array([json_float(v) for v in values], dtype=float)
