"""Tests of leafcv.comparison.checks: problems that need the data.

Outside reference: linear algebra (NumPy's matrix rank) for why a constant trait cannot carry a slope.
The leaves are invented."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from leafcv.comparison import check_against_data, load_comparison
from leafcv.data.dataset import Dataset

from .common import CV, STRUCTURE, compose, write


LEAVES = pd.DataFrame(
    {
        "leaf": ["L1", "L2", "L3", "L4"],
        "species": ["sp_a", "sp_a", "sp_b", "sp_b"],
        "month": ["m1", "m2", "m1", "m2"],
        "site": ["S1", "S1", "S1", "S1"],
        "leaf_n": [1.2, 1.8, 2.1, 2.6],
        "chl": [40.0, 40.0, 40.0, 40.0],
        "sla": [10.0, 12.0, 14.0, 9.0],
    }
)


def invented_dataset() -> Dataset:
    """Four invented leaves with two points each, in the layout Dataset documents."""
    n = 2 * len(LEAVES)
    obs = pd.DataFrame(
        {
            "leaf": np.repeat(LEAVES["leaf"].to_numpy(), 2),
            "leaf_index": np.repeat(np.arange(len(LEAVES)), 2),
            "curve": np.repeat([f"c{i}" for i in range(len(LEAVES))], 2),
            "curve_type": ["aci"] * n,
            "a_net": np.linspace(2.0, 20.0, n),
            "ci": np.tile([100.0, 400.0], len(LEAVES)),
            "ppfd": [1500.0] * n,
            "t_leaf": [25.0] * n,
            "o2": [210.0] * n,
            "row": np.arange(2, n + 2),
        }
    )
    return Dataset(
        obs=obs, leaves=LEAVES.copy(), groups=("species", "month", "site"),
        traits=("leaf_n", "chl", "sla"), source=Path("points.csv"),
    )


def structure_block(name: str, vcmax25: str) -> str:
    return f'\n[[structure]]\nname = "{name}"\nvcmax25 = {vcmax25}\njmax25 = {{ ratio_to = "vcmax25" }}\n'


def data_problems(tmp_path: Path, structures: str, cv: str = CV) -> list[str]:
    comparison = load_comparison(write(tmp_path, compose(cv=cv, structures=structures)))
    return check_against_data(comparison, invented_dataset())


def test_data_clean_when_terms_vary(tmp_path: Path) -> None:
    # species, month and leaf_n vary across the invented leaves; site does not but is unused.
    block = structure_block("ok", '{ fixed = ["leaf_n", "species"], random = ["leaf", "month"] }')
    assert data_problems(tmp_path, block) == []


def test_single_level_random_grouping(tmp_path: Path) -> None:
    # A random intercept's spread cannot be learnt from one level (common practice, no source).
    block = structure_block("X", '{ random = ["leaf", "site"] }')
    assert data_problems(tmp_path, block) == [
        "structure 'X', vcmax25.random: grouping 'site' has a single level ('S1') in the data; "
        "a random effect needs at least 2 levels — remove it from the structure"
    ]


def test_single_level_fixed_factor(tmp_path: Path) -> None:
    # Treatment coding of a 1-level factor leaves no contrast column (it equals the intercept).
    block = structure_block("Y", '{ fixed = ["site"] }')
    problems = data_problems(tmp_path, block)
    assert problems == [
        "structure 'Y', vcmax25.fixed: grouping 'site' has a single level ('S1') in the data; "
        "a fixed factor needs at least 2 levels — remove it from the structure"
    ]


def test_constant_trait_as_fixed_term(tmp_path: Path) -> None:
    # A trait equal for every leaf is, once centred, a zero column: the design [1, x - mean(x)]
    # has rank 1 < 2, so its slope is not identified (checked here with NumPy's matrix_rank).
    chl = LEAVES["chl"].to_numpy()
    design = np.column_stack([np.ones_like(chl), chl - chl.mean()])
    assert np.linalg.matrix_rank(design) == 1
    block = structure_block("Z", '{ fixed = ["leaf_n", "chl"] }')
    problems = data_problems(tmp_path, block)
    assert len(problems) == 1
    assert problems[0].startswith("structure 'Z', vcmax25.fixed: trait 'chl' has the same value (40) for every leaf")


def test_each_structure_named(tmp_path: Path) -> None:
    blocks = structure_block("A", '{ random = ["site"] }') + structure_block("B", '{ fixed = ["site"] }')
    problems = data_problems(tmp_path, blocks)
    assert [(p.code, p.location) for p in problems] == [("single-level", "structure 'A', vcmax25.random"),
                                                        ("single-level", "structure 'B', vcmax25.fixed")]


def test_cv_by_single_level(tmp_path: Path) -> None:
    cv = CV.replace('by = "leaf"', 'by = "site"')
    problems = data_problems(tmp_path, STRUCTURE, cv=cv)
    assert problems == [
        "cv.by: grouping 'site' has a single level ('S1') in the data; leaving levels out needs at "
        "least 2 — choose another cv.by"
    ]


def test_kfold_more_folds_than_leaves(tmp_path: Path) -> None:
    # Grouped K-fold puts each level in exactly one fold, so K cannot exceed the number of levels.
    cv = CV.replace('"auto"', '"kfold"')
    problems = data_problems(tmp_path, STRUCTURE, cv=cv)
    assert problems == ["cv.folds: 5 folds but only 4 levels of 'leaf' in the data; set folds to at most 4"]
    assert data_problems(tmp_path, STRUCTURE, cv=cv.replace("folds = 5", "folds = 4")) == []
