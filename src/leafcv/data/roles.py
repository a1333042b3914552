"""The data roles: the plain-English keys of a comparison file's [data.columns] and [data.units].

Users see and write data roles (``net_assimilation = "their column"``); inside leafcv the same
quantities are the observation variables of `DataSpec.columns` and the columns of `Dataset.obs`
(``a_net``, ``ci``, ...). This module is the one translation between the two.

Tests: tests/test_api.py, tests/data/test_mapping.py, tests/comparison/test_sections.py.
"""
from __future__ import annotations

from ..errors import Problem
from ..spec import OPTIONAL_COLUMNS, REQUIRED_COLUMNS

__all__ = ["ROLE_OF", "VARIABLE_OF", "RENAMED_KEYS", "REQUIRED_ROLES", "OPTIONAL_ROLES", "CI_UNITS_KEY",
           "role", "renamed_key_problem"]

#: observation variable (a column of `Dataset.obs`) -> its data role (a key of [data.columns])
ROLE_OF: dict[str, str] = {
    "a_net": "net_assimilation",
    "ci": "intercellular_co2",
    "ppfd": "photon_flux",
    "t_leaf": "leaf_temperature",
    "o2": "oxygen",
    "leaf": "leaf",
    "curve": "curve",
}
#: data role -> observation variable
VARIABLE_OF: dict[str, str] = {r: v for v, r in ROLE_OF.items()}
#: Keys that earlier comparison files used for data roles, and the key that replaced each. A file
#: using one is refused with its replacement named, in [data.columns] and in [data.units] alike.
RENAMED_KEYS: dict[str, str] = {
    "a_net": "net_assimilation",
    "ci": "intercellular_co2",
    "ppfd": "photon_flux",
    "t_leaf": "leaf_temperature",
    "o2": "oxygen",
}
REQUIRED_ROLES: tuple[str, ...] = tuple(ROLE_OF[v] for v in REQUIRED_COLUMNS)
OPTIONAL_ROLES: tuple[str, ...] = tuple(ROLE_OF[v] for v in OPTIONAL_COLUMNS)
#: The [data.units] key that declares the unit of intercellular CO2.
CI_UNITS_KEY = ROLE_OF["ci"]


def role(variable: str) -> str:
    """The data role of an observation variable (any other name is returned as it is)."""
    return ROLE_OF.get(variable, variable)


def renamed_key_problem(file_name: str, table: str, key: str) -> Problem | None:
    """The refusal of a renamed key (code ``renamed-key``, location e.g. ``[data.columns] ci``), or None
    when ``key`` was never renamed.

    >>> renamed_key_problem("demo.toml", "[data.columns]", "ci")
    "demo.toml: [data.columns] key 'ci' was renamed: use 'intercellular_co2'"
    """
    new = RENAMED_KEYS.get(key)
    if new is None:
        return None
    return Problem(f"{file_name}: {table} key {key!r} was renamed: use {new!r}", "renamed-key", f"{table} {key}")
