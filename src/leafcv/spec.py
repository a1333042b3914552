"""Frozen descriptions of a comparison: data mapping, sampler, cross-validation, structures.

These objects know nothing of Stan; `leafcv.design` turns a structure plus data into Stan data.
Parsing and validation of the TOML file live in `leafcv.comparison`.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

#: Structured FvCB parameters, in the order the Stan program uses.
PARAMETERS: tuple[str, ...] = ("vcmax25", "jmax25", "alpha", "theta", "rd25")
#: Parameters that may be tied to vcmax25 as a ratio.
RATIO_PARAMETERS: tuple[str, ...] = ("jmax25", "rd25")
#: Link function of each parameter.
LINKS: dict[str, str] = {"vcmax25": "log", "jmax25": "log", "alpha": "logit", "theta": "logit", "rd25": "log"}
#: leafcv's own observation variables (left side of [data.columns]).
REQUIRED_COLUMNS: tuple[str, ...] = ("a_net", "ci", "ppfd", "leaf")
OPTIONAL_COLUMNS: tuple[str, ...] = ("t_leaf", "o2", "curve")
CENTRING_CHOICES: tuple[str, ...] = ("auto", "centred", "noncentred")


@dataclass(frozen=True)
class DataSpec:
    """Where the observations are and how the user's columns map to leafcv's variables."""

    file: Path                                  # absolute path
    columns: dict[str, str]                     # leafcv variable -> user's column name
    ci_unit: str = "umol/mol"                   # "umol/mol" or "Pa"
    pressure_kpa: float | None = None           # needed when ci_unit == "Pa"
    groups: tuple[str, ...] = ()                # leaf-level grouping columns (user's names)
    traits: tuple[str, ...] = ()                # leaf-level numeric trait columns (user's names)
    centre: dict[str, float] = field(default_factory=dict)  # trait -> centring value (default: leaf-table mean)
    scale: dict[str, float] = field(default_factory=dict)   # trait -> divisor after centring (default 1)


@dataclass(frozen=True)
class SamplerSpec:
    chains: int = 4
    warmup: int = 1000
    draws: int = 1000
    seed: int = 1
    adapt_delta: float = 0.8
    max_treedepth: int = 10


@dataclass(frozen=True)
class CVSpec:
    by: str = "leaf"
    method: str = "auto"
    folds: int = 10


@dataclass(frozen=True)
class ParamSpec:
    """How one FvCB parameter varies in a structure."""

    fixed: tuple[str, ...] = ()                 # traits (numeric) or group columns (treatment-coded)
    random: tuple[str, ...] = ()                # groupings with random intercepts ("leaf" is the leaf id)
    ratio_to: str | None = None                 # "vcmax25" for jmax25 / rd25
    centring: dict[str, str] = field(default_factory=dict)  # grouping -> auto | centred | noncentred


@dataclass(frozen=True)
class Structure:
    name: str
    params: dict[str, ParamSpec]                # every name in PARAMETERS present


@dataclass(frozen=True)
class Comparison:
    path: Path
    data: DataSpec
    sampler: SamplerSpec
    cv: CVSpec
    structures: tuple[Structure, ...]
    format: int = 1

    def structure(self, name: str) -> Structure:
        for s in self.structures:
            if s.name == name:
                return s
        from .errors import SpecError

        valid = ", ".join(s.name for s in self.structures)
        raise SpecError(str(self.path), [f"no structure named {name!r}; valid names: {valid}"])
