"""Vectorised C3 photosynthesis model of Farquhar, von Caemmerer & Berry (FvCB) in NumPy.

Everything here is a pure function of NumPy arrays (or scalars) and broadcasts over them.
The same equations live in the Stan functions file; this module is used for simulation,
per-curve least-squares fits (initial values), held-out predictions and figures. The temperature
responses and Rubisco constant sets are in `leafcv.temperature` (re-exported here). Tests: tests/test_fvcb.py.

Conventions
-----------
- Ci basis (intercellular mole fractions): Ci, Kc and Gamma* in umol mol-1, O2 and Ko in
  mmol mol-1; rates in umol m-2 s-1; Q (incident PPFD) in umol m-2 s-1; leaf temperature
  in degrees Celsius.
- Temperature scaling uses the *normalised* Arrhenius form (equal to 1 at 25 C),
  exp[Ha (T_K - 298.15) / (R 298.15 T_K)], never the "scaling constant" form
  exp(c - Ha / (R T_K)); the two differ by 0.3-0.6 % at 25 C (Bernacchi et al. 2001).
- Energies in kJ mol-1 and entropies in kJ mol-1 K-1, so that ``R_GAS`` is in
  kJ mol-1 K-1. Published entropy terms in J mol-1 K-1 are divided by 1000 here.
- Inputs are assumed physical (non-negative rates, 0 <= theta <= 1); only the option
  strings and the curvature ranges are checked.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike

from .temperature import (  # noqa: F401  (re-exported: fvcb is the model's one namespace)
    DEFAULT_RUBISCO_SET,
    FloatArray,
    JMAX_HA,
    JMAX_PEAKED_LEUNING2002,
    KELVIN,
    RD_HA,
    RUBISCO_SETS,
    R_GAS,
    RubiscoSet,
    TPU_HA,
    T_REF,
    TemperatureResponse,
    VCMAX_HA,
    VCMAX_PEAKED_LEUNING2002,
    arrhenius,
    kattge_knorr2007_responses,
    michaelis_km,
    peaked_arrhenius,
    rubisco_constants,
    temperature_factor,
)


#: Valid values of the ``electron`` option: electrons per CO2 in the J-limited rate.
ELECTRON_CHOICES: tuple[str, ...] = ("4-8", "4.5-10.5")
#: Valid values of the ``transition`` option.
TRANSITION_CHOICES: tuple[str, ...] = ("min", "smooth")

_ELECTRON_COEFFICIENTS: dict[str, tuple[float, float]] = {"4-8": (4.0, 8.0), "4.5-10.5": (4.5, 10.5)}



# --------------------------------------------------------------------------------------
# Rates
# --------------------------------------------------------------------------------------
def _smaller_root(b: FloatArray, c: FloatArray, curvature: FloatArray) -> FloatArray:
    """Smaller root of curvature x^2 - b x + c = 0, computed without cancellation.

    For b >= 0 the root is 2c / (b + sqrt(D)) (exact at curvature 0); for b < 0 it is
    (b - sqrt(D)) / (2 curvature). The discriminant D = b^2 - 4 curvature c is clamped at 0.
    A zero denominator (b = c = 0) gives 0.
    """
    b, c, curvature = np.broadcast_arrays(
        np.asarray(b, dtype=float), np.asarray(c, dtype=float), np.asarray(curvature, dtype=float)
    )
    sq = np.sqrt(np.maximum(b * b - 4.0 * curvature * c, 0.0))
    positive = b >= 0.0
    den_pos = b + sq
    den_neg = 2.0 * curvature
    with np.errstate(divide="ignore", invalid="ignore"):
        root_pos = np.where(den_pos != 0.0, 2.0 * c / np.where(den_pos != 0.0, den_pos, 1.0), 0.0)
        root_neg = (b - sq) / den_neg
    return np.where(positive, root_pos, root_neg)


def electron_transport(alpha: ArrayLike, q: ArrayLike, jmax: ArrayLike, theta: ArrayLike) -> FloatArray:
    """Electron transport rate J: smaller root of theta J^2 - (alpha Q + Jmax) J + alpha Q Jmax = 0.

    Computed as J = 2c / (b + sqrt(max(b^2 - 4 theta c, 0))) with b = alpha Q + Jmax and
    c = alpha Q Jmax: exact at theta = 0, stable near it, min(alpha Q, Jmax) at theta = 1,
    and 0 (not NaN) at Q = 0.

    Parameters
    ----------
    alpha
        Electrons transported per incident photon.
    q
        Incident PPFD, umol m-2 s-1.
    jmax
        Maximum electron transport rate, umol m-2 s-1.
    theta
        Curvature, 0 <= theta <= 1.

    Returns
    -------
    ndarray
        J, umol m-2 s-1.

    Raises
    ------
    ValueError
        If any theta lies outside [0, 1].
    """
    theta = np.asarray(theta, dtype=float)
    if np.any((theta < 0.0) | (theta > 1.0)):
        raise ValueError("electron_transport: theta must lie in [0, 1]")
    aq = np.asarray(alpha, dtype=float) * np.asarray(q, dtype=float)
    jmax = np.asarray(jmax, dtype=float)
    b, c = aq + jmax, aq * jmax
    if np.all(b > 0.0):
        # b > 0 (the usual case): only the cancellation-free branch of _smaller_root is needed
        return 2.0 * c / (b + np.sqrt(np.maximum(b * b - 4.0 * theta * c, 0.0)))
    return _smaller_root(b, c, theta)


def rubisco_limited(
    vcmax: ArrayLike, ci: ArrayLike, kc: ArrayLike, ko: ArrayLike, gamma_star: ArrayLike, o2: ArrayLike = 210.0
) -> FloatArray:
    """Rubisco-limited gross rate Wc = Vcmax (Ci - Gamma*) / (Ci + Kc (1 + O / Ko)).

    Parameters
    ----------
    vcmax
        Vcmax at leaf temperature, umol m-2 s-1.
    ci
        Intercellular CO2, umol mol-1.
    kc, ko, gamma_star
        Kc (umol mol-1), Ko (mmol mol-1), Gamma* (umol mol-1) at leaf temperature.
    o2
        O2, mmol mol-1.

    Returns
    -------
    ndarray
        Wc, umol m-2 s-1.
    """
    ci = np.asarray(ci, dtype=float)
    return np.asarray(vcmax, dtype=float) * (ci - gamma_star) / (ci + michaelis_km(kc, ko, o2))


def electron_coefficients(electron: str) -> tuple[float, float]:
    """(e1, e2) of Wj = J (Ci - G*) / (e1 Ci + e2 G*) for an ELECTRON_CHOICES name."""
    try:
        return _ELECTRON_COEFFICIENTS[electron]
    except (KeyError, TypeError):
        raise ValueError(f"electron must be one of {list(ELECTRON_CHOICES)}, got {electron!r}") from None


def electron_limited(j: ArrayLike, ci: ArrayLike, gamma_star: ArrayLike, electron: str = "4-8") -> FloatArray:
    """Electron-transport-limited gross rate Wj.

    Parameters
    ----------
    j
        Electron transport rate, umol m-2 s-1.
    ci
        Intercellular CO2, umol mol-1.
    gamma_star
        Gamma*, umol mol-1.
    electron
        "4-8": J (Ci - G) / (4 Ci + 8 G); "4.5-10.5": J (Ci - G) / (4.5 Ci + 10.5 G).

    Returns
    -------
    ndarray
        Wj, umol m-2 s-1.

    Raises
    ------
    ValueError
        For an unknown ``electron`` option.
    """
    a, b = electron_coefficients(electron)
    ci = np.asarray(ci, dtype=float)
    return np.asarray(j, dtype=float) * (ci - gamma_star) / (a * ci + b * np.asarray(gamma_star, dtype=float))


def tpu_limited(tpu: ArrayLike) -> FloatArray:
    """Triose-phosphate-utilisation-limited rate Wp = 3 TPU.

    Parameters
    ----------
    tpu
        TPU at leaf temperature, umol m-2 s-1.

    Returns
    -------
    ndarray
        Wp, umol m-2 s-1.
    """
    return 3.0 * np.asarray(tpu, dtype=float)


def colimit(w1: ArrayLike, w2: ArrayLike, curvature: ArrayLike) -> FloatArray:
    """Smooth co-limitation: smaller root of curvature A^2 - (w1 + w2) A + w1 w2 = 0.

    The root is never above min(w1, w2) and equals it at curvature 1. It is computed
    without cancellation for rates of either sign (below Gamma* both rates are negative).

    Parameters
    ----------
    w1, w2
        The two limiting rates.
    curvature
        Co-limitation curvature, 0 < curvature <= 1 (leafcv's option defaults to 0.99).

    Returns
    -------
    ndarray
        The co-limited rate.

    Raises
    ------
    ValueError
        If any curvature lies outside (0, 1].
    """
    curvature = np.asarray(curvature, dtype=float)
    if np.any((curvature <= 0.0) | (curvature > 1.0)):
        raise ValueError("colimit: curvature must lie in (0, 1]")
    w1 = np.asarray(w1, dtype=float)
    w2 = np.asarray(w2, dtype=float)
    return _smaller_root(w1 + w2, w1 * w2, curvature)


def crossover_ci(
    vcmax: ArrayLike, j: ArrayLike, km: ArrayLike, gamma_star: ArrayLike, electron: str = "4-8"
) -> FloatArray:
    """Ci (other than Gamma*) at which Wc = Wj.

    Setting Vcmax (Ci - G) / (Ci + Km) = J (Ci - G) / (a Ci + b G) and dividing by Ci - G gives
    Ci = (J Km - b Vcmax G) / (a Vcmax - J), with (a, b) = (4, 8) or (4.5, 10.5).
    Where a Vcmax = J there is no crossover and NaN is returned; a negative value means the
    two curves do not cross at a positive Ci.

    Parameters
    ----------
    vcmax
        Vcmax at leaf temperature, umol m-2 s-1.
    j
        Electron transport rate, umol m-2 s-1.
    km
        Kc (1 + O / Ko), umol mol-1.
    gamma_star
        Gamma*, umol mol-1.
    electron
        "4-8" or "4.5-10.5".

    Returns
    -------
    ndarray
        Crossover Ci, umol mol-1.
    """
    a, b = electron_coefficients(electron)
    vcmax = np.asarray(vcmax, dtype=float)
    j = np.asarray(j, dtype=float)
    num = j * np.asarray(km, dtype=float) - b * vcmax * np.asarray(gamma_star, dtype=float)
    den = a * vcmax - j
    num, den = np.broadcast_arrays(num, den)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den != 0.0, num / np.where(den != 0.0, den, 1.0), np.nan)


# --------------------------------------------------------------------------------------
# Net assimilation
# --------------------------------------------------------------------------------------
class LimitingRates(NamedTuple):
    """Rates at leaf temperature, umol m-2 s-1 (``km`` and ``gamma_star`` in umol mol-1).

    ``wp`` and ``tpu`` are None when TPU limitation is off; ``a`` is net assimilation.
    """

    wc: FloatArray
    wj: FloatArray
    wp: FloatArray | None
    j: FloatArray
    rd: FloatArray
    a: FloatArray
    vcmax: FloatArray
    jmax: FloatArray
    tpu: FloatArray | None
    gamma_star: FloatArray
    km: FloatArray


def _check_transition(transition: str) -> None:
    if transition not in TRANSITION_CHOICES:
        raise ValueError(f"transition must be one of {list(TRANSITION_CHOICES)}, got {transition!r}")


def _combine(
    wc: FloatArray, wj: FloatArray, wp: FloatArray | None, transition: str, smooth_curvature: float
) -> FloatArray:
    """Gross assimilation from the limiting rates: hard minimum or nested smooth co-limitation."""
    if transition == "min":
        gross = np.minimum(wc, wj)
        return gross if wp is None else np.minimum(gross, wp)
    gross = colimit(wc, wj, smooth_curvature)
    return gross if wp is None else colimit(gross, wp, smooth_curvature)


def limiting_rates(
    ci: ArrayLike,
    q: ArrayLike,
    t_leaf_c: ArrayLike,
    vcmax25: ArrayLike,
    jmax25: ArrayLike,
    alpha: ArrayLike,
    theta: ArrayLike,
    rd25: ArrayLike,
    *,
    o2: ArrayLike = 210.0,
    tpu25: ArrayLike | None = None,
    electron: str = "4-8",
    transition: str = "min",
    smooth_curvature: float = 0.99,
    vcmax_response: TemperatureResponse = TemperatureResponse(VCMAX_HA),
    jmax_response: TemperatureResponse = TemperatureResponse(JMAX_HA),
    rd_response: TemperatureResponse = TemperatureResponse(RD_HA),
    tpu_response: TemperatureResponse = TemperatureResponse(TPU_HA),
    rset: RubiscoSet = RUBISCO_SETS[DEFAULT_RUBISCO_SET],
) -> LimitingRates:
    """FvCB limiting rates and net assimilation at leaf temperature.

    Parameters
    ----------
    ci
        Intercellular CO2, umol mol-1.
    q
        Incident PPFD, umol m-2 s-1.
    t_leaf_c
        Leaf temperature, C.
    vcmax25, jmax25, rd25
        Vcmax, Jmax and day respiration at 25 C, umol m-2 s-1.
    alpha
        Electrons transported per incident photon.
    theta
        Curvature of the light response of J, in [0, 1].
    o2
        O2, mmol mol-1.
    tpu25
        TPU at 25 C, umol m-2 s-1; None switches TPU limitation off.
    electron
        "4-8" or "4.5-10.5" electron requirement of the J-limited rate.
    transition
        "min" (hard minimum, the default) or "smooth" (quadratic co-limitation of Wc and Wj,
        then of that with Wp, with curvature ``smooth_curvature``).
    smooth_curvature
        Curvature of the smooth transition, in (0, 1].
    vcmax_response, jmax_response, rd_response, tpu_response
        Temperature responses (defaults: normalised Arrhenius with Bernacchi et al. 2001/2003 Ha;
        TPU reuses the Vcmax Ha).
    rset
        Rubisco constant set.

    Returns
    -------
    LimitingRates
        wc, wj, wp, j, rd, a and the temperature-scaled parameters.

    Raises
    ------
    ValueError
        For an unknown ``electron`` or ``transition`` option.
    """
    _check_transition(transition)
    electron_coefficients(electron)
    kc, ko, gamma_star = rubisco_constants(t_leaf_c, rset)
    km = michaelis_km(kc, ko, o2)
    vcmax = np.asarray(vcmax25, dtype=float) * temperature_factor(t_leaf_c, vcmax_response)
    jmax = np.asarray(jmax25, dtype=float) * temperature_factor(t_leaf_c, jmax_response)
    rd = np.asarray(rd25, dtype=float) * temperature_factor(t_leaf_c, rd_response)
    j = electron_transport(alpha, q, jmax, theta)
    wc = rubisco_limited(vcmax, ci, kc, ko, gamma_star, o2)
    wj = electron_limited(j, ci, gamma_star, electron)
    tpu = wp = None
    if tpu25 is not None:
        tpu = np.asarray(tpu25, dtype=float) * temperature_factor(t_leaf_c, tpu_response)
        wp = tpu_limited(tpu)
    a = _combine(wc, wj, wp, transition, smooth_curvature) - rd
    return LimitingRates(wc=wc, wj=wj, wp=wp, j=j, rd=rd, a=a, vcmax=vcmax, jmax=jmax, tpu=tpu,
                         gamma_star=gamma_star, km=km)


@dataclass(frozen=True, eq=False)
class PointFactors:
    """The parts of the FvCB model at given points that do not depend on a leaf's parameters:
    Wc = Vcmax25 fv fc, Wj = J(alpha, Q, Jmax25 fj, theta) fe, Rd = Rd25 fr, Wp = 3 TPU25 ft (the same
    equations as `limiting_rates`, factored). Computed once, they let a caller evaluate A at many
    parameter values (the quadrature over a held-out leaf's effects) for the cost of the light response.
    """

    q: FloatArray
    fc: FloatArray      # (Ci - G*) / (Ci + Kc (1 + O / Ko))
    fe: FloatArray      # (Ci - G*) / (e1 Ci + e2 G*)
    fv: FloatArray
    fj: FloatArray
    fr: FloatArray
    ft: FloatArray

    @classmethod
    def at(
        cls,
        ci: ArrayLike,
        q: ArrayLike,
        t_leaf_c: ArrayLike,
        o2: ArrayLike = 210.0,
        *,
        electron: str = "4-8",
        vcmax_response: TemperatureResponse = TemperatureResponse(VCMAX_HA),
        jmax_response: TemperatureResponse = TemperatureResponse(JMAX_HA),
        rd_response: TemperatureResponse = TemperatureResponse(RD_HA),
        tpu_response: TemperatureResponse = TemperatureResponse(TPU_HA),
        rset: RubiscoSet = RUBISCO_SETS[DEFAULT_RUBISCO_SET],
    ) -> "PointFactors":
        """The factors at points (arguments as in `limiting_rates`)."""
        ci = np.asarray(ci, dtype=float)
        kc, ko, gamma_star = rubisco_constants(t_leaf_c, rset)
        e1, e2 = electron_coefficients(electron)
        return cls(q=np.asarray(q, dtype=float),
                   fc=(ci - gamma_star) / (ci + michaelis_km(kc, ko, o2)),
                   fe=(ci - gamma_star) / (e1 * ci + e2 * gamma_star),
                   fv=temperature_factor(t_leaf_c, vcmax_response), fj=temperature_factor(t_leaf_c, jmax_response),
                   fr=temperature_factor(t_leaf_c, rd_response), ft=temperature_factor(t_leaf_c, tpu_response))

    def net_assimilation(
        self,
        vcmax25: ArrayLike,
        jmax25: ArrayLike,
        alpha: ArrayLike,
        theta: ArrayLike,
        rd25: ArrayLike,
        tpu25: ArrayLike | None = None,
        transition: str = "min",
        smooth_curvature: float = 0.99,
    ) -> FloatArray:
        """A at the points, broadcast over the parameters (put the point axis last)."""
        j = electron_transport(alpha, self.q, np.asarray(jmax25, dtype=float) * self.fj, theta)
        wc = np.asarray(vcmax25, dtype=float) * self.fv * self.fc
        wp = None if tpu25 is None else tpu_limited(np.asarray(tpu25, dtype=float) * self.ft)
        return _combine(wc, j * self.fe, wp, transition, smooth_curvature) - np.asarray(rd25, dtype=float) * self.fr


def net_assimilation(
    ci: ArrayLike,
    q: ArrayLike,
    t_leaf_c: ArrayLike,
    vcmax25: ArrayLike,
    jmax25: ArrayLike,
    alpha: ArrayLike,
    theta: ArrayLike,
    rd25: ArrayLike,
    *,
    o2: ArrayLike = 210.0,
    tpu25: ArrayLike | None = None,
    electron: str = "4-8",
    transition: str = "min",
    smooth_curvature: float = 0.99,
    vcmax_response: TemperatureResponse = TemperatureResponse(VCMAX_HA),
    jmax_response: TemperatureResponse = TemperatureResponse(JMAX_HA),
    rd_response: TemperatureResponse = TemperatureResponse(RD_HA),
    tpu_response: TemperatureResponse = TemperatureResponse(TPU_HA),
    rset: RubiscoSet = RUBISCO_SETS[DEFAULT_RUBISCO_SET],
) -> FloatArray:
    """Net CO2 assimilation A (umol m-2 s-1) of the FvCB model.

    With ``transition="min"``: A = min(Wc, Wj[, Wp]) - Rd; with ``"smooth"``:
    colimit(colimit(Wc, Wj), Wp) - Rd. Parameters are those of `limiting_rates`.

    Returns
    -------
    ndarray
        A, broadcast over all array arguments.
    """
    return limiting_rates(
        ci, q, t_leaf_c, vcmax25, jmax25, alpha, theta, rd25,
        o2=o2, tpu25=tpu25, electron=electron, transition=transition,
        smooth_curvature=smooth_curvature, vcmax_response=vcmax_response,
        jmax_response=jmax_response, rd_response=rd_response, tpu_response=tpu_response, rset=rset,
    ).a
