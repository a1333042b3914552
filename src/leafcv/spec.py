"""Frozen descriptions of a comparison: data mapping, sampler, cross-validation, structures.

These objects know nothing of Stan; `leafcv.design` turns a structure plus data into Stan data.
Parsing and validation of the TOML file live in `leafcv.comparison`.

Tests: tests/comparison/test_sections.py, tests/comparison/test_structures.py, tests/test_parameters.py,
tests/data/test_mapping.py.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from .parameters import PARAMETER_TABLE, parameters

#: Structured FvCB parameters a structure names, in the order the Stan program uses (tpu25 is added by
#: the model option tpu and takes no terms).
PARAMETERS: tuple[str, ...] = tuple(p.name for p in parameters(tpu=False))
#: Parameters that may be tied to vcmax25 as a ratio.
RATIO_PARAMETERS: tuple[str, ...] = tuple(p.name for p in PARAMETER_TABLE if p.ratio_capable)
#: Link function of each parameter.
LINKS: dict[str, str] = {p.name: p.link for p in PARAMETER_TABLE}
#: leafcv's own observation variables; a comparison file names them by their data roles (leafcv.data.roles).
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


#: Cross-validation methods (see DESIGN.md): integrated PSIS checked by refits, exact refits, K-fold.
CV_METHODS: tuple[str, ...] = ("auto", "exact", "kfold")


#: Choices of the [model] options (see ModelOptions).
from .fvcb import ELECTRON_CHOICES  # noqa: E402  (the model's own list)
TRANSITION_CHOICES: tuple[str, ...] = ("min", "smooth")
LIKELIHOOD_CHOICES: tuple[str, ...] = ("normal", "student_t")
SIGMA_CHOICES: tuple[str, ...] = ("shared", "by_curve")
TEMPERATURE_CHOICES: tuple[str, ...] = ("arrhenius", "peaked")


@dataclass(frozen=True)
class ModelOptions:
    """FvCB options of a comparison or a structure (the defaults follow DESIGN.md)."""

    electron: str = "4-8"                       # Wj = J (Ci - G*) / (4 Ci + 8 G*), or 4.5 / 10.5
    transition: str = "min"                     # hard minimum, or smooth co-limitation
    smooth_curvature: float = 0.99
    tpu: bool = False                           # add Wp = 3 TPU
    student_t: bool = False                     # Student-t likelihood with estimated degrees of freedom
    sigma_by_curve: bool = False                # one residual SD per curve type
    peaked: bool = False                        # peaked Arrhenius for Vcmax and Jmax


@dataclass(frozen=True)
class ParamSpec:
    """How one FvCB parameter varies in a structure."""

    fixed: tuple[str, ...] = ()                 # traits (numeric) or group columns (treatment-coded)
    random: tuple[str, ...] = ()                # groupings with random intercepts ("leaf" is the leaf id)
    ratio_to: str | None = None                 # "vcmax25" for jmax25 / rd25
    centring: dict[str, str] = field(default_factory=dict)  # grouping -> auto | centred | noncentred
    slopes: tuple[tuple[str, str], ...] = ()    # (trait, grouping): random slopes around the fixed slope
    split: tuple[tuple[str, str], ...] = ()     # (trait, grouping): within- and between-group slopes
    smooth: tuple[str, ...] = ()                # traits: a penalised spline of each (leafcv.smooth)

    def columns_used(self) -> set[str]:
        """Every data column (trait or grouping) a term of this parameter names."""
        return {*self.fixed, *self.random, *self.smooth, *(x for pair in self.slopes + self.split for x in pair)}


@dataclass(frozen=True)
class Structure:
    name: str
    params: dict[str, ParamSpec]                # every name in PARAMETERS present
    options: ModelOptions = ModelOptions()
    priors: "PriorSet" = None                   # None: leafcv's defaults (leafcv.priors.PriorSet())
    leaf_correlation: bool = False              # correlated leaf effects across parameters (LKJ prior)
    lkj_eta: float = 2.0
    origin: str = ""                            # e.g. "grid 'g': leaf=vcmax25_alpha, traits=n"

    def prior_set(self):
        from .priors import PriorSet

        return self.priors if self.priors is not None else PriorSet()


@dataclass(frozen=True)
class Comparison:
    path: Path
    data: DataSpec
    sampler: SamplerSpec
    cv: CVSpec
    structures: tuple[Structure, ...]
    format: int = 1
    question: str = ""                          # the question the comparison asks, in the user's words
    engine: str | None = None                   # [engine] name: "pystan", "cmdstan"; None: the default

    def structure(self, name: str) -> Structure:
        for s in self.structures:
            if s.name == name:
                return s
        from .errors import SpecError

        valid = ", ".join(s.name for s in self.structures)
        raise SpecError(str(self.path), [f"no structure named {name!r}; valid names: {valid}"])
