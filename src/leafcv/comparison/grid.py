"""[[grid]]: combinations of partial structures expanded into named structures (format 2)."""
from __future__ import annotations

import itertools
from typing import Any

from ..spec import PARAMETERS, ModelOptions, Structure
from .checker import Checker, show, unknown
from .keys import GRID_KEYS, LEAF_TERM, NAME_RE
from .structures import parse_structure_body


def parse_grids(check: Checker, value: Any, groups, traits, model: ModelOptions, priors,
                taken: set[str]) -> list[Structure]:
    """Every [[grid]] expanded, in file order, into structures named
    ``<grid name>.leaf-<params joined by _ or none>.<axis>-<choice>...`` (leaf_effects first, then the
    choice axes in file order). ``taken`` holds the lower-cased names already used; expanded names are
    added to it."""
    if isinstance(value, dict):
        value = [value]
    if not isinstance(value, list):
        check.problem(f"grid: expected [[grid]] tables, got {show(value)}", "wrong-type", "grid")
        return []
    out: list[Structure] = []
    for number, grid in enumerate(value, start=1):
        where = f"grid #{number}"
        if not isinstance(grid, dict):
            check.problem(f"{where}: expected a table, got {show(grid)}", "wrong-type", where)
            continue
        check.keys(grid, GRID_KEYS, where)
        gname = grid.get("name")
        if not isinstance(gname, str) or not gname or not NAME_RE.fullmatch(gname):
            check.problem(f"{where}: name: expected a short name of letters, digits, '-', '_', '.' "
                          f"(it starts every expanded structure's name), got {show(gname)}", "bad-name",
                          f"{where}.name")
            continue
        where = f"grid {gname!r}"
        base = check.table(grid.get("base", {}), f"{where}.base")
        if "name" in base:
            check.problem(f"{where}.base: name is not allowed here; the names are made by the grid", "misplaced-key",
                          f"{where}.base.name")
        axes = _axes(check, grid, where)
        if not axes:
            check.problem(f"{where}: nothing to expand; add leaf_effects = [...] or [grid.choices.<axis>]",
                          "empty-grid", where)
            continue
        for combo in itertools.product(*[opts for _, opts in axes]):
            name = ".".join([gname] + [f"{axis}-{cname}" for (axis, _), (cname, _) in zip(axes, combo)])
            origin = f"grid {gname!r}: " + ", ".join(f"{axis}={cname}" for (axis, _), (cname, _) in zip(axes, combo))
            label = f"structure {name!r} ({origin})"
            item = base
            for (axis, _), (cname, body) in zip(axes, combo):
                item = _merge_structure(check, item, body, f"{where}, {axis}={cname}")
            if name.lower() in taken:
                check.problem(f"{label}: the name is already used by another structure; rename the grid or that "
                              "structure", "duplicate-name", f"structure {name!r}")
                continue
            taken.add(name.lower())
            st = parse_structure_body(check, item, name, label, groups, traits, model, priors, origin)
            if st is not None:
                out.append(st)
    return out


def _axes(check: Checker, grid: dict[str, Any], where: str) -> list[tuple[str, list[tuple[str, dict]]]]:
    """The grid's axes, each (axis name, [(choice name, partial structure), ...]): leaf_effects (every
    subset of the listed parameters) first, then each [grid.choices.<axis>] in file order."""
    axes: list[tuple[str, list[tuple[str, dict]]]] = []
    if "leaf_effects" in grid:
        lp = check.text_list(grid["leaf_effects"], f"{where}.leaf_effects")
        for p in [p for p in lp if p not in PARAMETERS]:
            check.problem(f"{where}.leaf_effects: " + unknown("parameter", p, PARAMETERS, "parameters"),
                          "unknown-parameter", f"{where}.leaf_effects")
        lp = [p for p in PARAMETERS if p in lp]
        subsets = [c for n in range(len(lp) + 1) for c in itertools.combinations(lp, n)]
        axes.append(("leaf", [("_".join(c) or "none", {p: {"random": [LEAF_TERM]} for p in c}) for c in subsets]))
    for axis, choices in check.table(grid.get("choices", {}), f"{where}.choices").items():
        if not NAME_RE.fullmatch(axis):
            check.problem(f"{where}.choices: axis name {axis!r} may only contain letters, digits, '-', '_', '.'",
                          "bad-name", f"{where}.choices.{axis}")
            continue
        table = check.table(choices, f"{where}.choices.{axis}")
        if not table:
            check.problem(f"{where}.choices.{axis}: no choices; give at least one, e.g. none = {{}}", "empty-value",
                          f"{where}.choices.{axis}")
            continue
        opts = []
        for cname, body in table.items():
            if not NAME_RE.fullmatch(cname):
                check.problem(f"{where}.choices.{axis}: choice name {cname!r} may only contain letters, digits, "
                              "'-', '_', '.'", "bad-name", f"{where}.choices.{axis}.{cname}")
            elif isinstance(body, dict):
                opts.append((cname, body))
            else:
                check.problem(f"{where}.choices.{axis}.{cname}: expected a table of structure keys, got {show(body)}",
                              "wrong-type", f"{where}.choices.{axis}.{cname}")
        axes.append((axis, opts))
    return axes


def _merge_structure(check: Checker, a: dict, b: dict, where: str) -> dict:
    """Merge partial structures: lists are joined (no repeats), tables merged key by key, and a scalar
    given twice with different values is a conflict."""
    out = dict(a)
    for key, value in b.items():
        if key not in out:
            out[key] = value
        elif isinstance(out[key], dict) and isinstance(value, dict):
            out[key] = _merge_structure(check, out[key], value, f"{where}, {key}")
        elif isinstance(out[key], list) and isinstance(value, list):
            out[key] = out[key] + [v for v in value if v not in out[key]]
        elif out[key] != value:
            check.problem(f"{where}: {key} is set to {show(out[key])} and to {show(value)}; a grid may "
                          "add to a structure but not change what the base or another axis set", "grid-conflict",
                          where)
    return out
