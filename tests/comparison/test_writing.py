"""The comparison-file writer of leafcv.from_frame: what it writes reads back to the same values with
Python's own TOML reader (tomllib, TOML 1.0), including NumPy numbers and characters TOML escapes."""
from __future__ import annotations

import tomllib

import numpy as np

from leafcv.comparison.writing import comparison_text


def test_values_round_trip_through_tomllib():
    raw = {"format": 2, "question": 'is "month" fixed?\\ tab\t del\x7f, ü, 🌿',
           "data": {"file": "observations.csv", "columns": {"net_assimilation": "A (µmol)"},
                    "leaf": {"groups": ["taxon"], "traits": ["n"], "centre": {"n": np.float64(1.925)},
                             "scale": {"n": np.float32(0.5), "weird key": 2}}},
           "sampler": {"chains": np.int64(2), "adapt_delta": 0.95, "seed": 4294967295},
           "structure": [{"name": "a", "vcmax25": {"random": ["leaf"], "centring": {"leaf": "auto"}}},
                         {"name": "b", "jmax25": {"ratio_to": "vcmax25"}, "leaf_correlation": True}]}
    back = tomllib.loads(comparison_text(raw, "a comment\nover two lines"))
    assert back["question"] == raw["question"]
    assert back["data"]["leaf"]["centre"]["n"] == 1.925 and back["data"]["leaf"]["scale"]["n"] == 0.5
    assert back["data"]["leaf"]["scale"]["weird key"] == 2
    assert back["data"]["columns"] == raw["data"]["columns"]
    assert back["sampler"] == {"chains": 2, "adapt_delta": 0.95, "seed": 4294967295}
    assert back["structure"] == [{"name": "a", "vcmax25": {"random": ["leaf"], "centring": {"leaf": "auto"}}},
                                 {"name": "b", "jmax25": {"ratio_to": "vcmax25"}, "leaf_correlation": True}]
