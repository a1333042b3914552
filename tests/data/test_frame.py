"""Tests of `load_dataset(spec, table)`: a pandas DataFrame in place of the observation file goes through
the same header, column and value checks as the file, and its messages name the table.

The reference is the file itself: the same rows written to a CSV file with pandas' `to_csv` and read
back by `load_dataset`. The points are invented (net assimilation in umol m-2 s-1 of a plausible size).
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from leafcv.data import load_dataset
from leafcv.errors import DataError
from leafcv.spec import DataSpec

ACI_CI = [80.0, 150.0, 250.0, 400.0, 700.0, 1000.0]
ACI_A = [3.1, 8.2, 13.5, 18.0, 21.2, 22.4]
AQ_PPFD = [1000.0, 500.0, 200.0, 100.0, 0.0]
AQ_A = [17.0, 13.1, 7.5, 3.9, -1.2]


def small_frame() -> pd.DataFrame:
    """Two leaves, each an A-Ci curve (6 points at PPFD 1500) and an A-Q curve (5 points at Ci 300),
    with a row of no values between them (as an empty line in a file)."""
    parts = []
    for leaf, scale, species, n in (("L1", 1.0, "sp1", 1.5), ("L2", 0.8, "sp2", 2.1)):
        parts.append(pd.DataFrame({
            "leaf_id": leaf, "Anet": np.round(np.array(ACI_A + AQ_A) * scale, 3),
            "Ci": ACI_CI + [300.0] * 5, "PPFD": [1500.0] * 6 + AQ_PPFD,
            "Tleaf": 25.0 + 0.1 * np.arange(11), "species": species, "n_area": n,
        }))
    gap = pd.DataFrame({c: [np.nan] for c in parts[0].columns})
    return pd.concat([parts[0], gap, parts[1]], ignore_index=True)


def spec_for(file: Path, **changes) -> DataSpec:
    spec = DataSpec(file=file, columns={"a_net": "Anet", "ci": "Ci", "ppfd": "PPFD", "t_leaf": "Tleaf",
                                        "leaf": "leaf_id"}, groups=("species",), traits=("n_area",))
    return replace(spec, **changes)


def csv_of(tmp_path: Path, frame: pd.DataFrame) -> Path:
    path = tmp_path / "obs.csv"
    frame.to_csv(path, index=False)
    return path


def problems(spec: DataSpec, table: pd.DataFrame | None = None, **kwargs) -> tuple[str, list[str]]:
    with pytest.raises(DataError) as info:
        load_dataset(spec, table, **kwargs)
    return info.value.source, info.value.problems


def test_frame_loads_as_the_same_rows_from_a_file(tmp_path: Path) -> None:
    frame = small_frame()
    from_file = load_dataset(spec_for(csv_of(tmp_path, frame)))
    from_frame = load_dataset(spec_for(tmp_path / "not-read.csv"), frame)
    pd.testing.assert_frame_equal(from_frame.obs, from_file.obs)
    pd.testing.assert_frame_equal(from_frame.leaves, from_file.leaves)
    assert from_frame.notes == from_file.notes and from_frame.warnings == from_file.warnings
    assert (from_frame.groups, from_frame.traits) == (("species",), ("n_area",))
    # rows as in the CSV file: header line 1, the empty row (line 13) skipped but counted
    assert from_frame.obs["row"].tolist() == list(range(2, 13)) + list(range(14, 25))
    assert from_frame.source == Path("the table") and from_frame.delimiter == ""
    np.testing.assert_allclose(from_frame.obs["a_net"], frame["Anet"].dropna())


def test_missing_column_named_as_in_the_file_but_in_the_table(tmp_path: Path) -> None:
    # One bad mapping: the file's problem and the table's differ only in naming their source.
    frame = small_frame()
    columns = {**spec_for(tmp_path).columns, "a_net": "A_net"}
    file_source, from_file = problems(spec_for(csv_of(tmp_path, frame), columns=columns))
    table_source, from_frame = problems(spec_for(tmp_path / "not-read.csv", columns=columns), frame)
    assert from_frame == [p.replace("the file", "the table") for p in from_file]
    (message,) = from_frame
    assert message.startswith("column 'A_net' (net_assimilation) is not in the table; did you mean 'Anet'?; "
                              "the table has columns: 'leaf_id', 'Anet'")
    assert file_source == str(tmp_path / "obs.csv") and table_source == "the table"


def test_bad_values_cited_by_the_same_rows_as_the_file(tmp_path: Path) -> None:
    frame = small_frame()
    frame["Ci"] = frame["Ci"].astype(object)
    frame.loc[3, "Ci"] = "x"
    frame.loc[[5, 16], "Anet"] = np.nan
    frame.loc[20, "PPFD"] = 5000.0
    _, from_file = problems(spec_for(csv_of(tmp_path, frame)))
    _, from_frame = problems(spec_for(tmp_path / "not-read.csv"), frame)
    assert from_frame == from_file
    assert any("column 'Ci' (intercellular_co2) has values that are not finite numbers in row 5 ('x')" in p
               for p in from_frame)
    assert any("column 'Anet' (net_assimilation) has missing values in rows 7, 18" in p for p in from_frame)


def test_a_name_given_for_the_table(tmp_path: Path) -> None:
    frame = small_frame().drop(columns="n_area")
    source, found = problems(spec_for(tmp_path / "not-read.csv"), frame, name="field sheet")
    assert source == "field sheet"
    (message,) = found
    assert "column 'n_area' (trait) is not in field sheet; field sheet has columns:" in message


def test_repeated_column_name_in_the_table(tmp_path: Path) -> None:
    frame = small_frame()
    frame.columns = ["leaf_id", "Anet", "Ci", "PPFD", "Tleaf", "Anet", "n_area"]
    _, found = problems(spec_for(tmp_path / "not-read.csv", groups=()), frame)
    assert found == ["column 'Anet' (net_assimilation) appears 2 times in the column names of the table "
                     "(columns 2, 6); rename the copies so each name is unique"]


@pytest.mark.parametrize("table, message", [
    ([1, 2], "the table must be a pandas DataFrame, got a list"),
    (pd.DataFrame(), "the table has no columns; it needs one column per variable, group and trait"),
    (pd.DataFrame({"Anet": [np.nan]}), "the table has no rows with values; add one row per point"),
])
def test_table_that_cannot_be_read(tmp_path: Path, table, message: str) -> None:
    _, found = problems(spec_for(tmp_path / "not-read.csv"), table)
    assert found == [message]
