"""Tests of leafcv.comparison.grid: [[grid]] expanded into named structures, and its problems with
their codes. (Grids on the demo data, with the design they build: tests/test_format2.py.)"""
from __future__ import annotations

from pathlib import Path

from leafcv.comparison import load_comparison
from leafcv.spec import ParamSpec

from .common import STRUCTURE, compose, problems_of, write

GRID = """
[[grid]]
name = "g"
base = { jmax25 = { ratio_to = "vcmax25" } }
leaf_effects = ["alpha", "vcmax25"]
[grid.choices.traits]
none = {}
n = { vcmax25 = { fixed = ["leaf_n"] } }
"""


def grid_file(grid: str = GRID, structures: str = "") -> str:
    return compose(fmt="format = 2\n", structures=structures + grid)


def test_every_combination_named_in_order(tmp_path: Path) -> None:
    # leaf_effects first (every subset, parameters in their model order), then the axes in file order.
    comparison = load_comparison(write(tmp_path, grid_file()))
    assert [s.name for s in comparison.structures] == [
        "g.leaf-none.traits-none", "g.leaf-none.traits-n",
        "g.leaf-vcmax25.traits-none", "g.leaf-vcmax25.traits-n",
        "g.leaf-alpha.traits-none", "g.leaf-alpha.traits-n",
        "g.leaf-vcmax25_alpha.traits-none", "g.leaf-vcmax25_alpha.traits-n",
    ]
    st = comparison.structure("g.leaf-vcmax25.traits-n")
    assert st.params["vcmax25"] == ParamSpec(fixed=("leaf_n",), random=("leaf",))
    assert st.params["jmax25"] == ParamSpec(ratio_to="vcmax25") and st.params["alpha"] == ParamSpec()
    assert st.origin == "grid 'g': leaf=vcmax25, traits=n"


def test_axis_changing_the_base_is_a_conflict(tmp_path: Path) -> None:
    grid = GRID.replace("none = {}", 'none = { jmax25 = { ratio_to = "rd25" } }')
    problems = problems_of(tmp_path, grid_file(grid))
    conflicts = [p for p in problems if p.code == "grid-conflict"]
    assert len(conflicts) == 4                  # one per leaf_effects subset combined with traits=none
    assert conflicts[0] == ("grid 'g', traits=none, jmax25: ratio_to is set to a string ('vcmax25') and to a "
                            "string ('rd25'); a grid may add to a structure but not change what the base or "
                            "another axis set")
    assert conflicts[0].location == "grid 'g', traits=none, jmax25"


def test_expanded_name_taken_by_a_written_structure(tmp_path: Path) -> None:
    written = STRUCTURE.replace('"traits"', '"G.leaf-none.traits-n"')
    problems = problems_of(tmp_path, grid_file(structures=written))
    (problem,) = problems
    assert problem.startswith("structure 'g.leaf-none.traits-n' (grid 'g': leaf=none, traits=n): the name is "
                              "already used by another structure")
    assert (problem.code, problem.location) == ("duplicate-name", "structure 'g.leaf-none.traits-n'")


def test_grid_with_nothing_to_expand(tmp_path: Path) -> None:
    problems = problems_of(tmp_path, grid_file('\n[[grid]]\nname = "e"\n', structures=STRUCTURE))
    (problem,) = problems
    assert problem == "grid 'e': nothing to expand; add leaf_effects = [...] or [grid.choices.<axis>]"
    assert (problem.code, problem.location) == ("empty-grid", "grid 'e'")


def test_grid_problems_name_their_place(tmp_path: Path) -> None:
    grid = GRID.replace('["alpha", "vcmax25"]', '["alpha", "vcmax"]').replace("n = {", '"n/x" = {')
    found = {(p.code, p.location) for p in problems_of(tmp_path, grid_file(grid))}
    assert found == {("unknown-parameter", "grid 'g'.leaf_effects"),
                     ("bad-name", "grid 'g'.choices.traits.n/x")}
