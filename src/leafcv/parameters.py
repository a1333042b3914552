"""The structured FvCB parameters: name, link, ratio target, bounds, temperature response.

The one table of them; `leafcv.spec` and `leafcv.terms` read their names and links from here.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import expit, logit


@dataclass(frozen=True)
class Parameter:
    """One structured FvCB parameter.

    ``bounds`` are plausible natural-scale values that starting values are clipped to (common practice,
    no source; wide enough for every C3 leaf in REFERENCES.md). ``response`` names its temperature
    response (None: no temperature dependence).
    """

    name: str
    link: str                          # "log" or "logit"
    ratio_capable: bool                # may be written as a ratio to RATIO_TARGET
    bounds: tuple[float, float]
    response: str | None

    def to_link(self, value: np.ndarray, vcmax25: np.ndarray | None = None) -> np.ndarray:
        """Natural-scale value -> link scale (a ratio to ``vcmax25`` when that is given)."""
        v = np.asarray(value, float)
        if self.link == "logit":
            return logit(v)
        return np.log(v / vcmax25) if vcmax25 is not None else np.log(v)

    def from_link(self, x: np.ndarray, vcmax25_link: np.ndarray | None = None) -> np.ndarray:
        """Link-scale value -> natural scale (``vcmax25_link``: log Vcmax25 when ``x`` is a log ratio)."""
        x = np.asarray(x, float)
        if self.link == "logit":
            return expit(x)
        return np.exp(x + vcmax25_link) if vcmax25_link is not None else np.exp(x)


RATIO_TARGET = "vcmax25"

#: Every structured parameter, in the order of the Stan program (tpu25 only with TPU limitation on).
PARAMETER_TABLE: tuple[Parameter, ...] = (
    Parameter("vcmax25", "log", False, (3.0, 400.0), "vcmax"),
    Parameter("jmax25", "log", True, (5.0, 800.0), "jmax"),
    Parameter("alpha", "logit", False, (0.03, 0.9), None),
    Parameter("theta", "logit", False, (0.05, 0.99), None),
    Parameter("rd25", "log", True, (0.01, 10.0), "rd"),
    Parameter("tpu25", "log", False, (0.5, 60.0), "tpu"),
)
PARAMETER: dict[str, Parameter] = {p.name: p for p in PARAMETER_TABLE}


def parameters(tpu: bool) -> tuple[Parameter, ...]:
    """The parameters of a fit, in program order (tpu25 only with TPU limitation on)."""
    return tuple(p for p in PARAMETER_TABLE if p.name != "tpu25" or tpu)


