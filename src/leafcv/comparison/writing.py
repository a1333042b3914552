"""Writing a comparison file from Python values (`leafcv.api.from_frame`): the restricted TOML a
comparison file uses (strings, numbers, booleans, lists, tables, arrays of tables), read back by
`load_comparison` like any file a user writes."""
from __future__ import annotations

import json
import math
import re
from typing import Any

_BARE = re.compile(r"[A-Za-z0-9_-]+")


def _key(k: str) -> str:
    return k if _BARE.fullmatch(k) else json.dumps(k)


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"a comparison file holds finite numbers only, got {v!r}")
        return repr(float(v))                          # float(): a NumPy float's repr is not TOML
    if isinstance(v, str):
        # JSON string escapes are valid TOML basic strings; TOML also forbids a raw DEL
        return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(str(k))} = {_value(x)}" for k, x in v.items()) + " }"
    if hasattr(v, "item"):                             # a NumPy scalar
        return _value(v.item())
    raise TypeError(f"cannot write {type(v).__name__} {v!r} into a comparison file")


def _table(lines: list[str], name: str, table: dict, header: str) -> None:
    """``table``'s plain keys under ``header``, then its sub-tables as [name.sub]."""
    plain = {k: v for k, v in table.items() if not isinstance(v, dict)}
    subs = {k: v for k, v in table.items() if isinstance(v, dict)}
    lines.append(header)
    lines += [f"{_key(k)} = {_value(v)}" for k, v in plain.items()]
    for k, v in subs.items():
        _table(lines, f"{name}.{_key(k)}", v, f"[{name}.{_key(k)}]")


def comparison_text(raw: dict[str, Any], comment: str = "") -> str:
    """TOML text of a comparison: top-level keys, then tables, then [[structure]] and [[grid]] entries
    (each entry's parameters as inline tables)."""
    lines = [f"# {line}" for line in comment.splitlines()]
    tables = {k: v for k, v in raw.items() if isinstance(v, dict)}
    arrays = {k: v for k, v in raw.items() if isinstance(v, list) and v and all(isinstance(x, dict) for x in v)}
    for k, v in raw.items():
        if k not in tables and k not in arrays:
            lines.append(f"{_key(k)} = {_value(v)}")
    for k, v in tables.items():
        lines.append("")
        _table(lines, _key(k), v, f"[{_key(k)}]")
    for k, entries in arrays.items():
        for entry in entries:
            lines += ["", f"[[{_key(k)}]]"]
            lines += [f"{_key(str(a))} = {_value(b)}" for a, b in entry.items()]
    return "\n".join(lines) + "\n"
