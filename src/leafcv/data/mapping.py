"""The one check of a data mapping: which columns hold which observation variables, which columns are
leaf-level groups and traits, and the unit of intercellular CO2.

A comparison file's [data] section (`leafcv.comparison`) and `load_dataset` on a `DataSpec` built in
Python both call `check_mapping`, so a mapping breaks the same rules, in the same words and with the same
`Problem` codes, whichever way it arrives. Messages name each entry as a comparison file writes it (the
data role under [data.columns], the key under [data.units]); a Python user finds the same names in
`leafcv.data.roles`. What only a file can get wrong (a TOML value that is not a table, a key that was
renamed, a role key that does not exist) is checked by the comparison file's reader before it gets here.
"""
from __future__ import annotations

import difflib
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from ..errors import Problem
from ..spec import OPTIONAL_COLUMNS, REQUIRED_COLUMNS
from .dataset import LEAF_TERM
from .messages import kind_of
from .roles import CI_UNITS_KEY, ROLE_OF, VARIABLE_OF
from .units import CI_UNITS, PRESSURE_RANGE_KPA, plausible_pressure

__all__ = ["MappingCheck", "check_mapping"]

#: Ways of writing umol/mol that are read as a slip for it (in lower case).
_UMOL_ALIASES = frozenset({"ppm", "µmol/mol", "umol mol-1", "µmol mol-1"})


@dataclass(frozen=True)
class MappingCheck:
    """What `check_mapping` found: problems (each a `Problem`) and notes on what is ignored."""

    problems: tuple[Problem, ...] = ()
    notes: tuple[str, ...] = ()


def check_mapping(
    columns: Mapping[str, object], groups: Sequence[object] = (), traits: Sequence[object] = (),
    ci_unit: object = "umol/mol", pressure_kpa: object = None,
) -> MappingCheck:
    """Check a data mapping before any data are read.

    Parameters
    ----------
    columns
        Observation variable (``a_net``, ``ci``, ... as in `DataSpec.columns`) -> the user's column name.
    groups, traits
        The leaf-level grouping and numeric trait columns (the user's names).
    ci_unit, pressure_kpa
        The unit of intercellular CO2 and, for Pa, the air pressure in kPa.

    Returns
    -------
    MappingCheck
        Problems: ``unknown-key`` (a variable leafcv does not know), ``wrong-type`` / ``empty-value`` (a
        column name that is not a non-empty string), ``missing-role`` (a required variable not mapped),
        ``shared-column`` (two variables on one column), ``repeated-entry``, ``group-and-trait``,
        ``reserved-name`` (a leaf-level column called ``leaf``), ``leaf-id-column`` (the leaf id column
        listed as a group or trait), ``unknown-unit``, ``missing-pressure``, ``wrong-value`` (a pressure
        that is not a positive number), ``implausible-pressure``. Notes: a pressure given with Ci in umol/mol.
    """
    problems = _column_problems(columns) + _leaf_problems(columns, groups, traits)
    unit_problems, notes = _unit_problems(ci_unit, pressure_kpa)
    return MappingCheck(tuple(problems + unit_problems), tuple(notes))


def _column_problems(columns: Mapping[str, object]) -> list[Problem]:
    known = REQUIRED_COLUMNS + OPTIONAL_COLUMNS
    problems = []
    for var in columns:
        if var in known:
            continue
        hint = (f"; {var!r} is a data role, the name of {VARIABLE_OF[var]!r} in a comparison file"
                if var in VARIABLE_OF else "")
        problems.append(Problem(f"DataSpec.columns has unknown observation variable {var!r}{hint}; "
                                f"valid variables: {', '.join(known)}", "unknown-key", str(var)))
    by_column: dict[str, list[str]] = {}
    for var in known:
        role = ROLE_OF[var]
        where = f"data.columns.{role}"
        if var not in columns:
            if var in REQUIRED_COLUMNS:
                problems.append(Problem(f"data.columns: required data role {role!r} is missing; "
                                        f"add {role} = \"<your column>\"", "missing-role", where))
            continue
        name = columns[var]
        if not isinstance(name, str):
            problems.append(Problem(f"{where}: expected a string, got {kind_of(name)}", "wrong-type", where))
        elif not name.strip():
            problems.append(Problem(f"{where}: is empty", "empty-value", where))
        else:
            by_column.setdefault(name, []).append(role)
    for name, roles in by_column.items():
        if len(roles) > 1:
            named = ", ".join(roles[:-1]) + f" and {roles[-1]}"
            both = "both" if len(roles) == 2 else "all"
            problems.append(Problem(f"data.columns: {named} {both} name the column {name!r}; each data role "
                                    "needs its own column", "shared-column", name))
    return problems


def _leaf_problems(columns: Mapping[str, object], groups: Sequence[object],
                   traits: Sequence[object]) -> list[Problem]:
    problems = []
    lists = {"groups": groups, "traits": traits}
    for kind, names in lists.items():
        where = f"data.leaf.{kind}"
        seen: list[str] = []
        for name in names:
            if not isinstance(name, str):
                problems.append(Problem(f"{where}: entries must be strings, got {kind_of(name)}", "wrong-type", where))
            elif not name.strip():
                problems.append(Problem(f"{where}: has an empty entry", "empty-value", where))
            elif name in seen:
                problems.append(Problem(f"{where}: repeated entry {name!r}; list each term once", "repeated-entry",
                                        where))
            else:
                seen.append(name)
        lists[kind] = seen
    for name in lists["groups"]:
        if name in lists["traits"]:
            problems.append(Problem(f"data.leaf: {name!r} is listed in both groups and traits; a column is either a "
                                    "grouping (groups) or a numeric trait (traits)", "group-and-trait", name))
    for kind, names in lists.items():
        for name in names:
            if name == LEAF_TERM:
                problems.append(Problem(f"data.leaf.{kind}: {LEAF_TERM!r} is reserved for the leaf id "
                                        f"(random = [\"{LEAF_TERM}\"]); rename that column in your file and here",
                                        "reserved-name", name))
            elif name == columns.get("leaf"):
                problems.append(Problem(f"data.leaf.{kind}: {name!r} is the leaf id column (data.columns.leaf); "
                                        f"use random = [\"{LEAF_TERM}\"] for leaf effects", "leaf-id-column", name))
    return problems


def _unit_problems(unit: object, pressure: object) -> tuple[list[Problem], list[str]]:
    problems, notes = [], []
    if unit not in CI_UNITS:
        text = str(unit).lower()
        close = ["umol/mol"] if text in _UMOL_ALIASES else difflib.get_close_matches(
            text, [u.lower() for u in CI_UNITS], n=1, cutoff=0.5)
        hint = f" (did you mean {next(u for u in CI_UNITS if u.lower() == close[0].lower())!r}?)" if close else ""
        problems.append(Problem(f"[data.units] {CI_UNITS_KEY} = {unit!r} is not a known unit{hint}; valid units: "
                                f"{', '.join(map(repr, CI_UNITS))} ('Pa' also needs pressure_kpa)", "unknown-unit",
                                f"data.units.{CI_UNITS_KEY}"))
    where = "data.units.pressure_kpa"
    number = isinstance(pressure, (int, float)) and not isinstance(pressure, bool)
    if pressure is not None and not (number and math.isfinite(pressure) and pressure > 0):
        problems.append(Problem(f"[data.units] pressure_kpa = {pressure!r} is not a positive number; give the air "
                                "pressure in kPa (about 101.3 at sea level)", "wrong-value", where))
    elif unit == "Pa" and pressure is None:
        problems.append(Problem(f"[data.units] {CI_UNITS_KEY} = \"Pa\" needs pressure_kpa, the air pressure in kPa at "
                                "which intercellular CO2 was measured (about 101.3 at sea level), to convert it to "
                                "umol/mol", "missing-pressure", where))
    elif unit == "Pa" and not plausible_pressure(pressure):
        problems.append(Problem(f"[data.units] pressure_kpa = {pressure!r} is not a pressure between "
                                f"{PRESSURE_RANGE_KPA[0]:g} and {PRESSURE_RANGE_KPA[1]:g} kPa; give the air pressure "
                                "in kPa (about 101.3 at sea level)", "implausible-pressure", where))
    elif pressure is not None and unit == "umol/mol":
        notes.append(f"pressure_kpa is not used: {CI_UNITS_KEY} is declared in umol/mol")
    return problems, notes
