"""The result of one structure's leave-one-leaf-out (or leave-one-level-out) cross-validation.

A :class:`CVResult` holds the per-unit expected log predictive density (elpd) of a structure,
each held-out unit (a leaf, or a level of a grouping scored jointly) scored over all its points,
how each entry was scored and how accurately, plus the diagnostics the ranking reports.
It knows nothing of ArviZ: :mod:`leafcv.cv.arviz_bridge` converts it.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from ..spec import CV_METHODS as METHODS
ENTRY_METHODS = ("psis", "refit", "exact", "kfold")
GRADES = ("converged", "marginal", "failed")
# how the entries of a result of each method may be scored; the first is the default
ENTRY_METHODS_OF = {"auto": ("psis", "refit"), "exact": ("exact",), "kfold": ("kfold",)}


def khat_threshold(n_draws: int) -> float:
    """Pareto k-hat above which an importance-sampling estimate is unreliable.

    Parameters
    ----------
    n_draws
        Number of posterior draws S behind the estimate.

    Returns
    -------
    float
        ``min(1 - 1/log10(S), 0.7)``.

    References
    ----------
    Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25(72) (Pareto smoothed importance sampling).
    """
    if n_draws < 2:
        raise ValueError(f"n_draws must be at least 2, got {n_draws}")
    return float(min(1.0 - 1.0 / np.log10(n_draws), 0.7))


def _frozen_array(values: object, name: str) -> np.ndarray:
    """A read-only 1-D float copy of ``values``."""
    arr = np.array(values, dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {arr.shape}")
    arr.setflags(write=False)
    return arr


def _entry_array(values: object, name: str, structure: str, n: int) -> np.ndarray:
    """A read-only per-entry float array of length ``n``: all NaN when ``values`` is None."""
    arr = _frozen_array(np.full(n, np.nan) if values is None else values, name)
    if arr.shape != (n,):
        raise ValueError(f"{structure}: {name} has {arr.size} values for {n} entries")
    return arr


def _nonnegative_or_nan(arr: np.ndarray, name: str, structure: str) -> None:
    """Raise unless every value is NaN ("not computed") or >= 0 (+inf: no usable bound)."""
    if np.any(arr[~np.isnan(arr)] < 0):
        raise ValueError(f"{structure}: {name} must be NaN (not computed) or >= 0")


@dataclass(frozen=True, eq=False)
class CVResult:
    """Leave-one-unit-out cross-validation of one structure.

    Equality is identity (``eq=False``): the fields hold arrays, which have no single truth value.

    Parameters
    ----------
    structure
        Name of the structure.
    method
        ``"auto"`` (integrated PSIS plus exact refits), ``"exact"`` or ``"kfold"``.
    leaves
        Ids of the held-out units (see ``unit``), in the same order for every structure of a
        comparison.
    elpd_i
        Per-unit elpd: log predictive density of the unit's points jointly, shape (G,).
    n_draws
        Posterior draws behind each estimate.
    pareto_k
        Per-unit Pareto k-hat of the entries scored by PSIS, NaN for the others; None means
        none was computed (stored as all NaN).
    n_refits
        Exact refits made.
    grade
        ``"converged"`` (every fit passed its diagnostics), ``"marginal"`` (ranked with a
        warning) or ``"failed"`` (not ranked).
    warnings
        Plain-sentence warnings about this structure.
    rmse, r2
        Held-out RMSE and R² by curve type; key ``"all"`` for all points together.
    method_i
        How each entry was scored: ``"psis"`` or ``"refit"`` (method auto), ``"exact"`` or
        ``"kfold"``. Empty (the default) means every entry by the method's own way: ``"psis"``
        for auto, ``"exact"`` for exact, ``"kfold"`` for kfold.
    mcse_i
        Per-entry Monte Carlo SE of ``elpd_i`` in nats; NaN means not computed (the default).
    quad_bound_i
        Per-entry bound on the quadrature error of ``elpd_i`` in nats; NaN means not computed
        (the default).
    unscored
        Empty, or why the structure cannot be scored reliably (e.g. ``"quadrature did not
        converge for leaf L007"``); such a structure is listed apart, like a failed one.
    unit
        What each entry of ``leaves`` is: ``"leaf"``, or the name of a grouping (e.g.
        ``"species"``) whose levels were held out and scored jointly.

    Raises
    ------
    ValueError
        If a field has the wrong length or a value outside its choices, naming the structure.
    """

    structure: str
    method: str
    leaves: tuple[str, ...]
    elpd_i: np.ndarray
    n_draws: int
    pareto_k: np.ndarray | None = None
    n_refits: int = 0
    grade: str = "converged"
    warnings: tuple[str, ...] = ()
    rmse: dict[str, float] = field(default_factory=dict)
    r2: dict[str, float] = field(default_factory=dict)
    method_i: tuple[str, ...] = ()
    mcse_i: np.ndarray | None = None
    quad_bound_i: np.ndarray | None = None
    unscored: str = ""
    unit: str = "leaf"

    def __post_init__(self) -> None:
        name = self.structure
        if self.method not in METHODS:
            raise ValueError(f"{name}: method {self.method!r} is not one of {', '.join(METHODS)}")
        if self.grade not in GRADES:
            raise ValueError(f"{name}: grade {self.grade!r} is not one of {', '.join(GRADES)}")
        if not isinstance(self.unit, str) or not self.unit:
            raise ValueError(f"{name}: unit must be a non-empty name such as 'leaf' or 'species'")
        if not isinstance(self.unscored, str):
            raise ValueError(f"{name}: unscored must be a string (empty when the structure was scored)")
        leaves = tuple(str(leaf) for leaf in self.leaves)
        if len(set(leaves)) != len(leaves):
            raise ValueError(f"{name}: {self.unit} ids are not unique")
        n = len(leaves)
        elpd_i = _frozen_array(self.elpd_i, "elpd_i")
        if elpd_i.shape != (n,):
            raise ValueError(f"{name}: elpd_i has {elpd_i.size} values for {n} entries")
        if self.n_draws < 1 or self.n_refits < 0:
            raise ValueError(f"{name}: n_draws must be >= 1 and n_refits >= 0")
        method_i = self._checked_method_i(n)
        pareto_k = _entry_array(self.pareto_k, "pareto_k", name, n)
        not_psis = np.array([m != "psis" for m in method_i], dtype=bool)
        if np.any(np.isfinite(pareto_k[not_psis])):
            raise ValueError(f"{name}: pareto_k must be NaN for entries not scored by PSIS")
        mcse_i = _entry_array(self.mcse_i, "mcse_i", name, n)
        _nonnegative_or_nan(mcse_i, "mcse_i", name)
        quad_bound_i = _entry_array(self.quad_bound_i, "quad_bound_i", name, n)
        _nonnegative_or_nan(quad_bound_i, "quad_bound_i", name)
        for key, value in (("leaves", leaves), ("elpd_i", elpd_i), ("method_i", method_i),
                           ("pareto_k", pareto_k), ("mcse_i", mcse_i), ("quad_bound_i", quad_bound_i),
                           ("warnings", tuple(self.warnings)), ("rmse", dict(self.rmse)), ("r2", dict(self.r2))):
            object.__setattr__(self, key, value)

    def _checked_method_i(self, n: int) -> tuple[str, ...]:
        """``method_i`` as a tuple of length ``n``, defaulted from ``method`` and validated."""
        allowed = ENTRY_METHODS_OF[self.method]
        method_i = tuple(str(m) for m in self.method_i) or (allowed[0],) * n
        if len(method_i) != n:
            raise ValueError(f"{self.structure}: method_i has {len(method_i)} values for {n} entries")
        wrong = sorted(set(method_i) - set(allowed))
        if wrong:
            raise ValueError(f"{self.structure}: method_i values {', '.join(map(repr, wrong))} are not allowed for "
                             f"method {self.method} (allowed: {', '.join(allowed)}; all: {', '.join(ENTRY_METHODS)})")
        return method_i

    @property
    def n_leaves(self) -> int:
        """Number of held-out units G (leaves, or levels of ``unit``)."""
        return int(self.elpd_i.size)

    @property
    def elpd(self) -> float:
        """Total elpd, the sum of the per-unit values."""
        return float(np.sum(self.elpd_i))

    @property
    def se(self) -> float:
        """Standard error of the total elpd, ``sqrt(G * var(elpd_i, ddof=1))``; NaN when G < 2.

        Vehtari, Gelman & Gabry 2017 (Stat Comput 27:1413-1432, eq. 23, recalled from memory)
        write it with the sample variance. ArviZ 0.23's ``loo`` uses ``ddof=0``, smaller by
        ``sqrt((G - 1) / G)``.
        """
        if self.n_leaves < 2:
            return float("nan")
        return float(np.sqrt(self.n_leaves * np.var(self.elpd_i, ddof=1)))

    @property
    def mcse(self) -> float:
        """Monte Carlo SE of the total elpd, ``sqrt(sum(mcse_i ** 2))``; NaN if any entry's is NaN.

        The entries' estimates come from independent draws or fits, so their variances add.
        """
        return float(np.sqrt(np.sum(self.mcse_i ** 2)))

    @property
    def converged(self) -> bool:
        """True only when every fit passed its diagnostics (grade ``"converged"``)."""
        return self.grade == "converged"

    @property
    def ranked_ok(self) -> bool:
        """True when the structure may be ranked: grade converged or marginal, and scored."""
        return self.grade in ("converged", "marginal") and not self.unscored

    @property
    def max_khat(self) -> float:
        """Largest finite Pareto k-hat (entries scored by PSIS), NaN when there is none."""
        finite = self.pareto_k[np.isfinite(self.pareto_k)]
        return float(np.max(finite)) if finite.size else float("nan")

    @property
    def n_psis_high(self) -> int:
        """Number of entries with a finite Pareto k-hat above :attr:`khat_threshold`."""
        finite = self.pareto_k[np.isfinite(self.pareto_k)]
        return int(np.sum(finite > self.khat_threshold)) if finite.size else 0

    @property
    def khat_threshold(self) -> float:
        """The k-hat threshold for this result's number of draws (Vehtari et al. 2024)."""
        return khat_threshold(self.n_draws)


def _is_loo(result: CVResult) -> bool:
    """True for leave-one-out results (methods auto and exact), False for grouped K-fold."""
    return result.method != "kfold"


def check_comparable(results: Sequence[CVResult]) -> None:
    """Check that results estimate the same quantity and can be compared.

    They must have unique names, the same unit and the same ids in the same order, and be all
    leave-one-out (methods auto and exact, which may mix PSIS and refit entries) or all grouped
    K-fold. Results that may be ranked (:attr:`CVResult.ranked_ok`) must have finite elpd.

    Parameters
    ----------
    results
        Results of the structures to compare; the first is the reference.

    Raises
    ------
    ValueError
        Naming the structures that differ from the first one, and how.
    """
    if not results:
        raise ValueError("no cross-validation results to compare")
    names = [r.structure for r in results]
    duplicated = sorted({n for n in names if names.count(n) > 1})
    if duplicated:
        raise ValueError(f"structure names appear more than once: {', '.join(duplicated)}")
    first = results[0]
    problems = []
    other_unit = [f"{r.structure} ({r.unit})" for r in results[1:] if r.unit != first.unit]
    if other_unit:
        problems.append(f"held-out unit differs from {first.structure!r} ({first.unit}) in: {', '.join(other_unit)}")
    other_leaves = [r.structure for r in results[1:] if r.unit == first.unit and r.leaves != first.leaves]
    if other_leaves:
        problems.append(f"{first.unit} ids (or their order) differ from those of {first.structure!r} in: "
                        f"{', '.join(other_leaves)}")
    kfold = [r.structure for r in results if not _is_loo(r)]
    loo = [f"{r.structure} ({r.method})" for r in results if _is_loo(r)]
    if kfold and loo:
        problems.append(f"grouped K-fold results ({', '.join(kfold)}) cannot be compared with leave-one-out "
                        f"results ({', '.join(loo)})")
    not_finite = [r.structure for r in results if r.ranked_ok and not np.all(np.isfinite(r.elpd_i))]
    if not_finite:
        problems.append(f"per-{first.unit} elpd is not finite in: {', '.join(not_finite)}")
    if problems:
        raise ValueError("cannot compare these results: " + "; ".join(problems))
