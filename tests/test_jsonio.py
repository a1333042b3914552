"""Values to JSON and back (`leafcv.jsonio`): checked against the standard library's json module, which
writes strict JSON (RFC 8259 has no NaN or Infinity) when called with allow_nan=False."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from leafcv.errors import Problem
from leafcv.jsonio import json_float, json_floats, plain


def test_numpy_values_become_python_values_that_json_writes():
    value = {1: np.arange(3), "x": (np.float64(0.5), np.int64(7), np.bool_(True)),
             "p": [Problem("3 divergent transition(s)", "divergences")], "m": np.eye(2)}
    out = plain(value)
    assert out == {"1": [0, 1, 2], "x": [0.5, 7, True], "p": ["3 divergent transition(s)"], "m": [[1.0, 0.0], [0.0, 1.0]]}
    assert type(out["p"][0]) is str and type(out["x"][1]) is int
    assert json.loads(json.dumps(out)) == out


def test_strict_writes_non_finite_numbers_that_strict_json_accepts_and_they_read_back():
    values = np.array([1.25, np.nan, np.inf, -np.inf])
    with pytest.raises(ValueError):          # the standard library refuses NaN in strict JSON
        json.dumps(plain(values), allow_nan=False)
    text = json.dumps(plain({"v": values}, strict=True), allow_nan=False)
    assert json.loads(text) == {"v": [1.25, None, "inf", "-inf"]}
    back = json_floats(json.loads(text)["v"])
    assert back[0] == 1.25 and math.isnan(back[1]) and back[2] == math.inf and back[3] == -math.inf


def test_the_lenient_form_round_trips_floats_exactly():
    x = np.random.default_rng(1).normal(size=50)
    x[3] = np.nan
    back = np.array(json.loads(json.dumps(plain(x))), dtype=float)
    np.testing.assert_array_equal(back, x)          # NaN compares equal in assert_array_equal


def test_missing_arrays_and_numbers():
    assert json_floats(None) is None
    assert np.isnan(json_floats(None, 3)).all() and json_floats(None, 3).shape == (3,)
    assert math.isnan(json_float(None)) and json_float("-inf") == -math.inf and json_float(2) == 2.0
