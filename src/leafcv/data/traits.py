"""Warnings about leaf traits that are constant across leaves or have outlying values.

Neither stops a comparison: a constant trait carries no information about differences between
leaves, and an outlying value may be real. Both are worth a look before fitting.

Outlier rule (common practice, no source): a leaf's value is outlying when its robust z-score,
(value - median) / robust SD, exceeds `ROBUST_Z_LIMIT` in size. The robust SD is 1.4826 x the
median absolute deviation from the median (MAD), an estimate of the SD for normal data
(1.4826 = 1 / the standard normal distribution's 75 % quantile). When more than half the leaves
share one value the MAD is 0; the robust SD is then 1.2533 x the mean absolute deviation from the
median (1.2533 = sqrt(pi / 2), likewise an estimate of the SD for normal data).

Tests: tests/data/test_trait_warnings.py.
"""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from .messages import MAX_LISTED, label
from ..data.dataset import LEAF_TERM

ROBUST_Z_LIMIT = 5.0               # common practice, no source
MAD_TO_SD = 1.4826                 # 1 / Phi^-1(0.75): the MAD of a normal distribution is 0.6745 SD
MEAN_AD_TO_SD = 1.2533             # sqrt(pi / 2): the mean absolute deviation of a normal distribution is 0.7979 SD


def trait_warnings(leaves: pd.DataFrame, traits: Sequence[str]) -> list[str]:
    """One warning per trait that is constant across two or more leaves or has outlying leaves."""
    warnings = []
    leaf_ids = leaves[LEAF_TERM].to_numpy(dtype=object)
    for name in traits:
        values = leaves[name].to_numpy(dtype=float)
        if len(values) < 2:
            continue
        if np.all(values == values[0]):
            warnings.append(f"{label(name, 'trait')} has the same value ({values[0]:g}) in all "
                            f"{len(values)} leaves, so it cannot explain differences between leaves; check the "
                            f"column, or leave the trait out of the structures")
            continue
        warnings += _outlier_warning(name, leaf_ids, values)
    return warnings


def robust_z(values: np.ndarray) -> tuple[np.ndarray, str]:
    """(value - median) / robust SD as in the module's outlier rule, and how the robust SD was found.

    The values must not all be equal.
    """
    centre = np.median(values)
    deviation = np.abs(values - centre)
    mad = np.median(deviation)
    if mad > 0:
        return (values - centre) / (MAD_TO_SD * mad), f"robust SD = {MAD_TO_SD:g} x median absolute deviation"
    return ((values - centre) / (MEAN_AD_TO_SD * np.mean(deviation)),
            f"robust SD = {MEAN_AD_TO_SD:g} x mean absolute deviation, as more than half the leaves share the median")


def _outlier_warning(name: str, leaf_ids: np.ndarray, values: np.ndarray) -> list[str]:
    z, scale = robust_z(values)
    outlying = np.flatnonzero(np.abs(z) > ROBUST_Z_LIMIT)
    if not outlying.size:
        return []
    listed = ", ".join(f"leaf {leaf_ids[i]!r} ({values[i]:g}, z = {z[i]:.3g})" for i in outlying[:MAX_LISTED])
    more = f" and {outlying.size - MAX_LISTED} more" if outlying.size > MAX_LISTED else ""
    return [f"{label(name, 'trait')} has outlying values in {listed}{more}: more than {ROBUST_Z_LIMIT:g} robust "
            f"SDs from the median {np.median(values):g} ({scale}); check them for typing or unit errors"]
