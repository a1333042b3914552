"""Default priors, stated on the natural scale as what they are.

Each prior is a normal on the link scale (lognormal or logit-normal on the natural scale) unless
stated otherwise; theta's intercept has a beta prior on the natural scale. These are weakly
informative choices from the typical magnitudes in REFERENCES.md (Wullschleger 1993; Medlyn et al.
2002; Collatz et al. 1991; Ogren & Evans 1993), common practice, no formal source.

Tests: tests/test_format2.py, tests/test_terms.py.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

from scipy.special import expit


@dataclass(frozen=True)
class Prior:
    """family "normal" (link scale: a = mean, b = sd) or "beta" (natural scale: a, b shapes)."""

    family: str
    a: float
    b: float

    def describe(self, link: str, what: str) -> str:
        if self.family == "beta":
            return f"{what}: beta({self.a:g}, {self.b:g}) on the natural scale"
        lo, hi = self.a - 1.96 * self.b, self.a + 1.96 * self.b
        if link == "log":
            return (f"{what}: lognormal, median {math.exp(self.a):.4g}, 95 % within "
                    f"{math.exp(lo):.3g}-{math.exp(hi):.3g} (normal({self.a:.3g}, {self.b:g}) on the log scale)")
        if link == "logit":
            return (f"{what}: logit-normal, median {expit(self.a):.3g}, 95 % within "
                    f"{expit(lo):.3g}-{expit(hi):.3g} (normal({self.a:.3g}, {self.b:g}) on the logit scale)")
        return f"{what}: normal({self.a:g}, {self.b:g})"


INTERCEPTS: dict[str, Prior] = {
    "vcmax25": Prior("normal", math.log(60.0), 1.0),
    "jmax25": Prior("normal", math.log(110.0), 1.0),
    "alpha": Prior("normal", -0.8, 1.0),
    "theta": Prior("beta", 5.0, 2.0),
    "rd25": Prior("normal", math.log(1.0), 1.0),
    "tpu25": Prior("normal", math.log(10.0), 1.0),
}
RATIO_INTERCEPTS: dict[str, Prior] = {
    "jmax25": Prior("normal", math.log(1.7), 0.5),
    "rd25": Prior("normal", math.log(0.015), 0.7),
}


@dataclass(frozen=True)
class PriorSet:
    """Every prior of a fit. Slopes are per unit of the centred and scaled trait, on the link scale."""

    intercepts: dict[str, Prior] = field(default_factory=lambda: dict(INTERCEPTS))
    ratio_intercepts: dict[str, Prior] = field(default_factory=lambda: dict(RATIO_INTERCEPTS))
    slope_sd_log: float = 1.0       # trait slopes of log-linked parameters
    slope_sd_logit: float = 0.5     # trait slopes of logit-linked parameters
    level_sd: float = 0.5           # treatment-coded factor levels (difference to the reference level)
    group_sd_scale: float = 0.5     # half-normal scale of random-effect SDs (link scale)
    leaf_sd_scale: float = 0.5      # half-normal scale of leaf-effect SDs (link scale)
    sigma_scale: float = 2.0        # half-normal scale of the residual SD, umol m-2 s-1
    nu_shape: float = 2.0           # gamma prior of the Student-t degrees of freedom
    nu_rate: float = 0.1

    def intercept(self, param: str, ratio: bool) -> Prior:
        return self.ratio_intercepts[param] if ratio else self.intercepts[param]

    def slope_sd(self, link: str) -> float:
        return self.slope_sd_log if link == "log" else self.slope_sd_logit


#: Probability mass of the stated interval of a natural-scale prior, and its normal quantile.
INTERVAL_MASS = 0.95
_Z95 = 1.959963984540054


def prior_from_natural(value, link: str) -> tuple[Prior | None, str | None]:
    """A prior written on the natural scale -> (Prior, None), or (None, what is wrong).

    ``{ within95 = [lo, hi] }`` (optionally with ``median``) is a normal on the link scale whose 95 %
    interval maps to [lo, hi]: lognormal for log links, logit-normal for logit links; the median, when
    given, must be the back-transformed middle (sqrt(lo hi) for a lognormal). ``{ beta = [a, b] }`` is
    a beta prior on the natural scale, for parameters with a logit link (alpha, theta).
    """
    if not isinstance(value, dict):
        return None, f"expected a table such as {{ median = 60, within95 = [15, 240] }}, got {value!r}"
    keys = set(value)
    if keys - {"median", "within95", "beta"}:
        return None, f"unknown key(s) {', '.join(sorted(keys - {'median', 'within95', 'beta'}))}; use within95 (and median) or beta"
    if "beta" in value:
        if keys != {"beta"}:
            return None, "give either beta = [a, b] or within95 = [lo, hi], not both"
        if link != "logit":
            return None, "a beta prior applies only to alpha and theta (values between 0 and 1); use within95 = [lo, hi]"
        ab = value["beta"]
        if not (isinstance(ab, list) and len(ab) == 2 and all(isinstance(x, (int, float)) and not isinstance(x, bool)
                                                              and x > 0 for x in ab)):
            return None, f"beta: expected [a, b], two numbers > 0, got {ab!r}"
        return Prior("beta", float(ab[0]), float(ab[1])), None
    iv = value.get("within95")
    if not (isinstance(iv, list) and len(iv) == 2 and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in iv)):
        return None, f"within95: expected [lower, upper], the central 95 % interval on the natural scale, got {iv!r}"
    lo, hi = float(iv[0]), float(iv[1])
    if link == "log" and not 0 < lo < hi:
        return None, f"within95: expected 0 < lower < upper, got [{lo:g}, {hi:g}]"
    if link == "logit" and not 0 < lo < hi < 1:
        return None, f"within95: expected 0 < lower < upper < 1, got [{lo:g}, {hi:g}]"
    f = math.log if link == "log" else (lambda x: math.log(x / (1 - x)))
    a, b = (f(lo) + f(hi)) / 2, (f(hi) - f(lo)) / (2 * _Z95)
    if "median" in value:
        m = value["median"]
        middle = math.exp(a) if link == "log" else float(expit(a))
        ok = isinstance(m, (int, float)) and not isinstance(m, bool) and (m > 0 if link == "log" else 0 < m < 1)
        if not ok or abs(f(float(m)) - a) > 0.02 * (f(hi) - f(lo)):
            return None, (f"median {m!r} does not sit in the middle of within95 on the {link} scale (a symmetric "
                          f"prior there has median {middle:.4g}); give that median, or within95 alone")
    return Prior("normal", a, b), None
