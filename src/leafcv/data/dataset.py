"""The validated data a comparison works on.

Tests: tests/test_data_reading.py, tests/comparison/test_checks.py, tests/data/test_frame.py.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd

#: The leaf table's column of leaf ids. A structure names the leaf id by the same word
#: (``random = ["leaf"]``, ``cv.by = "leaf"``), so no group or trait column may take it.
LEAF_TERM = "leaf"


@dataclass(frozen=True)
class Dataset:
    """Observations and the leaf table, in leafcv's own variables and units.

    obs
        One row per gas-exchange point, columns: ``leaf`` (str), ``leaf_index`` (int, 0-based, into
        ``leaves``), ``curve`` (str), ``curve_type`` ("aci" or "aq"), ``a_net`` (umol m-2 s-1),
        ``ci`` (umol mol-1), ``ppfd`` (umol m-2 s-1), ``t_leaf`` (deg C), ``o2`` (mmol mol-1),
        ``row`` (1-based line number of the point in the user's file, header = line 1). A comparison
        file names these variables by their data roles (``net_assimilation`` for ``a_net``, ...; see
        `leafcv.data.roles`).
    leaves
        One row per leaf in order of first appearance (row i has leaf_index i): ``leaf`` and every
        group column (str) and trait column (float), under the user's column names.
    source
        The file read, or the name given to a DataFrame read in its place ("the table" by default).
    notes
        How the file was read: every default, conversion and inference used (for the summary).
    warnings
        Things in the data worth a look that do not stop a comparison (a trait constant across
        leaves or with outlying leaves, oxygen that may be in percent); each names the column,
        the leaves or values and what to check.
    delimiter, decimal_mark
        The field delimiter found in the file (',', ';' or a tab; '' for a DataFrame) and its decimal
        mark ('.' or ','; always '.' for a DataFrame).
    """

    obs: pd.DataFrame
    leaves: pd.DataFrame
    groups: tuple[str, ...]
    traits: tuple[str, ...]
    source: Path
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    delimiter: str = ","
    decimal_mark: str = "."

    @property
    def n_leaves(self) -> int:
        return len(self.leaves)
