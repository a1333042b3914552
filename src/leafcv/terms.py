"""The typed model of a structure: its parameters and its terms.

A structure (`leafcv.spec.Structure`) says in the user's words which traits, groupings and leaves
shift each FvCB parameter. `leafcv.term_kinds.terms_of` turns it into term objects, one per term, each
owning its columns or levels, its centring choice, its prior, its words and its part of a prediction for
new leaves. Every term has the same four methods, so no caller asks which kind a term is:

- ``of_spec(param, spec, traits)`` (class method): the terms of this kind in one parameter's `ParamSpec`;
- ``needs()``: the data columns it uses ({"traits": ..., "groups": ..., "fixed_groups": ...});
- ``record()``: the term as the run's manifest keeps it (parameter, key, how it enters, words), from
  which the report tells structures that differ in one term;
- ``add_to(ctx, design)``: places itself in a design being built (`leafcv.design.DesignBuilder`): fixed
  columns, group levels, a leaf term or a block of its own, and its prior in words;
- ``predict(pred)``: adds itself to the linear predictor of new leaves (`leafcv.predict.NewLeaves`).

A new kind of term is a class with these methods in its own module (see `leafcv.smooth`) and one line
in `leafcv.term_kinds`; one that needs a new block of the program also touches `stan/leafcv.stan` and
the serialiser `leafcv.design.to_stan_data`.

Tests: tests/test_terms.py, tests/test_term_kinds.py.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import fvcb
from .data.dataset import LEAF_TERM
from .parameters import PARAMETER, RATIO_TARGET, Parameter, parameters  # noqa: F401  (re-exported)
from .priors import PriorSet
from .spec import ModelOptions, Structure

#: Fewest training points a leaf needs for its effects to be centred (common practice, no source:
#: a leaf informed by whole curves pins its own parameters; see DESIGN.md for the measured gain).
MIN_POINTS_CENTRED_LEAF = 5
#: A leaf's effect is centred when its least-squares SE is below this fraction of the between-leaf SD
#: (the data then carry at least 80 % of the precision; common practice, no source: the centred form
#: suits data-dominated effects, the non-centred form prior-dominated ones, Betancourt & Girolami 2015).
CENTRED_SE_FRACTION = 0.5
#: Fewest leaves per level for a group effect on a parameter that also has leaf effects to be centred.
MIN_LEAVES_CENTRED_GROUP = 20


def responses(options: ModelOptions) -> dict[str, fvcb.TemperatureResponse]:
    """Temperature response by name (Bernacchi et al. 2001, 2003; peaked: Leuning 2002)."""
    if options.peaked:
        v, j = fvcb.VCMAX_PEAKED_LEUNING2002, fvcb.JMAX_PEAKED_LEUNING2002
    else:
        v, j = fvcb.TemperatureResponse(fvcb.VCMAX_HA), fvcb.TemperatureResponse(fvcb.JMAX_HA)
    return {"vcmax": v, "jmax": j, "rd": fvcb.TemperatureResponse(fvcb.RD_HA),
            "tpu": fvcb.TemperatureResponse(fvcb.TPU_HA)}


# ---------------------------------------------------------------------------------------------------
# What terms produce
# ---------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Coefficient:
    """One column of the fixed-effect design: a trait slope or a level contrast."""

    param: str
    term: str          # trait or group column
    label: str         # e.g. "leaf_n", "month=2026-07", "leaf_n within species"
    kind: str          # "trait", "level", "within", "between" or "smooth" (the fit file records it)
    prior_sd: float
    group: str = ""    # the grouping of a within/between split
    meaning: str = ""  # in words, for the fit's summary: "slope of log vcmax25 on leaf_n (per 1 units)"
    centre: float = float("nan")   # the covariate's centring and scaling (NaN for a level contrast)
    scale: float = float("nan")
    pairs_with_next: bool = False  # a within slope followed by its between slope (their difference is reported)


@dataclass(frozen=True)
class GroupTerm:
    """A random intercept or slope over the levels of a grouping, as placed in the design."""

    param: str
    grouping: str
    levels: tuple[str, ...]
    start: int         # 0-based offset of its first level in the stacked level vector
    centred: tuple[bool, ...]
    reason: str
    slope_of: str | None = None   # a random slope of this trait (None: a random intercept)
    prior_sd: float = 0.5
    level_of_leaf: np.ndarray = field(default=None, repr=False, compare=False)   # (L,) 0-based, within the term
    x: np.ndarray = field(default=None, repr=False, compare=False)               # (L,) covariate (1: intercept)

    @property
    def label(self) -> str:
        return f"{self.grouping}-specific slopes of {self.param} on {self.slope_of}" if self.slope_of \
            else f"{self.grouping} effects on {self.param}"


@dataclass(frozen=True)
class LeafTerm:
    """Leaf effects on one parameter, as placed in the design."""

    param: str
    centred_leaves: int
    noncentred_leaves: int
    reason: str
    prior_sd: float = 0.5
    centred: np.ndarray = field(default=None, repr=False, compare=False)   # (L,) bool


@dataclass(frozen=True)
class TermContext:
    """Everything a term needs to place itself: the leaf table, the training leaves, trait transforms."""

    structure: Structure
    leaves: pd.DataFrame
    transforms: dict[str, tuple[float, float]]     # trait -> (centre, scale)
    priors: PriorSet
    train: np.ndarray                              # bool per leaf
    points_per_leaf: np.ndarray                    # training points per leaf
    leaf_fits: object = None                       # leafcv.inits.LeafFits or None
    ratio: dict[str, bool] = field(default_factory=dict)

    def link(self, param: str) -> str:
        return PARAMETER[param].link

    def scaled(self, trait: str, leaves: pd.DataFrame | None = None) -> np.ndarray:
        """A trait centred and scaled, for the fitted leaves or for ``leaves`` (e.g. new ones)."""
        c, s = self.transforms[trait]
        return ((self.leaves if leaves is None else leaves)[trait].to_numpy(float) - c) / s

    def levels(self, grouping: str) -> tuple[tuple[str, ...], np.ndarray]:
        """Sorted levels of a grouping and each leaf's level (0-based)."""
        values = self.leaves[grouping].astype(str).to_numpy()
        levels = tuple(sorted(set(values)))
        return levels, np.searchsorted(levels, values)


# ---------------------------------------------------------------------------------------------------
# Terms
# ---------------------------------------------------------------------------------------------------

class FixedTerm:
    """A term that adds columns to the fixed-effect design."""

    param: str

    @classmethod
    def of_spec(cls, param: str, spec, traits) -> list["FixedTerm"]:
        """``fixed``: a slope for a trait, treatment-coded levels for a grouping, in the order listed."""
        return [TraitSlope(param, t) if t in traits else LevelContrasts(param, t) for t in spec.fixed]

    def columns(self, ctx: TermContext, new: pd.DataFrame | None = None) -> list[tuple[Coefficient, np.ndarray]]:
        """Its coefficients and their columns over the fitted leaves, or over ``new`` leaves (their values
        coded as the fitted leaves' are: same centring, reference level and group means)."""
        raise NotImplementedError

    def prior_line(self, ctx: TermContext) -> str:
        raise NotImplementedError

    def add_to(self, ctx: TermContext, design) -> None:
        for coef, col in self.columns(ctx):
            design.add_column(coef, col, self.param)
        design.prior(self.prior_line(ctx))

    def predict(self, pred) -> None:
        for _, col in self.columns(pred.ctx, pred.new):
            pred.add_fixed(self.param, col)


def _record(param: str, key: str, how: str, words: str) -> dict[str, str]:
    """A term as the run's manifest keeps it: the report compares structures term by term from these."""
    return {"parameter": param, "key": key, "how": how, "words": words}


def _target(ctx: TermContext, param: str) -> str:
    """The link-scale quantity a term shifts, in words."""
    return f"log({param}/vcmax25)" if ctx.ratio.get(param) else f"{ctx.link(param)} {param}"


@dataclass(frozen=True)
class TraitSlope(FixedTerm):
    """A fixed slope on a leaf trait (centred and scaled)."""

    param: str
    trait: str

    def needs(self) -> dict[str, set[str]]:
        return {"traits": {self.trait}}

    def record(self) -> dict[str, str]:
        return _record(self.param, self.trait, "fixed", f"a fixed effect of {self.trait} on {self.param}")

    def columns(self, ctx, new=None):
        sd = ctx.priors.slope_sd(ctx.link(self.param))
        c, s = ctx.transforms[self.trait]
        meaning = f"slope of {_target(ctx, self.param)} on {self.trait} (per {s:g} units)"
        return [(Coefficient(self.param, self.trait, self.trait, "trait", sd, meaning=meaning, centre=c, scale=s),
                 ctx.scaled(self.trait, new))]

    def prior_line(self, ctx):
        c, s = ctx.transforms[self.trait]
        link = ctx.link(self.param)
        return (f"{self.param} slope on {self.trait} (per {s:g} units, centred at {c:.4g}): "
                f"normal(0, {ctx.priors.slope_sd(link):g}) on the {link} scale")


@dataclass(frozen=True)
class LevelContrasts(FixedTerm):
    """Fixed levels of a grouping, treatment-coded against its first level (sorted)."""

    param: str
    grouping: str

    def needs(self) -> dict[str, set[str]]:
        return {"groups": {self.grouping}, "fixed_groups": {self.grouping}}

    def record(self) -> dict[str, str]:
        return _record(self.param, self.grouping, "fixed", f"a fixed effect of {self.grouping} on {self.param}")

    def columns(self, ctx, new=None):
        levels, _ = ctx.levels(self.grouping)
        values = (ctx.leaves if new is None else new)[self.grouping].astype(str).to_numpy()
        target = _target(ctx, self.param)
        return [(Coefficient(self.param, self.grouping, f"{self.grouping}={lev}", "level", ctx.priors.level_sd,
                             meaning=f"{target}: {self.grouping}={lev} vs reference level"),
                 (values == lev).astype(float)) for k, lev in enumerate(levels) if k > 0]

    def prior_line(self, ctx):
        levels, _ = ctx.levels(self.grouping)
        return (f"{self.param} {self.grouping} levels vs reference {levels[0]!r}: normal(0, {ctx.priors.level_sd:g}) "
                f"on the {ctx.link(self.param)} scale")


@dataclass(frozen=True)
class SplitSlope(FixedTerm):
    """Separate slopes within and between the levels of a grouping (group-mean centring, e.g. Enders &
    Tofighi 2007, from memory): the within slope acts on the leaf's deviation from its group's mean, the
    between slope on the group mean itself."""

    param: str
    trait: str
    grouping: str

    def needs(self) -> dict[str, set[str]]:
        return {"traits": {self.trait}, "groups": {self.grouping}}

    def record(self) -> dict[str, str]:
        return _record(self.param, self.trait, f"split:{self.grouping}",
                       f"separate within- and between-{self.grouping} slopes of {self.param} on {self.trait}")

    @classmethod
    def of_spec(cls, param: str, spec, traits) -> list["SplitSlope"]:
        return [cls(param, t, g) for t, g in spec.split]

    def columns(self, ctx, new=None):
        c, sc = ctx.transforms[self.trait]
        means = ctx.leaves.groupby(ctx.leaves[self.grouping].astype(str))[self.trait].mean()
        leaves = ctx.leaves if new is None else new
        groups = leaves[self.grouping].astype(str)
        x = leaves[self.trait].to_numpy(float)
        # a level not among the fitted leaves: its mean over the new leaves of that level
        own = leaves.groupby(groups)[self.trait].transform("mean").to_numpy(float)
        gmean = np.where(groups.isin(means.index), groups.map(means).to_numpy(float), own)
        sd = ctx.priors.slope_sd(ctx.link(self.param))
        target = _target(ctx, self.param)
        return [(Coefficient(self.param, self.trait, f"{self.trait} {kind} {self.grouping}", kind, sd, self.grouping,
                             meaning=f"{kind}-{self.grouping} slope of {target} on {self.trait} (per {sc:g} units)",
                             centre=c, scale=sc, pairs_with_next=kind == "within"), col)
                for kind, col in (("within", (x - gmean) / sc), ("between", (gmean - c) / sc))]

    def prior_line(self, ctx):
        link = ctx.link(self.param)
        return (f"{self.param} slopes on {self.trait} within and between {self.grouping} "
                f"(per {ctx.transforms[self.trait][1]:g} units): normal(0, {ctx.priors.slope_sd(link):g}) each "
                f"on the {link} scale")


@dataclass(frozen=True)
class GroupIntercept:
    """Random effects of the levels of a grouping (e.g. species or month) on a parameter."""

    param: str
    grouping: str
    trait = None

    @classmethod
    def of_spec(cls, param: str, spec, traits) -> list["GroupIntercept"]:
        return [cls(param, g) for g in spec.random if g != LEAF_TERM]

    def needs(self) -> dict[str, set[str]]:
        return {"groups": {self.grouping}}

    def record(self) -> dict[str, str]:
        return _record(self.param, self.grouping, "random", f"random {self.grouping} effects on {self.param}")

    @property
    def centring_key(self) -> str:
        return self.grouping

    def add_to(self, ctx: TermContext, design) -> None:
        placed = self.place(ctx, design.n_levels, design.has_leaf_term(self.param))
        design.add_group(placed)
        design.prior(self.prior_line(ctx, placed))

    def predict(self, pred) -> None:
        """Its effect on new leaves: a fitted level's value, or a new level's drawn from the fitted SD."""
        idx, x = self.locate(pred.ctx, pred.new)
        pred.add_levels(self.param, idx, x)

    def covariate(self, ctx: TermContext, new: pd.DataFrame | None = None) -> np.ndarray:
        return np.ones(len(ctx.leaves if new is None else new))

    def locate(self, ctx: TermContext, new: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
        """For ``new`` leaves: the index of each one's level among the fitted levels (-1: a new level),
        and the covariate the level effect multiplies."""
        levels, _ = ctx.levels(self.grouping)
        pos = {lev: k for k, lev in enumerate(levels)}
        return (np.array([pos.get(v, -1) for v in new[self.grouping].astype(str)], int),
                self.covariate(ctx, new))

    def place(self, ctx: TermContext, start: int, has_leaf_term: bool) -> GroupTerm:
        """The term's levels, their centring (auto: by training leaves per level) and its prior."""
        ps = ctx.structure.params.get(self.param)
        choice = (ps.centring if ps else {}).get(self.centring_key, "auto")
        levels, of_leaf = ctx.levels(self.grouping)
        per_level = np.bincount(of_leaf[ctx.train], minlength=len(levels))
        if choice == "auto":
            need = MIN_LEAVES_CENTRED_GROUP if has_leaf_term else 2
            cen = per_level >= need
            reason = (f"auto: centred where a level has >= {need} training leaves"
                      + (" (the parameter also has leaf effects)" if has_leaf_term else ""))
        else:
            cen = np.full(len(levels), choice == "centred") & (per_level > 0)
            reason = f"{choice}: chosen by the user"
        if (per_level == 0).any():
            reason += "; levels without training data non-centred"
        return GroupTerm(self.param, self.grouping, levels, start, tuple(bool(c) for c in cen), reason,
                         self.trait, ctx.priors.group_sd_scale, of_leaf, self.covariate(ctx))

    def prior_line(self, ctx: TermContext, placed: GroupTerm) -> str:
        extra = f" (per {ctx.transforms[self.trait][1]:g} units)" if self.trait else ""
        return (f"SD of {placed.label}: half-normal(0, {ctx.priors.group_sd_scale:g}) on the "
                f"{ctx.link(self.param)} scale{extra}")


@dataclass(frozen=True)
class RandomSlope(GroupIntercept):
    """Level-specific deviations of a trait slope around its fixed slope."""

    param: str
    grouping: str
    trait: str = ""

    @classmethod
    def of_spec(cls, param: str, spec, traits) -> list["RandomSlope"]:
        return [cls(param, g, t) for t, g in spec.slopes]

    def needs(self) -> dict[str, set[str]]:
        return {"traits": {self.trait}, "groups": {self.grouping}}

    def record(self) -> dict[str, str]:
        return _record(self.param, f"{self.trait}|{self.grouping}", "slopes",
                       f"{self.grouping}-specific slopes of {self.param} on {self.trait}")

    @property
    def centring_key(self) -> str:
        return f"{self.trait}|{self.grouping}"

    def covariate(self, ctx, new=None):
        return ctx.scaled(self.trait, new)


@dataclass(frozen=True)
class LeafEffect:
    """An effect of every leaf on a parameter, drawn from a normal with an estimated SD."""

    param: str

    @classmethod
    def of_spec(cls, param: str, spec, traits) -> list["LeafEffect"]:
        return [cls(param)] if LEAF_TERM in spec.random else []

    def needs(self) -> dict[str, set[str]]:
        return {}

    def record(self) -> dict[str, str]:
        return _record(self.param, LEAF_TERM, "random", f"leaf effects on {self.param}")

    def add_to(self, ctx: TermContext, design) -> None:
        design.add_leaf(self.place(ctx))
        design.prior(self.prior_line(ctx))

    def predict(self, pred) -> None:
        """Nothing here: a new leaf's own effects are drawn jointly over its leaf terms (they may be
        correlated), by `leafcv.predict.NewLeaves.leaf_effects`."""

    def place(self, ctx: TermContext) -> LeafTerm:
        ps = ctx.structure.params.get(self.param)
        choice = (ps.centring if ps else {}).get(LEAF_TERM, "auto")
        informed, rule = informed_leaves(self.param, ctx.ratio.get(self.param, False), ctx.leaf_fits,
                                         ctx.points_per_leaf, ctx.train)
        centred = informed if choice == "auto" else (np.full(len(ctx.train), choice == "centred") & ctx.train)
        reason = f"{choice}: chosen by the user" if choice != "auto" else f"auto: {rule}"
        if (~ctx.train).any():
            reason += "; held-out leaves non-centred"
        if ctx.structure.leaf_correlation:
            reason += "; correlated effects: a leaf is centred only where all its effects are"
        return LeafTerm(self.param, int(centred.sum()), int((~centred).sum()), reason,
                        ctx.priors.leaf_sd_scale, centred)

    def prior_line(self, ctx: TermContext) -> str:
        return (f"SD of leaf effects on {self.param}: half-normal(0, {ctx.priors.leaf_sd_scale:g}) on the "
                f"{ctx.link(self.param)} scale")


def informed_leaves(param, ratio, leaf_fits, points_per_leaf, train) -> tuple[np.ndarray, str]:
    """Which leaves' effects on ``param`` to centre, and the rule used, in words."""
    enough = (points_per_leaf >= MIN_POINTS_CENTRED_LEAF) & train
    if leaf_fits is None:
        return enough, (f"centred where a leaf has >= {MIN_POINTS_CENTRED_LEAF} training points "
                        f"(median {int(np.median(points_per_leaf[train]))})")
    se = leaf_fits.link_se(param, ratio)
    est = leaf_fits.link_values(param, ratio)
    ok = train & np.isfinite(se) & np.isfinite(est)
    if ok.sum() < 2:
        return np.zeros_like(train), "non-centred: per-leaf fits do not inform this parameter"
    between = float(np.sqrt(max(np.var(est[ok], ddof=1) - np.mean(se[ok] ** 2), 0.0)))
    between = max(between, 0.02)
    centred = enough & np.isfinite(se) & (se < CENTRED_SE_FRACTION * between)
    return centred, (f"centred where the leaf's least-squares SE on the link scale is below {CENTRED_SE_FRACTION:g} x the between-leaf SD "
                     f"({between:.3g}; median SE {np.median(se[ok]):.3g})")
