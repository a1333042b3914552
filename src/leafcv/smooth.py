"""A smooth trend of a parameter over a continuous leaf covariate (day of year, canopy height, leaf age).

``vcmax25 = { smooth = ["day_of_year"] }`` puts a penalised spline of the covariate on the parameter's link
scale, in mixed-model form (Eilers & Marx 1996, "Flexible smoothing with B-splines and penalties",
Statist. Sci. 11:89-121; the mixed-model form as in Wood 2017, "Generalized Additive Models", 2nd ed.,
section 5.8, from memory):

- a cubic B-spline basis B of SMOOTH_BASIS functions on equally spaced knots over the observed range of
  the covariate (all leaves of the data set, so every refit shares one basis);
- a second-order difference penalty D'D on the spline coefficients. Its null space (constant and linear
  functions of the covariate) is the unpenalised part: the constant is the parameter's intercept and the
  linear part is one fixed column of the design (a slope on the centred, scaled covariate);
- the penalised part is Z = B U diag(lambda)^(-1/2) over the penalty's non-zero eigenvalues lambda and
  their eigenvectors U, with coefficients z ~ normal(0, tau^2): tau is the estimated smoothness (tau = 0
  is a straight line). Z's columns are made orthogonal, over the data set's leaves, to the intercept and
  the linear column, so the wiggle never trades off with either, and scaled so that tau is the root mean
  square of the wiggle over the observed leaves (on the link scale).

New leaves (`leafcv predict`) are placed on the same basis. Outside the observed range the wiggle is held
at its value at the nearest end and only the linear trend continues: such predictions are extrapolated,
and `predict` says so.

The term owns its columns, its block of the program (Stan data Rs, Ms, Zs, sm_par, sm_term, sm_tau_sd),
its words, labels and its evaluation for new leaves; `leafcv.term_kinds` lists it.

Tests: tests/test_smooth.py, tests/sampling/test_smooth.py.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.interpolate import BSpline

from .errors import Problem
from .terms import Coefficient, TermContext

#: Cubic B-spline basis functions of a smooth (before the constant and linear parts are taken out: the
#: wiggle has SMOOTH_BASIS - 2 columns). Common practice, no source: 8-12 functions suit a trend with a
#: few bends; the penalty, not the basis size, sets the smoothness.
SMOOTH_BASIS = 10
#: Fewest distinct covariate values over the leaves for a smooth (fewer: use the covariate as a fixed
#: slope or as levels). Common practice, no source.
SMOOTH_MIN_VALUES = 6
DEGREE = 3


@dataclass(frozen=True, eq=False)
class SplineBasis:
    """The penalised part of a smooth in mixed-model form, as a function of the covariate."""

    lo: float
    hi: float
    knots: np.ndarray          # (SMOOTH_BASIS + DEGREE + 1,)
    rotation: np.ndarray       # (SMOOTH_BASIS, m): U diag(lambda)^(-1/2)
    projection: np.ndarray     # (2, m): the columns' regression on [1, scaled covariate] over the leaves
    norm: float                # root mean square of the projected columns' row norms over the leaves
    centre: float              # the covariate's centre and scale (the linear column's coding)
    scale: float

    @classmethod
    def fit(cls, x: np.ndarray, centre: float, scale: float, n_basis: int = SMOOTH_BASIS) -> "SplineBasis":
        x = np.asarray(x, float)
        lo, hi = float(np.min(x)), float(np.max(x))
        h = (hi - lo) / (n_basis - DEGREE)
        knots = lo + h * np.arange(-DEGREE, n_basis + 1)
        knots[DEGREE], knots[n_basis] = lo, hi          # exact ends, so lo and hi are inside the base interval
        d = np.diff(np.eye(n_basis), n=2, axis=0)
        lam, u = np.linalg.eigh(d.T @ d)
        keep = lam > 1e-9 * lam.max()
        rotation = u[:, keep] / np.sqrt(lam[keep])
        raw = _bspline(x, knots, lo, hi) @ rotation
        null = np.column_stack([np.ones_like(x), (x - centre) / scale])
        projection = np.linalg.lstsq(null, raw, rcond=None)[0]
        z = raw - null @ projection
        norm = float(np.sqrt(np.mean(np.sum(z ** 2, axis=1))))
        return cls(lo, hi, knots, rotation, projection, norm, centre, scale)

    @property
    def size(self) -> int:
        return self.rotation.shape[1]

    def columns(self, x: np.ndarray) -> np.ndarray:
        """(n, size): the wiggle's columns at ``x``; outside [lo, hi] those of the nearest end."""
        xc = np.clip(np.asarray(x, float), self.lo, self.hi)
        null = np.column_stack([np.ones_like(xc), (xc - self.centre) / self.scale])
        return (_bspline(xc, self.knots, self.lo, self.hi) @ self.rotation - null @ self.projection) / self.norm

    def outside(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x, float)
        return (x < self.lo) | (x > self.hi)


def _bspline(x: np.ndarray, knots: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Cubic B-spline basis at ``x`` (inside [lo, hi]), dense (n, n_basis)."""
    return BSpline.design_matrix(np.clip(x, lo, hi), knots, DEGREE).toarray()


@dataclass(frozen=True)
class SmoothTerm:
    """A smooth's wiggle as placed in the design: its basis columns start at ``start`` of the stacked
    columns (Stan data Zs)."""

    param: str
    covariate: str
    start: int
    basis: SplineBasis = field(repr=False, compare=False)
    prior_sd: float = 0.5
    Z: np.ndarray = field(default=None, repr=False, compare=False)       # (L, size) at the data set's leaves

    @property
    def label(self) -> str:
        return f"smooth trend of {self.param} over {self.covariate}"

    @property
    def size(self) -> int:
        return self.basis.size


@dataclass(frozen=True)
class SmoothTrend:
    """A penalised spline of one parameter over a leaf covariate (a declared trait): a linear slope in the
    fixed design plus an estimated-smoothness wiggle in the program's smooth block."""

    param: str
    covariate: str

    @classmethod
    def of_spec(cls, param: str, spec, traits) -> list["SmoothTrend"]:
        return [cls(param, c) for c in spec.smooth]

    def needs(self) -> dict[str, set[str]]:
        return {"traits": {self.covariate}}

    def record(self) -> dict[str, str]:
        return {"parameter": self.param, "key": self.covariate, "how": "smooth",
                "words": f"a smooth trend of {self.param} over {self.covariate}"}

    def linear(self, ctx: TermContext, new: pd.DataFrame | None = None) -> tuple[Coefficient, np.ndarray]:
        c, s = ctx.transforms[self.covariate]
        link = ctx.link(self.param)
        target = f"log({self.param}/vcmax25)" if ctx.ratio.get(self.param) else f"{link} {self.param}"
        coef = Coefficient(self.param, self.covariate, f"{self.covariate} (linear part of the smooth)", "smooth",
                           ctx.priors.slope_sd(link),
                           meaning=f"linear trend of {target} over {self.covariate} (per {s:g} units)",
                           centre=c, scale=s)
        return coef, ctx.scaled(self.covariate, new)

    def basis(self, ctx: TermContext) -> SplineBasis:
        c, s = ctx.transforms[self.covariate]
        return SplineBasis.fit(ctx.leaves[self.covariate].to_numpy(float), c, s)

    def add_to(self, ctx: TermContext, design) -> None:
        x = ctx.leaves[self.covariate].to_numpy(float)
        distinct = len(np.unique(x[np.isfinite(x)]))
        if distinct < SMOOTH_MIN_VALUES:
            design.problem(Problem(
                f"{self.param}: the smooth over {self.covariate!r} needs at least {SMOOTH_MIN_VALUES} distinct values "
                f"over the leaves (found {distinct}); use {self.covariate!r} in fixed (a straight line) instead",
                "too-few-values", f"structure {ctx.structure.name!r} {self.param}.smooth"))
            return
        design.add_column(*self.linear(ctx), self.param)
        basis = self.basis(ctx)
        design.add_smooth(SmoothTerm(self.param, self.covariate, design.n_smooth_columns, basis,
                                     ctx.priors.group_sd_scale, basis.columns(x)))
        design.prior(self.prior_line(ctx, basis))

    def prior_line(self, ctx: TermContext, basis: SplineBasis) -> str:
        c, s = ctx.transforms[self.covariate]
        link = ctx.link(self.param)
        return (f"{self.param} smooth over {self.covariate}: linear part normal(0, {ctx.priors.slope_sd(link):g}) per "
                f"{s:g} units (centred at {c:.4g}); wiggle from {SMOOTH_BASIS} cubic B-splines over "
                f"{basis.lo:g}-{basis.hi:g} with a second-order difference penalty ({basis.size} columns), its SD "
                f"(root mean square over the leaves) half-normal(0, {ctx.priors.group_sd_scale:g}) on the {link} scale")

    def predict(self, pred) -> None:
        """Add the term to a prediction for new leaves (`leafcv.predict`): the linear part and the wiggle
        at their covariate values, held at the nearest end outside the observed range."""
        coef, col = self.linear(pred.ctx, pred.new)
        pred.add_fixed(self.param, col)
        st = pred.next_smooth()
        x = pred.new[self.covariate].to_numpy(float)
        pred.add_smooth(st, st.basis.columns(x))
        out = st.basis.outside(x)
        if out.any():
            pred.note(f"{int(out.sum())} new leaf/leaves lie outside the observed range of {self.covariate} "
                      f"({st.basis.lo:g}-{st.basis.hi:g}): their {self.param} follows the linear trend beyond it, "
                      f"with the smooth's bend held at its value at the nearest end (an extrapolation)")
