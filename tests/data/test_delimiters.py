"""Observation files separated by semicolons or tabs, with decimal commas, and files that are refused.

The files are the invented tables of tests/test_data_reading.py written by pandas (``to_csv`` with
``sep`` and ``decimal``) or by Python's csv module, so the reference for every value read back is
what those writers put in the file.
"""
from __future__ import annotations

import csv

import numpy as np

from leafcv.data import load_dataset
from tests.test_data_reading import COLUMNS, line, make_spec, make_table, problems_of, the_problem

NUMERIC = {"Anet": "a_net", "Ci_in": "ci", "Light": "ppfd", "Tl": "t_leaf"}


def assert_read_back(data, table) -> None:
    for column, variable in NUMERIC.items():
        np.testing.assert_allclose(data.obs[variable], table[column])
    np.testing.assert_allclose(data.leaves["N_area"], table.groupby("LeafID", sort=False)["N_area"].first())
    assert data.obs["leaf"].tolist() == table["LeafID"].tolist()


def test_semicolon_with_decimal_comma(tmp_path):
    table = make_table()
    path = tmp_path / "obs.csv"
    table.to_csv(path, index=False, sep=";", decimal=",")
    assert "," in path.read_text().splitlines()[1]          # pandas wrote decimal commas, e.g. '12,5'
    data = load_dataset(make_spec(path))
    assert_read_back(data, table)
    assert (data.delimiter, data.decimal_mark) == (";", ",")
    the_problem(list(data.notes), "separated by semicolon (';')", "',' as the decimal mark")


def test_tab_separated(tmp_path):
    table = make_table()
    path = tmp_path / "obs.tsv"
    table.to_csv(path, index=False, sep="\t")
    data = load_dataset(make_spec(path))
    assert_read_back(data, table)
    assert (data.delimiter, data.decimal_mark) == ("\t", ".")
    the_problem(list(data.notes), "separated by tab", "'.' as the decimal mark")


def test_tab_separated_with_decimal_comma(tmp_path):
    table = make_table()
    path = tmp_path / "obs.tsv"
    table.to_csv(path, index=False, sep="\t", decimal=",")
    data = load_dataset(make_spec(path))
    assert_read_back(data, table)
    assert (data.delimiter, data.decimal_mark) == ("\t", ",")


def test_comma_file_has_no_delimiter_note(tmp_path):
    table = make_table()
    path = tmp_path / "obs.csv"
    table.to_csv(path, index=False)
    data = load_dataset(make_spec(path))
    assert (data.delimiter, data.decimal_mark) == (",", ".")
    assert not any("separated by" in n for n in data.notes)


def test_quoted_delimiters_and_commas_in_header(tmp_path):
    # Python's csv module quotes a cell holding the delimiter; header names may hold commas.
    table = make_table().rename(columns={"Anet": "A, net"})
    table["memo"] = "ok"
    table.loc[3, "memo"] = "refill; check"
    path = tmp_path / "obs.csv"
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle, delimiter=";")
        writer.writerow(table.columns)
        for record in table.itertuples(index=False):
            writer.writerow([str(v).replace(".", ",") if isinstance(v, float) else v for v in record])
    data = load_dataset(make_spec(path, columns={**COLUMNS, "a_net": "A, net"}))
    np.testing.assert_allclose(data.obs["a_net"], table["A, net"])
    assert data.delimiter == ";" and data.decimal_mark == ","


def test_point_in_a_decimal_comma_file_is_refused(tmp_path):
    table = make_table()
    path = tmp_path / "obs.csv"
    table.to_csv(path, index=False, sep=";", decimal=",")
    lines = path.read_text().splitlines()
    cells = lines[line(4) - 1].split(";")
    position = list(table.columns).index("Ci_in")
    cells[position] = cells[position].replace(",", ".")
    lines[line(4) - 1] = ";".join(cells)
    path.write_text("\n".join(lines) + "\n")
    message = the_problem(problems_of(make_spec(path)), "'Ci_in' (intercellular_co2)", "decimal mark")
    assert f"row {line(4)} ('{cells[position]}')" in message and "one decimal mark" in message


def test_ragged_line_in_semicolon_file(tmp_path):
    path = tmp_path / "obs.csv"
    make_table().to_csv(path, index=False, sep=";")
    lines = path.read_text().splitlines()
    lines[6] += ";extra"
    path.write_text("\n".join(lines) + "\n")
    message = the_problem(problems_of(make_spec(path)), "line 7")
    assert "semicolon" in message and "fields" in message


def test_pipe_separated_file_is_refused(tmp_path):
    path = tmp_path / "obs.csv"
    make_table().to_csv(path, index=False, sep="|")
    first = path.read_text().splitlines()[0]
    message = the_problem(problems_of(make_spec(path)), "one column only")
    assert "comma, a semicolon or a tab" in message and repr(first) in message


def test_long_first_line_is_shortened_in_the_refusal(tmp_path):
    path = tmp_path / "obs.csv"
    header = "|".join(f"column_{i}" for i in range(40))
    path.write_text(header + "\n" + "|".join("1" for _ in range(40)) + "\n")
    message = the_problem(problems_of(make_spec(path)), "one column only")
    assert repr(header[:80] + "...") in message
