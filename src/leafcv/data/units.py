"""Units and plausible ranges of the numeric observation columns.

leafcv works in umol m-2 s-1 (net assimilation, photon flux), umol/mol (intercellular CO2), deg C
(leaf temperature) and mmol/mol (oxygen). A column whose values as a whole look like a common unit
mistake (leaf temperature in kelvin, intercellular CO2 in Pa, ...) gets one problem naming the
likely unit and the conversion, in place of a list of every value outside the plausible range.
Oxygen that may be in percent is ambiguous (a low-oxygen experiment gives the same numbers), so it
gets a warning, not a problem.

Tests: tests/data/test_unit_mistakes.py, tests/test_data_reading.py.
"""
from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..spec import DataSpec
from .messages import label, rows_values
from .roles import CI_UNITS_KEY, ROLE_OF

#: Units accepted for intercellular CO2 under ``[data.units] intercellular_co2``.
CI_UNITS: tuple[str, ...] = ("umol/mol", "Pa")

# Plausibility limits. All are common practice, no source, unless stated.
CI_RANGE = (0.0, 3000.0)           # umol mol-1; A-Ci curves rarely go past about 2000
PPFD_RANGE = (0.0, 3000.0)         # umol m-2 s-1; full sunlight is about 2000-2300 (from memory)
A_NET_RANGE = (-50.0, 100.0)       # umol m-2 s-1; C3 leaves rarely exceed 40
T_LEAF_RANGE = (0.0, 50.0)         # deg C
O2_RANGE = (0.0, 1000.0)           # mmol mol-1; the physical bounds of a mole fraction
PRESSURE_RANGE_KPA = (30.0, 110.0)  # about 101.3 at sea level, about 34 on the highest summits (from memory)

# Unit mistakes, recognised from a whole column. The thresholds are common practice, no source; they
# sit between the values a column takes in leafcv's unit and in the mistaken one (magnitudes from memory:
# a C3 leaf in light assimilates 5-40 umol m-2 s-1, air holds about 400 umol/mol CO2 and 209 mmol/mol O2).
A_NET_MMOL_LIKE_MAX = 1.0          # umol m-2 s-1: no |value| above this in a whole table suggests mmol
A_NET_NMOL_LIKE_MEDIAN = 500.0     # umol m-2 s-1: a larger median |value| suggests nmol
CI_MMOL_LIKE_MEDIAN = 3.0          # umol mol-1: a lower median suggests mmol/mol (air: about 0.4)
PA_LIKE_MEDIAN = 100.0             # umol mol-1: a lower median suggests Pa (ambient 40 Pa ~ 400 umol mol-1)
UMOL_LIKE_MEDIAN_PA = 200.0        # Pa: a higher median Ci declared in Pa suggests umol mol-1
KPA_LIKE_MEDIAN_PA = 1.0           # Pa: a lower median Ci declared in Pa suggests kPa (air: about 0.04 kPa)
PPFD_MMOL_LIKE_MAX = 5.0           # umol m-2 s-1: no value above this suggests mmol (full sun: about 2 mmol)
KELVIN_LIKE_MEDIAN = 250.0         # a median leaf temperature above this suggests kelvin
FAHRENHEIT_LIKE_MEDIAN = (50.0, 150.0)  # a median in this span suggests deg F (10-40 deg C is 50-104 deg F)
O2_FRACTION_LIKE_MAX = 1.0         # mmol mol-1: no value above this suggests mol/mol (air: about 0.21)
O2_PERCENT_LIKE_MAX = 100.0        # mmol mol-1: no value above this (every point at 10 % O2 or less) may be %
O2_UMOL_LIKE_MEDIAN = 1000.0       # mmol mol-1: a higher median suggests umol/mol (air: about 209 000)

RANGES = {"a_net": A_NET_RANGE, "ci": CI_RANGE, "ppfd": PPFD_RANGE, "t_leaf": T_LEAF_RANGE, "o2": O2_RANGE}
UNITS = {"a_net": "umol m-2 s-1", "ci": "umol/mol", "ppfd": "umol m-2 s-1", "t_leaf": "deg C",
         "o2": "mmol/mol"}
_RANGE_ADVICE = {
    "a_net": "net assimilation is expected in umol m-2 s-1; check the column and remove logging errors",
    "ci": f"intercellular CO2 is expected in umol/mol; check the column and [data.units] {CI_UNITS_KEY}",
    "ppfd": "photon flux is the incident light in umol m-2 s-1; check the column",
    "t_leaf": "leaf temperature is expected in deg C",
    "o2": "oxygen is expected in mmol/mol (210 in air)",
}


def plausible_pressure(pressure: object) -> bool:
    return isinstance(pressure, (int, float)) and PRESSURE_RANGE_KPA[0] <= pressure <= PRESSURE_RANGE_KPA[1]


def column_problems(values: np.ndarray, rows: np.ndarray, name: str, var: str) -> tuple[list[str], list[str]]:
    """Problems and warnings of one numeric column in leafcv's unit (all variables but Ci: `convert_ci`).

    A likely unit mistake is one problem in place of the range problem.
    """
    finite = values[np.isfinite(values)]
    if not finite.size:
        return [], []
    mistake = _UNIT_MISTAKES[var](finite)
    if mistake:
        return [f"{label(name, ROLE_OF[var])} {mistake}"], []
    warnings = []
    if var == "o2" and float(np.max(finite)) <= O2_PERCENT_LIKE_MAX:
        warnings.append(f"{label(name, ROLE_OF[var])} {_o2_percent_warning(finite)}")
    return range_problems(values, rows, name, var), warnings


def convert_ci(ci: np.ndarray, rows: np.ndarray, name: str,
               spec: DataSpec) -> tuple[np.ndarray, list[str], list[str]]:
    """Ci in umol/mol, with unit hints and range problems; unconvertible units skip the checks."""
    finite = ci[np.isfinite(ci)]
    median = float(np.median(finite)) if finite.size else np.nan
    if spec.ci_unit == "umol/mol":
        mistake = _ci_umol_mistake(median)
        if mistake:
            return ci, [f"{label(name, ROLE_OF['ci'])} {mistake}"], []
        return ci, range_problems(ci, rows, name, "ci"), []
    if spec.ci_unit != "Pa":
        return ci, [], []
    mistake = _ci_pa_mistake(median)
    if mistake:
        return ci, [f"{label(name, ROLE_OF['ci'])} {mistake}"], []
    pressure = spec.pressure_kpa
    if not plausible_pressure(pressure):
        return ci, [], []          # the pressure problem is reported with the units
    # Dalton's law: mole fraction = partial pressure / total pressure; Pa / (kPa * 1000) * 1e6 umol/mol.
    converted = ci * 1000.0 / pressure
    note = [f"Ci converted from Pa to umol/mol at {pressure:g} kPa (Ci x 1000 / {pressure:g})"]
    unit = f"umol/mol, i.e. {CI_RANGE[0]:g}-{CI_RANGE[1] * pressure / 1000:g} Pa at {pressure:g} kPa"
    return converted, range_problems(converted, rows, name, "ci", unit, shown=ci), note


def range_problems(values: np.ndarray, rows: np.ndarray, name: str, var: str,
                   unit: str | None = None, shown: np.ndarray | None = None) -> list[str]:
    low, high = RANGES[var]
    outside = np.isfinite(values) & ((values < low) | (values > high))
    if not outside.any():
        return []
    shown = values if shown is None else shown
    return [f"{label(name, ROLE_OF[var])} has {int(outside.sum())} value(s) outside the plausible range {low:g} to "
            f"{high:g} {unit or UNITS[var]} in {rows_values(rows[outside], list(shown[outside]))}; "
            f"{_RANGE_ADVICE[var]}"]


# ---------------------------------------------------------------- likely unit mistakes
# Each takes a column's finite values (or Ci's median) and returns the rest of a sentence that
# starts with the column's label, or None.

def _ci_umol_mistake(median: float) -> str | None:
    if median < CI_MMOL_LIKE_MEDIAN:
        return (f"has a median of {median:.3g}, far too low for umol/mol (air gives about 400); this looks like "
                f"mmol/mol (air: about 0.4): multiply the column by 1000")
    if median < PA_LIKE_MEDIAN:
        return (f"has a median of {median:.3g}, low for umol/mol (air gives a few hundred); this looks like Pa; "
                f"set {CI_UNITS_KEY} = \"Pa\" and pressure_kpa (the air pressure in kPa) under [data.units]")
    return None


def _ci_pa_mistake(median: float) -> str | None:
    if median > UMOL_LIKE_MEDIAN_PA:
        return (f"has a median of {median:.3g}, high for Pa (air gives about 40); this looks like umol/mol; "
                f"set {CI_UNITS_KEY} = \"umol/mol\" under [data.units]")
    if median < KPA_LIKE_MEDIAN_PA:
        return (f"has a median of {median:.3g}, far too low for Pa (air gives about 40); this looks like kPa "
                f"(air: about 0.04): multiply the column by 1000 to give Pa")
    return None


def _a_net_mistake(values: np.ndarray) -> str | None:
    largest, median = float(np.max(np.abs(values))), float(np.median(np.abs(values)))
    if largest < A_NET_MMOL_LIKE_MAX:
        return (f"has no value beyond {A_NET_MMOL_LIKE_MAX:g} umol m-2 s-1 in size (largest {largest:.3g}), while "
                f"a leaf in light assimilates several; this looks like mmol m-2 s-1: multiply the column by 1000")
    if median > A_NET_NMOL_LIKE_MEDIAN:
        return (f"has a median size of {median:.4g}, far above the few to 40 umol m-2 s-1 of a leaf; this looks "
                f"like nmol m-2 s-1: divide the column by 1000")
    return None


def _ppfd_mistake(values: np.ndarray) -> str | None:
    largest = float(np.max(values))
    if largest < PPFD_MMOL_LIKE_MAX:
        return (f"has no value above {PPFD_MMOL_LIKE_MAX:g} umol m-2 s-1 (largest {largest:.3g}), while response "
                f"curves reach hundreds to about 2000; this looks like mmol m-2 s-1: multiply the column by 1000")
    return None


def _t_leaf_mistake(values: np.ndarray) -> str | None:
    median = float(np.median(values))
    if median > KELVIN_LIKE_MEDIAN:
        return f"looks like kelvin (median {median:.4g}); convert it to deg C (subtract 273.15)"
    if FAHRENHEIT_LIKE_MEDIAN[0] < median <= FAHRENHEIT_LIKE_MEDIAN[1]:
        return (f"looks like deg F (median {median:.4g}, too warm for a leaf in deg C); convert it to deg C "
                f"((value - 32) x 5 / 9)")
    return None


def _o2_mistake(values: np.ndarray) -> str | None:
    largest, median = float(np.max(values)), float(np.median(values))
    if largest < O2_FRACTION_LIKE_MAX:
        return (f"has no value above {O2_FRACTION_LIKE_MAX:g} mmol/mol (largest {largest:.3g}); this looks like a "
                f"mole fraction in mol/mol (air: about 0.21): multiply the column by 1000")
    if median > O2_UMOL_LIKE_MEDIAN:
        return (f"has a median of {median:.6g}, above the mmol/mol of pure oxygen (1000); this looks like umol/mol "
                f"or ppm (air: about 209 000): divide the column by 1000")
    return None


def _o2_percent_warning(values: np.ndarray) -> str:
    return (f"has no value above {O2_PERCENT_LIKE_MAX:g} mmol/mol (largest {float(np.max(values)):.3g}), so every point "
            f"is read as measured at 10 % oxygen or less; if the column is in percent (air: about 21), multiply "
            f"it by 10 (air: about 210 mmol/mol)")


_UNIT_MISTAKES: dict[str, Callable[[np.ndarray], str | None]] = {
    "a_net": _a_net_mistake, "ppfd": _ppfd_mistake, "t_leaf": _t_leaf_mistake, "o2": _o2_mistake,
}
