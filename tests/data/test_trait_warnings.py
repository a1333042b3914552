"""Traits constant across leaves or with outlying leaves are named in a warning; the data still load.

The outlier rule (|robust z| > 5, common practice, no source) is checked against SciPy's median
absolute deviation scaled to the normal SD (``scipy.stats.median_abs_deviation(scale="normal")``)
and, when more than half the leaves share one value, against the mean absolute deviation scaled by
sqrt(pi / 2) (the ratio of SD to mean absolute deviation of a normal distribution).
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy.stats import median_abs_deviation

from leafcv.data import load_dataset
from tests.test_data_reading import LEAF_IDS, make_spec, make_table, the_problem, write


def twelve_leaves() -> pd.DataFrame:
    """The six invented leaves and six more (the same curves under ids ending in 'b')."""
    second = make_table(seed=2)
    second["LeafID"] = second["LeafID"] + "b"
    return pd.concat([make_table(), second], ignore_index=True)


def set_trait(table: pd.DataFrame, name: str, by_leaf: dict[str, float]) -> pd.DataFrame:
    table[name] = table["LeafID"].map(by_leaf)
    return table


def test_constant_trait_is_named(tmp_path):
    table = make_table()
    table["chl_a"] = 30.0
    data = load_dataset(make_spec(write(tmp_path, table)))
    message = the_problem(list(data.warnings), "'chl_a' (trait)")
    assert "same value (30) in all 6 leaves" in message
    assert not any("'N_area'" in w for w in data.warnings)


def test_outlying_leaf_is_named_with_its_value(tmp_path):
    values = dict(zip(LEAF_IDS, [1.0, 1.2, 1.4, 1.6, 1.8, 20.0]))     # L3 typed 20 for 2.0?
    table = set_trait(make_table(), "N_area", values)
    data = load_dataset(make_spec(write(tmp_path, table)))
    x = np.array(list(values.values()))
    z = (x - np.median(x)) / median_abs_deviation(x, scale="normal")
    assert abs(z[-1]) > 5 and (abs(z[:-1]) < 5).all()
    message = the_problem(list(data.warnings), "'N_area' (trait)", "outlying")
    assert f"leaf 'L3' (20, z = {z[-1]:.3g})" in message
    assert not any(f"'{leaf}'" in message for leaf in LEAF_IDS[:-1])
    assert f"median {np.median(x):g}" in message


def test_outlier_when_most_leaves_share_a_value(tmp_path):
    table = twelve_leaves()
    leaves = list(dict.fromkeys(table["LeafID"]))
    values = {leaf: 1.5 for leaf in leaves} | {"L2b": 15.0}
    table = set_trait(table, "N_area", values)
    data = load_dataset(make_spec(write(tmp_path, table)))
    x = np.array([values[leaf] for leaf in leaves])
    assert median_abs_deviation(x) == 0
    z = (15.0 - np.median(x)) / (math.sqrt(math.pi / 2) * np.mean(np.abs(x - np.median(x))))
    message = the_problem(list(data.warnings), "'N_area' (trait)", "outlying")
    assert f"leaf 'L2b' (15, z = {z:.3g})" in message and "mean absolute deviation" in message


def test_spread_without_outliers_gives_no_warning(tmp_path):
    # Twelve leaves spread evenly from 1 to 3.2: every robust z is below 2.
    table = twelve_leaves()
    leaves = list(dict.fromkeys(table["LeafID"]))
    values = {leaf: 1.0 + 0.2 * i for i, leaf in enumerate(leaves)}
    data = load_dataset(make_spec(write(tmp_path, set_trait(table, "N_area", values))))
    x = np.array(list(values.values()))
    assert (abs(x - np.median(x)) / median_abs_deviation(x, scale="normal") < 2).all()
    assert data.warnings == ()


def test_single_leaf_is_not_called_constant(tmp_path):
    table = make_table()
    table = table[table["LeafID"] == "L4"]
    data = load_dataset(make_spec(write(tmp_path, table)))
    assert data.n_leaves == 1 and data.warnings == ()
