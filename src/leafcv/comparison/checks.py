"""Problems of a comparison that only show once its data are loaded: groupings with a single level,
traits that never vary, within/between splits with nothing to split, what the design cannot estimate,
and cross-validation settings the leaves cannot support."""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..data.dataset import Dataset
from ..errors import Problem, SpecError
from ..spec import PARAMETERS, Comparison, CVSpec
from .keys import LEAF_TERM


def check_against_data(comparison: Comparison, dataset: Dataset) -> list[Problem]:
    """Problems of a comparison that only show once the data are loaded.

    Parameters
    ----------
    comparison
        A comparison from `load_comparison`.
    dataset
        The data it will be fitted to; ``dataset.leaves`` has one row per leaf.

    Returns
    -------
    list of Problem
        One sentence per problem (empty when there is none), each with a code and a location (see
        `leafcv.errors.Problem`): a grouping (fixed or random, other than ``leaf``) with fewer than 2
        levels, a fixed trait with the same value for every leaf, a split with no within- or
        between-group variation, what the design finds (perfectly collinear fixed terms, a term
        constant over leaves), ``sigma = "by_curve"`` with one curve type, a ``cv.by`` grouping with
        fewer than 2 levels, more K-fold folds than levels.
    """
    leaves = dataset.leaves
    traits = set(comparison.data.traits)
    problems: list[Problem] = []
    for structure in comparison.structures:
        before = len(problems)
        for pname in PARAMETERS:
            spec = structure.params[pname]
            for kind, terms in (("fixed", spec.fixed), ("random", spec.random)):
                for term in terms:
                    found = _term_data_problem(term, kind, term in traits, leaves)
                    if found:
                        where = f"structure {structure.name!r}, {pname}.{kind}"
                        problems.append(Problem(f"{where}: {found[1]}", found[0], where))
            for kind, pairs in (("slopes", spec.slopes), ("split", spec.split)):
                for trait, group in pairs:
                    where = f"structure {structure.name!r}, {pname}.{kind}.{trait}"
                    found = _term_data_problem(group, "random", False, leaves) or _trait_data_problem(trait, leaves)
                    if found:
                        problems.append(Problem(f"{where}: {found[1]}", found[0], where))
                    elif kind == "split":
                        problems += [Problem(f"{where}: {m}", code, where)
                                     for code, m in _split_data_problems(trait, group, leaves)]
            for trait in spec.smooth:
                found = _trait_data_problem(trait, leaves)
                if found:
                    where = f"structure {structure.name!r}, {pname}.smooth"
                    problems.append(Problem(f"{where}: {found[1]}", found[0], where))
        if len(problems) == before:
            problems += _design_problems(structure, dataset, comparison)
        if structure.options.sigma_by_curve and dataset.obs["curve_type"].nunique() < 2:
            problems.append(Problem(
                f"structure {structure.name!r}: model.sigma = \"by_curve\" does not apply: the data have one curve "
                f"type only ({dataset.obs['curve_type'].iloc[0]}); use sigma = \"shared\"", "inapplicable-option",
                f"structure {structure.name!r}: model.sigma"))
    problems.extend(_cv_data_problems(comparison.cv, leaves))
    return problems


def _design_problems(structure, dataset: Dataset, comparison: Comparison) -> list[Problem]:
    """What only the design shows: perfectly collinear fixed terms, a term constant over leaves. A
    problem the design gives without a code gets ``not-estimable``."""
    from ..design import build_design

    try:
        build_design(structure, dataset, comparison.data)
    except SpecError as exc:
        where = f"structure {structure.name!r}"
        return [Problem(f"{where}: {m}", getattr(m, "code", "not-estimable"), where) for m in exc.problems]
    return []


def _split_data_problems(trait: str, group: str, leaves: pd.DataFrame) -> list[tuple[str, str]]:
    """A within/between split needs groups of 2+ leaves whose trait varies, and 2+ group means:
    (code, message) of what is missing."""
    x = pd.to_numeric(leaves[trait], errors="coerce")
    by = leaves[group].astype(str)
    sizes = by.value_counts()
    if (sizes < 2).all():
        return [("no-within-variation",
                 f"every level of {group!r} has one leaf, so there is no within-{group} variation of {trait!r}; "
                 f"split by a grouping with several leaves per level, or use {trait!r} in fixed")]
    if float((x - x.groupby(by).transform("mean")).abs().max()) == 0:
        return [("no-within-variation",
                 f"{trait!r} does not vary within any level of {group!r}; its within-{group} slope cannot be "
                 f"estimated — use {trait!r} in fixed")]
    if x.groupby(by).mean().nunique() < 2:
        return [("no-between-variation",
                 f"the {group} means of {trait!r} are all equal; its between-{group} slope cannot be estimated")]
    return []


def _levels(leaves: pd.DataFrame, column: str) -> list[str]:
    """The distinct non-missing values of a leaf-table column, in order of appearance."""
    return [str(v) for v in pd.unique(leaves[column].dropna())]


def _term_data_problem(term: str, kind: str, is_trait: bool, leaves: pd.DataFrame) -> tuple[str, str] | None:
    """(code, message) of why a fixed or random term cannot be estimated from these leaves, or None."""
    if term == LEAF_TERM:
        return None
    if term not in leaves.columns:
        return "unknown-column", f"column {term!r} is not in the leaf table"
    if is_trait:
        return _trait_data_problem(term, leaves)
    levels = _levels(leaves, term)
    need = "a random effect" if kind == "random" else "a fixed factor"
    if not levels:
        return "no-values", f"grouping {term!r} has no values in the data; remove it from the structure"
    if len(levels) < 2:
        return "single-level", (f"grouping {term!r} has a single level ({levels[0]!r}) in the data; "
                                f"{need} needs at least 2 levels — remove it from the structure")
    return None


def _trait_data_problem(term: str, leaves: pd.DataFrame) -> tuple[str, str] | None:
    """A trait used as a slope must vary across leaves: (code, message) when it does not."""
    values = pd.to_numeric(leaves[term], errors="coerce").to_numpy(dtype=float)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return "no-values", f"trait {term!r} has no values in the data; remove it from the structure"
    if values.min() == values.max():
        return "constant-trait", (f"trait {term!r} has the same value ({values[0]:g}) for every leaf; "
                                  "its slope cannot be estimated — remove it from the structure")
    return None


def _cv_data_problems(cv: CVSpec, leaves: pd.DataFrame) -> list[Problem]:
    """``cv.by`` needs 2 levels or more; K-fold needs at least as many levels as folds."""
    if cv.by not in leaves.columns:
        return [Problem(f"cv.by: column {cv.by!r} is not in the leaf table", "unknown-column", "cv.by")]
    levels = _levels(leaves, cv.by)
    if len(levels) < 2:
        found = f"a single level ({levels[0]!r})" if levels else "no levels"
        return [Problem(f"cv.by: grouping {cv.by!r} has {found} in the data; leaving levels out needs at "
                        "least 2 — choose another cv.by", "single-level", "cv.by")]
    if cv.method == "kfold" and cv.folds > len(levels):
        return [Problem(f"cv.folds: {cv.folds} folds but only {len(levels)} levels of {cv.by!r} in the data; "
                        f"set folds to at most {len(levels)}", "too-many-folds", "cv.folds")]
    return []
