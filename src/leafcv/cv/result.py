"""The result of one structure's leave-one-leaf-out cross-validation.

A :class:`CVResult` holds the per-leaf expected log predictive density (elpd) of a structure,
each leaf scored jointly over all its points, plus the diagnostics the ranking reports.
It knows nothing of ArviZ: :mod:`leafcv.cv.arviz_bridge` converts it.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

METHODS = ("auto", "exact", "kfold")


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


@dataclass(frozen=True, eq=False)
class CVResult:
    """Leave-one-leaf-out cross-validation of one structure.

    Equality is identity (``eq=False``): the fields hold arrays, which have no single truth value.

    Parameters
    ----------
    structure
        Name of the structure.
    method
        ``"auto"`` (integrated PSIS plus exact refits), ``"exact"`` or ``"kfold"``.
    leaves
        Leaf ids, in the same order for every structure of a comparison.
    elpd_i
        Per-leaf elpd: log predictive density of the leaf's points jointly, shape (G,).
    n_draws
        Posterior draws behind each estimate.
    pareto_k
        Per-leaf Pareto k-hat (method ``auto``), else None.
    n_refits
        Exact refits made.
    converged
        All fits of this structure passed their diagnostics.
    warnings
        Plain-sentence warnings about this structure.
    rmse, r2
        Held-out RMSE and R² by curve type; key ``"all"`` for all points together.
    """

    structure: str
    method: str
    leaves: tuple[str, ...]
    elpd_i: np.ndarray
    n_draws: int
    pareto_k: np.ndarray | None = None
    n_refits: int = 0
    converged: bool = True
    warnings: tuple[str, ...] = ()
    rmse: dict[str, float] = field(default_factory=dict)
    r2: dict[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ValueError(f"{self.structure}: method {self.method!r} is not one of {', '.join(METHODS)}")
        leaves = tuple(str(leaf) for leaf in self.leaves)
        if len(set(leaves)) != len(leaves):
            raise ValueError(f"{self.structure}: leaf ids are not unique")
        elpd_i = _frozen_array(self.elpd_i, "elpd_i")
        if elpd_i.shape != (len(leaves),):
            raise ValueError(f"{self.structure}: elpd_i has {elpd_i.size} values for {len(leaves)} leaves")
        if self.pareto_k is not None:
            pareto_k = _frozen_array(self.pareto_k, "pareto_k")
            if pareto_k.shape != elpd_i.shape:
                raise ValueError(f"{self.structure}: pareto_k has {pareto_k.size} values for {len(leaves)} leaves")
            object.__setattr__(self, "pareto_k", pareto_k)
        if self.n_draws < 1 or self.n_refits < 0:
            raise ValueError(f"{self.structure}: n_draws must be >= 1 and n_refits >= 0")
        object.__setattr__(self, "leaves", leaves)
        object.__setattr__(self, "elpd_i", elpd_i)
        object.__setattr__(self, "warnings", tuple(self.warnings))
        object.__setattr__(self, "rmse", dict(self.rmse))
        object.__setattr__(self, "r2", dict(self.r2))

    @property
    def n_leaves(self) -> int:
        """Number of leaves G."""
        return int(self.elpd_i.size)

    @property
    def elpd(self) -> float:
        """Total elpd, the sum of the per-leaf values."""
        return float(np.sum(self.elpd_i))

    @property
    def se(self) -> float:
        """Standard error of the total elpd, ``sqrt(G * var(elpd_i))`` with ``ddof=0``.

        This is ArviZ 0.23's definition (``arviz.stats.stats.loo``:
        ``loo_lppd_se = (n_data_points * np.var(loo_lppd_i.values)) ** 0.5``), so that the SE here
        and the one ArviZ's ``compare`` reports agree. Vehtari, Gelman & Gabry 2017 (Stat Comput
        27:1413-1432, eq. 23) write it with the sample variance, larger by ``sqrt(G / (G - 1))``
        (recalled from memory).
        """
        return float(np.sqrt(self.n_leaves * np.var(self.elpd_i)))

    @property
    def max_khat(self) -> float:
        """Largest per-leaf Pareto k-hat, NaN when there is none (methods exact and kfold)."""
        if self.pareto_k is None or self.pareto_k.size == 0:
            return float("nan")
        return float(np.max(self.pareto_k))

    @property
    def khat_threshold(self) -> float:
        """The k-hat threshold for this result's number of draws (Vehtari et al. 2024)."""
        return khat_threshold(self.n_draws)


def check_comparable(results: Sequence[CVResult]) -> None:
    """Check that results can be compared: unique names, same leaves in the same order, same method.

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
    other_leaves = [r.structure for r in results[1:] if r.leaves != first.leaves]
    if other_leaves:
        problems.append(f"leaves (ids or order) differ from those of {first.structure!r} in: {', '.join(other_leaves)}")
    other_method = [f"{r.structure} ({r.method})" for r in results[1:] if r.method != first.method]
    if other_method:
        problems.append(f"method differs from {first.structure!r} ({first.method}) in: {', '.join(other_method)}")
    not_finite = [r.structure for r in results if not np.all(np.isfinite(r.elpd_i))]
    if not_finite:
        problems.append(f"per-leaf elpd is not finite in: {', '.join(not_finite)}")
    if problems:
        raise ValueError("cannot compare these results: " + "; ".join(problems))
