"""Default priors, stated on the natural scale as what they are.

Each prior is a normal on the link scale (lognormal or logit-normal on the natural scale) unless
stated otherwise; theta's intercept has a beta prior on the natural scale. These are weakly
informative choices from the typical magnitudes in REFERENCES.md (Wullschleger 1993; Medlyn et al.
2002; Collatz et al. 1991; Ogren & Evans 1993), common practice, no formal source.
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
