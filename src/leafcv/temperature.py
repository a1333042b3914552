"""Temperature responses and Rubisco constants of the FvCB model (`leafcv.fvcb`), in NumPy.

Published constant sets (Rubisco kinetics at 25 C with their activation energies), the normalised
Arrhenius and peaked Arrhenius responses, and Kc, Ko, Gamma* and the effective Michaelis constant at a
leaf temperature. Units and conventions are those of `leafcv.fvcb` (energies in kJ mol-1, entropies in
kJ mol-1 K-1, Ci basis). `leafcv.fvcb` re-exports every public name, so ``fvcb.arrhenius`` keeps working.
Tests: tests/test_fvcb.py.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

#: Gas constant, kJ mol-1 K-1.
R_GAS: float = 8.314e-3
#: Reference temperature, K (25 C).
T_REF: float = 298.15
#: Offset from degrees Celsius to kelvin.
KELVIN: float = 273.15

FloatArray = NDArray[np.float64]

# --------------------------------------------------------------------------------------
# Constant sets
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class RubiscoSet:
    """Rubisco kinetic constants at 25 C and their activation energies.

    Parameters
    ----------
    name
        Short identifier of the set.
    kc25
        Michaelis constant for CO2 at 25 C, umol mol-1.
    ko25
        Michaelis constant for O2 at 25 C, mmol mol-1.
    gamma25
        CO2 compensation point in the absence of day respiration (Gamma*) at 25 C, umol mol-1.
    ha_kc, ha_ko, ha_gamma
        Activation energies of Kc, Ko and Gamma*, kJ mol-1.
    """

    name: str
    kc25: float
    ko25: float
    gamma25: float
    ha_kc: float
    ha_ko: float
    ha_gamma: float


#: Published Rubisco constant sets on a Ci basis. Bernacchi et al. 2001
#: (Plant Cell Environ 24:253-259), normalised Arrhenius form.
RUBISCO_SETS: dict[str, RubiscoSet] = {
    "bernacchi2001": RubiscoSet(
        name="bernacchi2001",
        kc25=404.9,
        ko25=278.4,
        gamma25=42.75,
        ha_kc=79.43,
        ha_ko=36.38,
        ha_gamma=37.83,
    ),
}
#: Name of the default Rubisco set.
DEFAULT_RUBISCO_SET: str = "bernacchi2001"


@dataclass(frozen=True)
class TemperatureResponse:
    """Temperature response of a rate: plain Arrhenius, or peaked when ``hd`` and ``ds`` are set.

    Parameters
    ----------
    ha
        Activation energy, kJ mol-1.
    hd
        Deactivation energy, kJ mol-1 (peaked form only).
    ds
        Entropy term, kJ mol-1 K-1 (peaked form only; a published 485 J mol-1 K-1 is 0.485).

    Raises
    ------
    ValueError
        If only one of ``hd`` and ``ds`` is given.
    """

    ha: float
    hd: float | None = None
    ds: float | None = None

    def __post_init__(self) -> None:
        if (self.hd is None) != (self.ds is None):
            raise ValueError("TemperatureResponse: give both hd and ds (peaked) or neither (plain Arrhenius)")

    @property
    def peaked(self) -> bool:
        """True when the response has a deactivation term."""
        return self.hd is not None


#: Vcmax activation energy, kJ mol-1 (Bernacchi et al. 2001).
VCMAX_HA: float = 65.33
#: Jmax activation energy, kJ mol-1 (Bernacchi et al. 2003, Plant Cell Environ 26:1419-1430).
JMAX_HA: float = 43.54
#: Day respiration activation energy, kJ mol-1 (Bernacchi et al. 2001).
RD_HA: float = 46.39
#: TPU activation energy, kJ mol-1: the Vcmax value reused. An assumption (common practice,
#: no source) rather than a published TPU estimate.
TPU_HA: float = VCMAX_HA

#: Peaked Vcmax response: Bernacchi et al. 2001 Ha with Leuning 2002 (Plant Cell Environ
#: 25:1205-1210) Hd = 149.25 kJ mol-1 and dS = 485 J mol-1 K-1.
VCMAX_PEAKED_LEUNING2002 = TemperatureResponse(ha=VCMAX_HA, hd=149.25, ds=0.485)
#: Peaked Jmax response: Bernacchi et al. 2003 Ha with Leuning 2002 Hd = 152.04 kJ mol-1
#: and dS = 495 J mol-1 K-1.
JMAX_PEAKED_LEUNING2002 = TemperatureResponse(ha=JMAX_HA, hd=152.04, ds=0.495)


def kattge_knorr2007_responses(t_growth_c: float = 25.0) -> tuple[TemperatureResponse, TemperatureResponse]:
    """Peaked Vcmax and Jmax responses acclimated to growth temperature (Kattge & Knorr 2007).

    Parameters
    ----------
    t_growth_c
        Mean growth temperature, C.

    Returns
    -------
    tuple of TemperatureResponse
        (Vcmax, Jmax): Ha 71.513 and 49.884 kJ mol-1, Hd 200 kJ mol-1,
        dS = 668.39 - 1.07 t_g and 659.70 - 0.75 t_g J mol-1 K-1
        (Kattge & Knorr 2007, Plant Cell Environ 30:1176-1190).
    """
    vcmax = TemperatureResponse(ha=71.513, hd=200.0, ds=(668.39 - 1.07 * t_growth_c) / 1000.0)
    jmax = TemperatureResponse(ha=49.884, hd=200.0, ds=(659.70 - 0.75 * t_growth_c) / 1000.0)
    return vcmax, jmax


# --------------------------------------------------------------------------------------
# Temperature
# --------------------------------------------------------------------------------------
def _kelvin(t_leaf_c: ArrayLike) -> FloatArray:
    return np.asarray(t_leaf_c, dtype=float) + KELVIN


def arrhenius(t_leaf_c: ArrayLike, ha: ArrayLike) -> FloatArray:
    """Normalised Arrhenius factor, 1 at 25 C.

    Parameters
    ----------
    t_leaf_c
        Leaf temperature, C.
    ha
        Activation energy, kJ mol-1.

    Returns
    -------
    ndarray
        exp[Ha (T_K - 298.15) / (R 298.15 T_K)].
    """
    tk = _kelvin(t_leaf_c)
    return np.exp(np.asarray(ha, dtype=float) * (tk - T_REF) / (R_GAS * T_REF * tk))


def _log1p_exp(x: FloatArray) -> FloatArray:
    """log(1 + exp(x)) without overflow."""
    return np.logaddexp(0.0, x)


def peaked_arrhenius(t_leaf_c: ArrayLike, ha: ArrayLike, hd: ArrayLike, ds: ArrayLike) -> FloatArray:
    """Normalised peaked Arrhenius factor, 1 at 25 C (Medlyn et al. 2002, Plant Cell Environ 25:1167-1179).

    Parameters
    ----------
    t_leaf_c
        Leaf temperature, C.
    ha
        Activation energy, kJ mol-1.
    hd
        Deactivation energy, kJ mol-1.
    ds
        Entropy term, kJ mol-1 K-1.

    Returns
    -------
    ndarray
        arrhenius(T, Ha) * [1 + exp((298.15 dS - Hd) / (298.15 R))] / [1 + exp((T_K dS - Hd) / (R T_K))].
    """
    tk = _kelvin(t_leaf_c)
    hd = np.asarray(hd, dtype=float)
    ds = np.asarray(ds, dtype=float)
    log_num = _log1p_exp((T_REF * ds - hd) / (R_GAS * T_REF))
    log_den = _log1p_exp((tk * ds - hd) / (R_GAS * tk))
    return arrhenius(t_leaf_c, ha) * np.exp(log_num - log_den)


def temperature_factor(t_leaf_c: ArrayLike, response: TemperatureResponse) -> FloatArray:
    """Normalised temperature factor of a rate, plain or peaked as ``response`` says.

    Parameters
    ----------
    t_leaf_c
        Leaf temperature, C.
    response
        The rate's temperature response.

    Returns
    -------
    ndarray
        Factor multiplying the rate at 25 C.
    """
    if response.peaked:
        return peaked_arrhenius(t_leaf_c, response.ha, response.hd, response.ds)
    return arrhenius(t_leaf_c, response.ha)


def rubisco_constants(
    t_leaf_c: ArrayLike, rset: RubiscoSet = RUBISCO_SETS[DEFAULT_RUBISCO_SET]
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Kc, Ko and Gamma* at leaf temperature.

    Parameters
    ----------
    t_leaf_c
        Leaf temperature, C.
    rset
        Constant set (default Bernacchi et al. 2001).

    Returns
    -------
    tuple of ndarray
        (Kc umol mol-1, Ko mmol mol-1, Gamma* umol mol-1).
    """
    kc = rset.kc25 * arrhenius(t_leaf_c, rset.ha_kc)
    ko = rset.ko25 * arrhenius(t_leaf_c, rset.ha_ko)
    gamma_star = rset.gamma25 * arrhenius(t_leaf_c, rset.ha_gamma)
    return kc, ko, gamma_star


def michaelis_km(kc: ArrayLike, ko: ArrayLike, o2: ArrayLike = 210.0) -> FloatArray:
    """Effective Michaelis constant Km = Kc (1 + O / Ko), umol mol-1.

    Parameters
    ----------
    kc
        Kc, umol mol-1.
    ko
        Ko, mmol mol-1.
    o2
        O2 mole fraction, mmol mol-1.

    Returns
    -------
    ndarray
        Km, umol mol-1.
    """
    return np.asarray(kc, dtype=float) * (1.0 + np.asarray(o2, dtype=float) / np.asarray(ko, dtype=float))
