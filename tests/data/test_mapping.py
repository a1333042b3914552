"""Tests of leafcv.data.mapping: the one check of a data mapping, and that a comparison file and a
DataSpec built in Python meet it in the same words with the same codes.

The observation table and the comparison file are invented for these tests.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pandas as pd
import pytest

from leafcv.comparison import load_comparison
from leafcv.data import load_dataset
from leafcv.data.mapping import check_mapping
from leafcv.errors import DataError, SpecError
from leafcv.spec import DataSpec

COLUMNS = {"a_net": "A", "ci": "Ci", "ppfd": "Q", "leaf": "leaf_id"}

COMPARISON = """format = 1
[data]
file = "points.csv"
[data.columns]
net_assimilation = "A"
intercellular_co2 = "Ci"
photon_flux = "Q"
leaf = "leaf_id"
{units}
[data.leaf]
groups = ["species"]
traits = ["leaf_n", "chl"]

[[structure]]
name = "pooled"
"""


def codes(problems) -> list[tuple[str, str]]:
    return [(p.code, p.location) for p in problems]


# ---------------------------------------------------------------- the check itself

def test_good_mapping_has_no_problem() -> None:
    found = check_mapping({**COLUMNS, "t_leaf": "T", "curve": "run"}, ("species",), ("leaf_n",), "Pa", 98.0)
    assert found.problems == () and found.notes == ()


@pytest.mark.parametrize("kwargs, code, location, text", [
    (dict(columns={k: v for k, v in COLUMNS.items() if k != "ppfd"}), "missing-role", "data.columns.photon_flux",
     'data.columns: required data role \'photon_flux\' is missing; add photon_flux = "<your column>"'),
    (dict(columns={**COLUMNS, "ppfd": "A"}), "shared-column", "A",
     "data.columns: net_assimilation and photon_flux both name the column 'A'; each data role needs its own column"),
    (dict(columns={**COLUMNS, "ppfd": "A", "t_leaf": "A"}), "shared-column", "A",
     "data.columns: net_assimilation, photon_flux and leaf_temperature all name the column 'A'; each data role "
     "needs its own column"),
    (dict(columns={**COLUMNS, "ppfd": " "}), "empty-value", "data.columns.photon_flux",
     "data.columns.photon_flux: is empty"),
    (dict(columns={**COLUMNS, "ppfd": 3}), "wrong-type", "data.columns.photon_flux",
     "data.columns.photon_flux: expected a string, got an integer (3)"),
    (dict(groups=("species", "species")), "repeated-entry", "data.leaf.groups",
     "data.leaf.groups: repeated entry 'species'; list each term once"),
    (dict(groups=("chl",), traits=("chl",)), "group-and-trait", "chl",
     "data.leaf: 'chl' is listed in both groups and traits; a column is either a grouping (groups) or a numeric "
     "trait (traits)"),
    (dict(traits=("leaf",)), "reserved-name", "leaf",
     "data.leaf.traits: 'leaf' is reserved for the leaf id (random = [\"leaf\"]); rename that column in your "
     "file and here"),
    (dict(groups=("leaf_id",)), "leaf-id-column", "leaf_id",
     "data.leaf.groups: 'leaf_id' is the leaf id column (data.columns.leaf); use random = [\"leaf\"] for leaf "
     "effects"),
    (dict(ci_unit="ppm"), "unknown-unit", "data.units.intercellular_co2",
     "[data.units] intercellular_co2 = 'ppm' is not a known unit (did you mean 'umol/mol'?); valid units: "
     "'umol/mol', 'Pa' ('Pa' also needs pressure_kpa)"),
    (dict(ci_unit="Pa"), "missing-pressure", "data.units.pressure_kpa",
     '[data.units] intercellular_co2 = "Pa" needs pressure_kpa, the air pressure in kPa at which intercellular '
     "CO2 was measured (about 101.3 at sea level), to convert it to umol/mol"),
    (dict(ci_unit="Pa", pressure_kpa=101325.0), "implausible-pressure", "data.units.pressure_kpa",
     "[data.units] pressure_kpa = 101325.0 is not a pressure between 30 and 110 kPa; give the air pressure in kPa "
     "(about 101.3 at sea level)"),
    (dict(pressure_kpa=-1), "wrong-value", "data.units.pressure_kpa",
     "[data.units] pressure_kpa = -1 is not a positive number; give the air pressure in kPa (about 101.3 at sea "
     "level)"),
])
def test_each_rule(kwargs: dict, code: str, location: str, text: str) -> None:
    args = {"columns": COLUMNS, "groups": (), "traits": (), **kwargs}
    found = check_mapping(args.pop("columns"), **args)
    assert len(found.problems) == 1, found.problems
    (problem,) = found.problems
    assert (problem, problem.code, problem.location) == (text, code, location)


def test_unknown_variable_and_a_data_role_in_its_place() -> None:
    # DataSpec.columns is keyed by observation variable; a data role there is named as one.
    found = check_mapping({**COLUMNS, "vpd": "VPD", "leaf_temperature": "T"})
    assert codes(found.problems) == [("unknown-key", "vpd"), ("unknown-key", "leaf_temperature")]
    assert "valid variables: a_net, ci, ppfd, leaf, t_leaf, o2, curve" in found.problems[0]
    assert "'leaf_temperature' is a data role, the name of 't_leaf' in a comparison file" in found.problems[1]


def test_unused_pressure_is_a_note() -> None:
    found = check_mapping(COLUMNS, ci_unit="umol/mol", pressure_kpa=101.3)
    assert found.problems == ()
    assert found.notes == ("pressure_kpa is not used: intercellular_co2 is declared in umol/mol",)


# ---------------------------------------------------------------- both layers, one check

# The same mistake written in a comparison file (its [data] section: columns, units, leaf) and made in a
# DataSpec built in Python (keyword -> value given to dataclasses.replace).
BOTH = {
    "two roles on one column": ('photon_flux = "Q"', 'photon_flux = "A"', "", {"columns": {**COLUMNS, "ppfd": "A"}}),
    "required role missing": ('photon_flux = "Q"\n', "", "", {"columns": {k: v for k, v in COLUMNS.items()
                                                                         if k != "ppfd"}}),
    "empty column name": ('photon_flux = "Q"', 'photon_flux = ""', "", {"columns": {**COLUMNS, "ppfd": ""}}),
    "group and trait": ('groups = ["species"]', 'groups = ["species", "chl"]', "",
                        {"groups": ("species", "chl")}),
    "repeated group": ('groups = ["species"]', 'groups = ["species", "species"]', "",
                       {"groups": ("species", "species")}),
    "trait named leaf": ('traits = ["leaf_n", "chl"]', 'traits = ["leaf_n", "chl", "leaf"]', "",
                         {"traits": ("leaf_n", "chl", "leaf")}),
    "leaf id column as a group": ('groups = ["species"]', 'groups = ["species", "leaf_id"]', "",
                                  {"groups": ("species", "leaf_id")}),
    "unknown unit": ("", "", '[data.units]\nintercellular_co2 = "ppm"', {"ci_unit": "ppm"}),
    "Pa without pressure": ("", "", '[data.units]\nintercellular_co2 = "Pa"', {"ci_unit": "Pa"}),
    "implausible pressure": ("", "", '[data.units]\nintercellular_co2 = "Pa"\npressure_kpa = 500.0',
                             {"ci_unit": "Pa", "pressure_kpa": 500.0}),
    "pressure not positive": ("", "", "[data.units]\npressure_kpa = 0", {"pressure_kpa": 0}),
}


@pytest.fixture()
def good_spec(tmp_path: Path) -> DataSpec:
    """The DataSpec of the valid comparison file (its data file need not exist for these checks)."""
    path = tmp_path / "good.toml"
    path.write_text(COMPARISON.format(units=""))
    return load_comparison(path).data


@pytest.mark.parametrize("case", list(BOTH))
def test_comparison_file_and_dataspec_give_the_same_problem(tmp_path: Path, good_spec: DataSpec, case: str) -> None:
    old, new, units, change = BOTH[case]
    text = COMPARISON.format(units=units)
    assert old in text
    path = tmp_path / "bad.toml"
    path.write_text(text.replace(old, new, 1))
    with pytest.raises(SpecError) as from_file:
        load_comparison(path)
    with pytest.raises(DataError) as from_python:
        load_dataset(replace(good_spec, **change))
    (in_file,) = from_file.value.problems
    in_python = [p for p in from_python.value.problems if getattr(p, "code", None) == in_file.code]
    assert in_python == [in_file]
    assert (in_python[0].code, in_python[0].location) == (in_file.code, in_file.location)


def test_dataspec_mapping_checked_before_the_table_is_read(good_spec: DataSpec) -> None:
    # Every problem of the mapping and of the table in one DataError: here the table is a DataFrame
    # without the mapped columns.
    spec = replace(good_spec, columns={**good_spec.columns, "ppfd": "A"})
    with pytest.raises(DataError) as info:
        load_dataset(spec, pd.DataFrame({"x": [1.0]}))
    found = info.value.problems
    assert [p.code for p in found if hasattr(p, "code")] == ["shared-column"]
    # A (once per role mapped to it), Ci, leaf_id, species, leaf_n and chl
    assert sum("is not in the table" in p for p in found) == 7
