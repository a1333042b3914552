"""Tests of leafcv.data.reading: column mapping, units, curve inference, validation, leaf table.

The observation tables are invented and simulated here. Plausibility thresholds under test
(Ci and PPFD 0-3000, A_net -50..100, leaf temperature 0-50 C, >= 5 points per leaf) are common
practice, no source.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from leafcv.data import Dataset, load_dataset
from leafcv.errors import DataError
from leafcv.spec import DataSpec

LEAF_IDS = ["L4", "L1", "L6", "L2", "L5", "L3"]        # deliberately not in sorted order
ACI_CI = [60, 100, 150, 200, 300, 400, 600, 800, 1100, 1400]
AQ_PPFD = [2000, 1200, 800, 400, 200, 100, 50, 0]
COLUMNS = {"a_net": "Anet", "ci": "Ci_in", "ppfd": "Light", "t_leaf": "Tl", "leaf": "LeafID", "curve": "crv"}


def _fvcb_25c(ci: np.ndarray, ppfd: np.ndarray, vcmax: float) -> np.ndarray:
    """Net assimilation at 25 C for simulated points (FvCB; Kc 404.9, Ko 278.4, Gamma* 42.75 on a Ci
    basis from Bernacchi et al. 2001 [S]; Jmax = 1.67 Vcmax and Rd = 0.015 Vcmax, Medlyn et al. 2002 and
    Collatz et al. 1991 [M]; alpha 0.3, theta 0.7)."""
    km = 404.9 * (1 + 210 / 278.4)
    gamma = 42.75
    jmax, rd = 1.67 * vcmax, 0.015 * vcmax
    aq = 0.3 * ppfd
    b, c = aq + jmax, aq * jmax
    j = 2 * c / (b + np.sqrt(np.maximum(b * b - 4 * 0.7 * c, 0)))
    wc = vcmax * (ci - gamma) / (ci + km)
    wj = j * (ci - gamma) / (4 * ci + 8 * gamma)
    return np.minimum(wc, wj) - rd


def make_table(seed: int = 1) -> pd.DataFrame:
    """Six invented leaves, each an A-Ci curve (10 points, PPFD 1500) then an A-Q curve (8 points, Ci ~ 300)."""
    rng = np.random.default_rng(seed)
    parts = []
    for i, leaf in enumerate(LEAF_IDS):
        ci = np.concatenate([np.array(ACI_CI, float) * rng.uniform(0.97, 1.03, 10), rng.uniform(280, 320, 8)])
        ppfd = np.concatenate([1500 + rng.uniform(-3, 3, 10), np.array(AQ_PPFD, float)])
        vcmax = 50 + 5 * i
        parts.append(pd.DataFrame({
            "LeafID": leaf, "crv": ["c1"] * 10 + ["c2"] * 8,
            "Anet": np.round(_fvcb_25c(ci, ppfd, vcmax) + rng.normal(0, 0.4, 18), 3),
            "Ci_in": np.round(ci, 2), "Light": np.round(ppfd, 1), "Tl": np.round(25 + rng.normal(0, 0.3, 18), 2),
            "sp": f"sp{i % 2 + 1}", "mon": f"0{5 + i % 3}",
            "N_area": round(1.0 + 0.2 * i, 2), "chl_a": 30.0 + 4 * i,
        }))
    return pd.concat(parts, ignore_index=True)


def line(index: int) -> int:
    """File line of the table's row ``index`` (header = line 1)."""
    return index + 2


def write(tmp_path: Path, table: pd.DataFrame, name: str = "obs.csv") -> Path:
    path = tmp_path / name
    table.to_csv(path, index=False)
    return path


def make_spec(path: Path, columns: dict[str, str] | None = None, **kwargs) -> DataSpec:
    kwargs.setdefault("groups", ("sp", "mon"))
    kwargs.setdefault("traits", ("N_area", "chl_a"))
    return DataSpec(file=path, columns=dict(COLUMNS if columns is None else columns), **kwargs)


def without(*variables: str) -> dict[str, str]:
    return {k: v for k, v in COLUMNS.items() if k not in variables}


def problems_of(spec: DataSpec) -> list[str]:
    with pytest.raises(DataError) as info:
        load_dataset(spec)
    assert info.value.source == str(spec.file)
    return info.value.problems


def the_problem(problems: list[str], *needles: str) -> str:
    """The single problem that contains every needle."""
    hits = [p for p in problems if all(n in p for n in needles)]
    assert len(hits) == 1, (needles, problems)
    return hits[0]


# ---------------------------------------------------------------- happy path

def test_columns_mapped_into_leafcv_variables(tmp_path):
    table = make_table()
    data = load_dataset(make_spec(write(tmp_path, table)))
    assert isinstance(data, Dataset)
    assert list(data.obs.columns) == ["leaf", "leaf_index", "curve", "curve_type", "a_net", "ci", "ppfd",
                                      "t_leaf", "o2", "row"]
    np.testing.assert_allclose(data.obs["a_net"], table["Anet"])
    np.testing.assert_allclose(data.obs["ci"], table["Ci_in"])
    np.testing.assert_allclose(data.obs["ppfd"], table["Light"])
    np.testing.assert_allclose(data.obs["t_leaf"], table["Tl"])
    assert data.obs["row"].tolist() == list(range(2, len(table) + 2))
    assert data.obs["leaf"].tolist() == table["LeafID"].tolist()
    assert data.source == tmp_path / "obs.csv"
    assert data.groups == ("sp", "mon") and data.traits == ("N_area", "chl_a")


def test_leaf_table_in_order_of_first_appearance(tmp_path):
    table = make_table()
    data = load_dataset(make_spec(write(tmp_path, table)))
    leaves = data.leaves
    assert list(leaves.columns) == ["leaf", "sp", "mon", "N_area", "chl_a"]
    assert leaves["leaf"].tolist() == LEAF_IDS
    assert data.n_leaves == 6
    assert leaves["mon"].tolist() == ["05", "06", "07", "05", "06", "07"]      # kept as text, leading zero intact
    assert leaves["sp"].tolist() == ["sp1", "sp2"] * 3
    np.testing.assert_allclose(leaves["N_area"], [1.0, 1.2, 1.4, 1.6, 1.8, 2.0])
    assert leaves["chl_a"].dtype == float
    idx = data.obs["leaf_index"].to_numpy()
    assert (leaves["leaf"].to_numpy()[idx] == data.obs["leaf"].to_numpy()).all()
    assert idx.tolist() == [i for i in range(6) for _ in range(18)]


def test_pa_converted_to_mole_fraction(tmp_path):
    # Dalton's law: mole fraction = partial pressure / total pressure. Worked by hand:
    # 40 Pa at 80 kPa = 40 / 80 000 = 5e-4 mol/mol = 500 umol/mol; 8 Pa -> 100 umol/mol.
    table = make_table()
    table["Ci_in"] = (table["Ci_in"] * 80 / 1000).round(4)
    table.loc[0, "Ci_in"] = 8.0
    table.loc[12, "Ci_in"] = 40.0
    data = load_dataset(make_spec(write(tmp_path, table), ci_unit="Pa", pressure_kpa=80.0))
    assert data.obs["ci"][0] == pytest.approx(100.0)
    assert data.obs["ci"][12] == pytest.approx(500.0)
    np.testing.assert_allclose(data.obs["ci"][1:12], table["Ci_in"][1:12] * 12.5)
    assert any("Pa" in n and "80 kPa" in n for n in data.notes)


def test_defaults_for_unmapped_temperature_and_oxygen(tmp_path):
    table = make_table()
    data = load_dataset(make_spec(write(tmp_path, table), columns=without("t_leaf")))
    assert (data.obs["t_leaf"] == 25.0).all()
    assert (data.obs["o2"] == 210.0).all()
    assert "no leaf_temperature column mapped: leaf_temperature set to 25 deg C for every point" in data.notes
    assert "no oxygen column mapped: oxygen set to 210 mmol/mol for every point" in data.notes


def test_mapped_oxygen_read_and_no_default_note(tmp_path):
    table = make_table()
    table["O2x"] = 20.0
    data = load_dataset(make_spec(write(tmp_path, table), columns={**COLUMNS, "o2": "O2x"}))
    assert (data.obs["o2"] == 20.0).all()
    assert not any(n.startswith("no oxygen") or n.startswith("no leaf_temperature") for n in data.notes)


def test_curve_types_from_curve_column(tmp_path):
    data = load_dataset(make_spec(write(tmp_path, make_table())))
    obs = data.obs
    assert obs["curve"].tolist() == (["c1"] * 10 + ["c2"] * 8) * 6
    assert obs["curve_type"].tolist() == (["aci"] * 10 + ["aq"] * 8) * 6
    note = the_problem(list(data.notes), "curve type")
    assert "'crv'" in note and "6 A–Ci, 6 A–Q" in note


def test_curve_ids_may_differ_between_leaves(tmp_path):
    table = make_table()
    first = table["LeafID"] == "L4"
    table.loc[first, "crv"] = ["low"] * 10 + ["high"] * 8
    data = load_dataset(make_spec(write(tmp_path, table)))
    assert data.obs["curve"][:18].tolist() == ["low"] * 10 + ["high"] * 8
    assert data.obs["curve_type"][:18].tolist() == ["aci"] * 10 + ["aq"] * 8


def test_curves_inferred_without_curve_column(tmp_path):
    data = load_dataset(make_spec(write(tmp_path, make_table()), columns=without("curve")))
    assert data.obs["curve"].tolist() == (["aci"] * 10 + ["aq"] * 8) * 6
    assert data.obs["curve_type"].tolist() == (["aci"] * 10 + ["aq"] * 8) * 6
    note = the_problem(list(data.notes), "curve type")
    assert "no curve column" in note and "2 %" in note and "6 A–Ci, 6 A–Q" in note


def test_light_curve_point_at_aci_light_joins_aci_curve(tmp_path):
    # The documented rule: a light-curve point at the A-Ci curve's PPFD (within 2 %) belongs to that level.
    table = make_table()
    table.loc[10, "Light"] = 1520.0                      # first A-Q point of leaf L4, 1.3 % above 1500
    data = load_dataset(make_spec(write(tmp_path, table), columns=without("curve")))
    first = data.obs[data.obs["leaf"] == "L4"]
    assert first["curve"].tolist() == ["aci"] * 11 + ["aq"] * 7


def test_two_aci_light_levels_give_two_aci_curves(tmp_path):
    table = make_table()
    extra = table[(table["LeafID"] == "L1") & (table["crv"] == "c1")].copy()
    extra["Light"] = 500.0
    extra["Anet"] = extra["Anet"] - 3
    table = pd.concat([table, extra], ignore_index=True)
    data = load_dataset(make_spec(write(tmp_path, table), columns=without("curve")))
    leaf = data.obs[data.obs["leaf"] == "L1"]
    assert leaf["curve"].tolist() == ["aci"] * 10 + ["aq"] * 8 + ["aci-2"] * 10
    assert leaf["curve_type"].tolist() == ["aci"] * 10 + ["aq"] * 8 + ["aci"] * 10


def test_single_level_group_is_accepted(tmp_path):
    table = make_table()
    table["sp"] = "sp1"
    data = load_dataset(make_spec(write(tmp_path, table)))
    assert set(data.leaves["sp"]) == {"sp1"}


def test_values_inside_the_limits_pass(tmp_path):
    table = make_table()
    table.loc[0, "Ci_in"], table.loc[1, "Light"], table.loc[2, "Anet"], table.loc[3, "Tl"] = 3000, 3000, -50, 0.5
    data = load_dataset(make_spec(write(tmp_path, table)))
    assert data.obs["ci"][0] == 3000 and data.obs["a_net"][2] == -50


def test_rows_are_file_lines_despite_blank_lines_and_quoted_line_breaks(tmp_path):
    table = make_table()
    table["memo"] = ""
    table.loc[2, "memo"] = "two\nlines"                  # a quoted cell spanning two lines
    table["Anet"] = table["Anet"].astype(object)
    table.loc[10, "Anet"] = "oops"
    text = table.to_csv(index=False).split("\n")
    text.insert(5, "")                                    # a blank line after file line 5
    path = tmp_path / "obs.csv"
    path.write_text("\n".join(text))
    # index 10 is normally line 12; one line more for the line break in index 2, one for the blank line
    assert path.read_text().splitlines()[13].startswith("L4,c2,oops")
    message = the_problem(problems_of(make_spec(path)), "'Anet' (net_assimilation)")
    assert "row 14 ('oops')" in message


def test_whitespace_around_cells_is_ignored(tmp_path):
    path = write(tmp_path, make_table())
    text = path.read_text().split("\n")
    text[1] = text[1].replace(",", " , ")
    path.write_text("\n".join(text))
    data = load_dataset(make_spec(path))
    assert data.obs["leaf"][0] == "L4"


# ---------------------------------------------------------------- problems

def test_missing_file(tmp_path):
    path = tmp_path / "absent.csv"
    message = the_problem(problems_of(make_spec(path)), "does not exist")
    assert str(path) in message


def test_empty_file(tmp_path):
    path = tmp_path / "obs.csv"
    path.write_text("")
    assert "empty" in the_problem(problems_of(make_spec(path)), "observation file")


def test_header_only(tmp_path):
    path = tmp_path / "obs.csv"
    path.write_text(",".join(make_table().columns) + "\n\n\n")
    the_problem(problems_of(make_spec(path)), "no data rows")


def test_mapped_column_missing_suggests_close_name(tmp_path):
    spec = make_spec(write(tmp_path, make_table()), columns={**COLUMNS, "a_net": "A_net"})
    message = the_problem(problems_of(spec), "'A_net' (net_assimilation)", "not in the file")
    assert "did you mean 'Anet'" in message
    assert "'Ci_in'" in message and "'chl_a'" in message          # the file's columns are listed


def test_missing_trait_column_named(tmp_path):
    spec = make_spec(write(tmp_path, make_table()), traits=("N_area", "chla"))
    message = the_problem(problems_of(spec), "'chla' (trait)", "not in the file")
    assert "did you mean 'chl_a'" in message and "[data.leaf] traits" in message


def test_semicolon_file_is_read(tmp_path):
    # Other delimiters and decimal commas: tests/data/test_delimiters.py.
    table = make_table()
    path = tmp_path / "obs.csv"
    table.to_csv(path, index=False, sep=";")
    data = load_dataset(make_spec(path))
    assert data.delimiter == ";"
    np.testing.assert_allclose(data.obs["a_net"], table["Anet"])


def test_two_variables_mapped_to_one_column(tmp_path):
    # The wording of leafcv.data.mapping, shared with the comparison file (tests/data/test_mapping.py).
    spec = make_spec(write(tmp_path, make_table()), columns={**COLUMNS, "t_leaf": "Anet"})
    message = the_problem(problems_of(spec), "'Anet'", "both name the column")
    assert "net_assimilation and leaf_temperature" in message
    assert message.code == "shared-column" and message.location == "Anet"


def test_unknown_and_unmapped_variables(tmp_path):
    columns = {**without("ppfd"), "vpd": "VPD"}
    found = problems_of(make_spec(write(tmp_path, make_table()), columns=columns))
    assert "valid variables" in the_problem(found, "'vpd'")
    missing = the_problem(found, "data.columns: required data role 'photon_flux' is missing; "
                                 'add photon_flux = "<your column>"')
    assert missing.code == "missing-role" and missing.location == "data.columns.photon_flux"


def test_non_numeric_value(tmp_path):
    table = make_table()
    table["Ci_in"] = table["Ci_in"].astype(object)
    table.loc[3, "Ci_in"], table.loc[7, "Ci_in"] = "abc", "1,5"
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'Ci_in' (intercellular_co2)")
    assert f"rows {line(3)} ('abc'), {line(7)} ('1,5')" in message
    assert "decimal mark" in message


def test_infinite_value_is_not_a_number(tmp_path):
    table = make_table()
    table["Light"] = table["Light"].astype(object)
    table.loc[5, "Light"] = "inf"
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'Light' (photon_flux)")
    assert f"row {line(5)} ('inf')" in message


def test_missing_values_in_required_column(tmp_path):
    table = make_table()
    table["Anet"] = table["Anet"].astype(object)
    table.loc[4, "Anet"], table.loc[20, "Anet"] = "", "NaN"
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'Anet' (net_assimilation)", "missing")
    assert f"rows {line(4)}, {line(20)}" in message


def test_missing_value_in_optional_column_mentions_default(tmp_path):
    table = make_table()
    table["Tl"] = table["Tl"].astype(object)
    table.loc[6, "Tl"] = ""
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'Tl' (leaf_temperature)", "missing")
    assert f"row {line(6)}" in message and "25 deg C" in message


def test_many_rows_are_abbreviated(tmp_path):
    table = make_table()
    table["Anet"] = table["Anet"].astype(object)
    table.loc[0:11, "Anet"] = ""
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'Anet' (net_assimilation)", "missing")
    assert "rows 2, 3, 4, 5, 6, 7, 8, 9 and 4 more" in message


def test_ci_outside_range(tmp_path):
    table = make_table()
    table.loc[0, "Ci_in"], table.loc[9, "Ci_in"] = -5.0, 3500.0
    found = problems_of(make_spec(write(tmp_path, table)))
    message = the_problem(found, "'Ci_in' (intercellular_co2)", "plausible range")
    assert f"rows {line(0)} (-5), {line(9)} (3500)" in message


def test_ci_range_in_pa_reported_in_file_units(tmp_path):
    table = make_table()
    table["Ci_in"] = (table["Ci_in"] / 10).round(3)
    table.loc[9, "Ci_in"] = 400.0                        # 400 Pa at 100 kPa = 4000 umol/mol
    message = the_problem(problems_of(make_spec(write(tmp_path, table), ci_unit="Pa", pressure_kpa=100.0)),
                          "'Ci_in' (intercellular_co2)", "plausible range")
    assert f"row {line(9)} (400)" in message and "0-300 Pa at 100 kPa" in message


def test_ppfd_outside_range(tmp_path):
    table = make_table()
    table.loc[11, "Light"], table.loc[12, "Light"] = -10.0, 3200.0
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'Light' (photon_flux)", "plausible range")
    assert f"rows {line(11)} (-10), {line(12)} (3200)" in message


def test_implausible_net_assimilation(tmp_path):
    table = make_table()
    table.loc[2, "Anet"], table.loc[30, "Anet"] = -60.0, 120.0
    found = problems_of(make_spec(write(tmp_path, table)))
    message = the_problem(found, "'Anet' (net_assimilation)", "plausible range")
    assert f"rows {line(2)} (-60), {line(30)} (120)" in message


def test_leaf_temperature_outside_range(tmp_path):
    table = make_table()
    table.loc[1, "Tl"], table.loc[40, "Tl"] = 60.0, -3.0
    found = problems_of(make_spec(write(tmp_path, table)))
    message = the_problem(found, "'Tl' (leaf_temperature)", "plausible range")
    assert f"rows {line(1)} (60), {line(40)} (-3)" in message


def test_leaf_temperature_in_kelvin_gets_hint(tmp_path):
    table = make_table()
    table["Tl"] = table["Tl"] + 273.15
    the_problem(problems_of(make_spec(write(tmp_path, table))), "'Tl' (leaf_temperature)", "kelvin")


def test_oxygen_outside_range(tmp_path):
    table = make_table()
    table["O2x"] = 210.0
    table.loc[8, "O2x"] = 2100.0
    found = problems_of(make_spec(write(tmp_path, table), columns={**COLUMNS, "o2": "O2x"}))
    assert f"row {line(8)} (2100)" in the_problem(found, "'O2x' (oxygen)")


def test_leaf_with_too_few_points(tmp_path):
    table = make_table()
    extra = table.iloc[:3].copy()
    extra["LeafID"] = "L9"
    table = pd.concat([table, extra], ignore_index=True)
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "leaf 'L9'", "point(s)")
    assert "only 3 point(s)" in message and "rows 110, 111, 112" in message and "'LeafID'" in message


def test_trait_varying_within_leaf(tmp_path):
    table = make_table()
    table.loc[25, "N_area"] = 1.75                       # leaf L1 otherwise has 1.2
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'N_area' (trait)", "constant")
    assert "leaf 'L1'" in message and "1.2 in" in message and f"1.75 in row {line(25)}" in message


def test_group_varying_within_leaf(tmp_path):
    table = make_table()
    table.loc[40, "sp"] = "sp9"                           # leaf L6 otherwise has sp1
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'sp' (group)", "constant")
    assert "leaf 'L6'" in message and "'sp1' in" in message and f"'sp9' in row {line(40)}" in message


def test_fully_duplicated_rows(tmp_path):
    table = make_table()
    table = pd.concat([table, table.iloc[[3]]], ignore_index=True)
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "repeat")
    assert f"row {line(108)} repeats row {line(3)}" in message


def test_pa_values_declared_as_umol(tmp_path):
    table = make_table()
    table["Ci_in"] = (table["Ci_in"] / 10).round(3)
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'Ci_in' (intercellular_co2)", "median")
    assert 'looks like Pa; set intercellular_co2 = "Pa" and pressure_kpa' in message


def test_umol_values_declared_as_pa(tmp_path):
    spec = make_spec(write(tmp_path, make_table()), ci_unit="Pa", pressure_kpa=100.0)
    message = the_problem(problems_of(spec), "'Ci_in' (intercellular_co2)", "median")
    assert 'looks like umol/mol; set intercellular_co2 = "umol/mol" under [data.units]' in message


def test_pa_without_pressure(tmp_path):
    table = make_table()
    table["Ci_in"] = (table["Ci_in"] / 10).round(3)
    message = the_problem(problems_of(make_spec(write(tmp_path, table), ci_unit="Pa")), "pressure_kpa")
    assert message.startswith('[data.units] intercellular_co2 = "Pa" needs pressure_kpa')


def test_pressure_out_of_range(tmp_path):
    table = make_table()
    table["Ci_in"] = (table["Ci_in"] / 10).round(3)
    spec = make_spec(write(tmp_path, table), ci_unit="Pa", pressure_kpa=101325.0)
    assert "kPa" in the_problem(problems_of(spec), "pressure_kpa = 101325")


def test_unused_pressure_is_noted(tmp_path):
    data = load_dataset(make_spec(write(tmp_path, make_table()), pressure_kpa=101.3))
    the_problem(list(data.notes), "pressure_kpa is not used")


def test_unknown_unit(tmp_path):
    message = the_problem(problems_of(make_spec(write(tmp_path, make_table()), ci_unit="ppm")), "'ppm'")
    assert "valid units: 'umol/mol', 'Pa'" in message and "did you mean 'umol/mol'" in message
    assert message.startswith("[data.units] intercellular_co2 = 'ppm' is not a known unit")


def test_non_numeric_trait(tmp_path):
    table = make_table()
    table["chl_a"] = table["chl_a"].astype(object)
    table.loc[[18, 19], "chl_a"] = "high"
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'chl_a' (trait)", "not finite")
    assert f"rows {line(18)} ('high'), {line(19)} ('high')" in message


def test_missing_leaf_id(tmp_path):
    table = make_table()
    table.loc[50, "LeafID"] = ""
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "'LeafID' (leaf)")
    assert f"no leaf id in row {line(50)}" in message


def test_constant_curve_with_curve_column(tmp_path):
    table = make_table()
    aq = (table["LeafID"] == "L1") & (table["crv"] == "c2")
    table.loc[aq, "Light"], table.loc[aq, "Ci_in"] = 1000.0, 300.0
    message = the_problem(problems_of(make_spec(write(tmp_path, table))), "curve has constant Ci and PPFD")
    assert "leaf 'L1'" in message and "curve 'c2'" in message and "'crv'" in message
    assert _rows_text(np.flatnonzero(aq)) in message


def test_constant_curve_without_curve_column(tmp_path):
    table = make_table()
    aq = (table["LeafID"] == "L2") & (table["crv"] == "c2")
    table.loc[aq, "Light"], table.loc[aq, "Ci_in"] = 1000.0, 300.0
    spec = make_spec(write(tmp_path, table), columns=without("curve"))
    message = the_problem(problems_of(spec), "curve has constant Ci and PPFD")
    assert "leaf 'L2'" in message and _rows_text(np.flatnonzero(aq)) in message


def _rows_text(indices: np.ndarray) -> str:
    return "rows " + ", ".join(str(line(i)) for i in indices)


def test_mislabelled_curve(tmp_path):
    table = make_table()
    table["crv"] = (["aci"] * 10 + ["aq"] * 8) * 6
    table.loc[table["LeafID"] == "L5", "crv"] = ["aq"] * 10 + ["aci"] * 8
    found = problems_of(make_spec(write(tmp_path, table)))
    assert len(found) == 2
    assert "reads as an A–Ci curve" in the_problem(found, "leaf 'L5'", "curve 'aq'")


def test_ragged_line(tmp_path):
    path = write(tmp_path, make_table())
    text = path.read_text().split("\n")
    text[6] += ",extra"
    path.write_text("\n".join(text))
    message = the_problem(problems_of(make_spec(path)), "line 7")
    assert "fields" in message


def test_duplicate_header_name(tmp_path):
    path = write(tmp_path, make_table())
    text = path.read_text().split("\n")
    text[0] = text[0].replace("Tl", "Anet")
    path.write_text("\n".join(text))
    message = the_problem(problems_of(make_spec(path, columns=without("t_leaf"))), "'Anet' (net_assimilation)")
    assert "appears 2 times" in message and "columns 3, 6" in message


def test_column_both_group_and_trait(tmp_path):
    spec = make_spec(write(tmp_path, make_table()), groups=("sp", "mon"), traits=("N_area", "mon"))
    the_problem(problems_of(spec), "'mon'", "groups and traits")


def test_every_problem_reported_at_once(tmp_path):
    table = make_table()
    table["Anet"] = table["Anet"].astype(object)
    table.loc[5, "Anet"] = "x"
    table.loc[7, "Light"] = -20.0
    table.loc[30, "N_area"] = 9.9
    table["Ci_in"] = (table["Ci_in"] / 10).round(3)      # in Pa, but no pressure given
    table = pd.concat([table, table.iloc[[0]]], ignore_index=True)
    spec = make_spec(write(tmp_path, table), columns={**COLUMNS, "curve": "curve_id"}, ci_unit="Pa")
    found = problems_of(spec)
    the_problem(found, "'curve_id' (curve)", "not in the file")
    the_problem(found, "needs pressure_kpa")
    the_problem(found, "'Anet' (net_assimilation)", f"row {line(5)} ('x')")
    the_problem(found, "'Light' (photon_flux)", f"row {line(7)} (-20)")
    the_problem(found, "'N_area' (trait)", "leaf 'L1'")
    the_problem(found, f"row {line(108)} repeats row {line(0)}")
    assert len(found) == 6


def test_user_columns_may_share_leafcv_names(tmp_path):
    table = make_table().rename(columns={v: k for k, v in COLUMNS.items()})
    table.loc[4, "a_net"] = 150.0
    found = problems_of(make_spec(write(tmp_path, table), columns={k: k for k in COLUMNS}))
    assert f"row {line(4)} (150)" in the_problem(found, "'a_net' (net_assimilation)", "plausible range")
