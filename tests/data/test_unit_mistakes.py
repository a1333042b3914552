"""Likely unit mistakes in the mapped numeric columns are named with the column and the likely unit.

Each test converts the invented table's column from leafcv's unit into the mistaken one by the
unit's definition (SI prefixes: 1 mmol = 1000 umol = 1e6 nmol; 1 kPa = 1000 Pa; T[K] = T[deg C] +
273.15 and T[deg F] = T[deg C] x 9/5 + 32; a mole fraction of 1 = 1000 mmol/mol = 100 %). Dry air
holds about 20.9 % oxygen (from memory). The thresholds that recognise each mistake are common
practice, no source (leafcv.data.units).
"""
from __future__ import annotations

import numpy as np

from leafcv.data import load_dataset
from tests.test_data_reading import COLUMNS, make_spec, make_table, problems_of, the_problem, write

WITH_O2 = {**COLUMNS, "o2": "O2x"}


def only_problem_of(found: list[str], column: str) -> str:
    """The one problem about ``column``: a unit mistake replaces the list of values out of range."""
    hits = [p for p in found if f"column {column!r}" in p]
    assert len(hits) == 1, hits
    return hits[0]


def test_assimilation_in_mmol(tmp_path):
    table = make_table()
    table["Anet"] = table["Anet"] / 1000
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table))), "Anet")
    assert "(net_assimilation)" in message and "mmol m-2 s-1" in message and "multiply the column by 1000" in message


def test_assimilation_in_nmol(tmp_path):
    table = make_table()
    table["Anet"] = table["Anet"] * 1000
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table))), "Anet")
    assert "nmol m-2 s-1" in message and "divide the column by 1000" in message


def test_ci_in_mmol_per_mol(tmp_path):
    table = make_table()
    table["Ci_in"] = table["Ci_in"] / 1000
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table))), "Ci_in")
    assert "(intercellular_co2)" in message and "mmol/mol" in message and "multiply the column by 1000" in message


def test_ci_in_pa_declared_as_umol_replaces_range_list(tmp_path):
    # At 100 kPa, x umol/mol is x / 10 Pa (Dalton's law): A-Ci values 6-140 Pa.
    table = make_table()
    table["Ci_in"] = table["Ci_in"] / 10
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table))), "Ci_in")
    assert 'looks like Pa; set intercellular_co2 = "Pa"' in message


def test_ci_in_kpa_declared_as_pa(tmp_path):
    table = make_table()
    table["Ci_in"] = table["Ci_in"] / 10 / 1000          # umol/mol -> Pa at 100 kPa -> kPa
    spec = make_spec(write(tmp_path, table), ci_unit="Pa", pressure_kpa=100.0)
    message = only_problem_of(problems_of(spec), "Ci_in")
    assert "looks like kPa" in message and "multiply the column by 1000 to give Pa" in message


def test_ci_in_umol_declared_as_pa_replaces_range_list(tmp_path):
    spec = make_spec(write(tmp_path, make_table()), ci_unit="Pa", pressure_kpa=100.0)
    message = only_problem_of(problems_of(spec), "Ci_in")
    assert 'looks like umol/mol; set intercellular_co2 = "umol/mol"' in message


def test_photon_flux_in_mmol(tmp_path):
    table = make_table()
    table["Light"] = table["Light"] / 1000
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table))), "Light")
    assert "(photon_flux)" in message and "mmol m-2 s-1" in message and "multiply the column by 1000" in message


def test_leaf_temperature_in_kelvin_replaces_range_list(tmp_path):
    table = make_table()
    table["Tl"] = table["Tl"] + 273.15
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table))), "Tl")
    assert "kelvin" in message and "subtract 273.15" in message


def test_leaf_temperature_in_fahrenheit(tmp_path):
    table = make_table()
    table["Tl"] = table["Tl"] * 9 / 5 + 32
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table))), "Tl")
    assert "(leaf_temperature)" in message and "deg F" in message and "(value - 32) x 5 / 9" in message


def test_oxygen_as_mole_fraction(tmp_path):
    table = make_table()
    table["O2x"] = 0.209
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table), columns=WITH_O2)), "O2x")
    assert "(oxygen)" in message and "mole fraction" in message and "multiply the column by 1000" in message


def test_oxygen_in_umol_per_mol(tmp_path):
    table = make_table()
    table["O2x"] = 209_000.0
    message = only_problem_of(problems_of(make_spec(write(tmp_path, table), columns=WITH_O2)), "O2x")
    assert "umol/mol" in message and "divide the column by 1000" in message


def test_oxygen_in_percent_is_a_warning(tmp_path):
    # 20.9 % is air; the same numbers in mmol/mol would be a low-oxygen experiment, so it loads.
    table = make_table()
    table["O2x"] = 20.9
    data = load_dataset(make_spec(write(tmp_path, table), columns=WITH_O2))
    assert (data.obs["o2"] == 20.9).all()
    message = the_problem(list(data.warnings), "'O2x' (oxygen)")
    assert "percent" in message and "multiply it by 10" in message and "largest 20.9" in message


def test_oxygen_in_air_and_low_oxygen_have_no_warning(tmp_path):
    table = make_table()
    table["O2x"] = np.where(table.index % 2 == 0, 209.0, 20.0)   # mmol/mol: air, and 2 % oxygen
    data = load_dataset(make_spec(write(tmp_path, table), columns=WITH_O2))
    assert data.warnings == ()


def test_realistic_table_has_no_unit_problem(tmp_path):
    data = load_dataset(make_spec(write(tmp_path, make_table())))
    assert data.warnings == ()
