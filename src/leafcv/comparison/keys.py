"""The vocabulary of a comparison file: its format versions, the keys of each table and the limits on
values. Every module of `leafcv.comparison` reads them from here.

Tests: tests/comparison/test_load.py, tests/comparison/test_sections.py, tests/comparison/test_structures.py,
tests/comparison/test_grid.py.
"""
from __future__ import annotations

import re

from ..data.dataset import LEAF_TERM
from ..data.roles import CI_UNITS_KEY
from ..parameters import RATIO_TARGET
from ..spec import PARAMETERS

__all__ = ["FORMAT_VERSION", "SUPPORTED_FORMATS", "LEAF_TERM", "RATIO_TARGET", "MAX_SEED", "MAX_TREEDEPTH_LIMIT"]

#: The newest comparison-file format leafcv reads; format 1 files are read too.
FORMAT_VERSION = 2
SUPPORTED_FORMATS: tuple[int, ...] = (1, 2)

TOP_KEYS: tuple[str, ...] = ("format", "question", "data", "sampler", "cv", "model", "priors", "structure", "grid",
                             "engine")
#: Keys that format 2 added (a format-1 file using them is told to say format = 2).
FORMAT2_TOP_KEYS: tuple[str, ...] = ("model", "priors", "grid", "engine")
#: [engine]: the Stan engine's name (``leafcv.engines.choice.ENGINE_NAMES``).
ENGINE_KEYS: tuple[str, ...] = ("name",)
FORMAT2_PARAM_KEYS: tuple[str, ...] = ("slopes", "split")
FORMAT2_STRUCTURE_KEYS: tuple[str, ...] = ("model", "priors", "leaf_correlation", "lkj_eta")
STRUCTURE_KEYS: tuple[str, ...] = ("name", *FORMAT2_STRUCTURE_KEYS)
MODEL_KEYS: tuple[str, ...] = ("tpu", "likelihood", "sigma", "transition", "smooth_curvature", "electron",
                               "temperature")
#: [priors] keys: intercepts on the natural scale, then the scales of the other priors.
PRIOR_INTERCEPT_KEYS: tuple[str, ...] = (*PARAMETERS, "tpu25", "jmax25_ratio", "rd25_ratio")
#: [priors] scale key -> the PriorSet field it sets
PRIOR_SCALE_FIELDS: dict[str, str] = {"slope_sd_log": "slope_sd_log", "slope_sd_logit": "slope_sd_logit",
                                      "level_sd": "level_sd", "group_sd": "group_sd_scale",
                                      "leaf_sd": "leaf_sd_scale", "sigma_sd": "sigma_scale"}
PRIOR_KEYS: tuple[str, ...] = (*PRIOR_INTERCEPT_KEYS, *PRIOR_SCALE_FIELDS, "nu")
GRID_KEYS: tuple[str, ...] = ("name", "base", "leaf_effects", "choices")
DATA_KEYS: tuple[str, ...] = ("file", "columns", "units", "leaf")
UNITS_KEYS: tuple[str, ...] = (CI_UNITS_KEY, "pressure_kpa")
LEAF_KEYS: tuple[str, ...] = ("groups", "traits", "centre", "scale")
SAMPLER_KEYS: tuple[str, ...] = ("chains", "warmup", "draws", "seed", "adapt_delta", "max_treedepth")
CV_KEYS: tuple[str, ...] = ("by", "method", "folds")
PARAM_KEYS: tuple[str, ...] = ("fixed", "random", "ratio_to", "centring", "slopes", "split", "smooth")
#: Stan's seeds are unsigned 32-bit integers.
MAX_SEED = 2**32 - 1
MAX_TREEDEPTH_LIMIT = 20
#: A structure, grid, axis or choice name becomes (part of) a file name.
NAME_RE = re.compile(r"[A-Za-z0-9._-]+")
