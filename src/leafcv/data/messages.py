"""Pieces of the data layer's messages: columns, rows and values as users see them.

Tests: tests/test_data_reading.py, tests/data/test_frame.py, tests/data/test_mapping.py.
"""
from __future__ import annotations

from collections.abc import Sequence

MAX_LISTED = 8                     # rows (or leaves) listed in one message before "and N more"


def rows(numbers: Sequence[int], limit: int = MAX_LISTED) -> str:
    """'row 5' or 'rows 5, 6, 7 and 12 more'."""
    numbers = [int(r) for r in numbers]
    shown = ", ".join(str(r) for r in numbers[:limit])
    more = f" and {len(numbers) - limit} more" if len(numbers) > limit else ""
    return f"{'row' if len(numbers) == 1 else 'rows'} {shown}{more}"


def rows_values(numbers: Sequence[int], values: Sequence[object]) -> str:
    """'rows 5 ('abc'), 9 ('1,2') and 3 more'."""
    pairs = [f"{int(r)} ({show(v)})" for r, v in zip(numbers[:MAX_LISTED], values[:MAX_LISTED])]
    more = f" and {len(numbers) - MAX_LISTED} more" if len(numbers) > MAX_LISTED else ""
    return f"{'row' if len(numbers) == 1 else 'rows'} {', '.join(pairs)}{more}"


def show(value: object) -> str:
    return f"{value:g}" if isinstance(value, float) else repr(value)


def label(name: str, role: str) -> str:
    return f"column {name!r} ({role})"


def kind_of(value: object) -> str:
    """Name a written value's type, with the value when it is short: ``a string ('4')``, ``an integer (3)``.

    Used for the values of a comparison file (TOML) and of a `DataSpec` built in Python alike.
    """
    if isinstance(value, bool):
        return f"true/false ({str(value).lower()})"
    if isinstance(value, int):
        return f"an integer ({value})"
    if isinstance(value, float):
        return f"a number ({value:g})"
    if isinstance(value, str):
        return f"a string ({value!r})"
    if isinstance(value, (list, tuple)):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    if value is None:
        return "nothing (None)"
    return f"a date/time ({value})" if hasattr(value, "isoformat") else f"a {type(value).__name__}"
