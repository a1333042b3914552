"""The small valid comparison file the tests of leafcv.comparison change one part at a time, and helpers.

Outside references used by these tests: the agreed format, /work/shared/comparison-example.toml ("the
example"), whose key names are a contract, and the "The model" section of /work/shared/DESIGN.md
(parameters, links, ratio_to). Every data set is invented for the tests.
"""
from __future__ import annotations

from pathlib import Path

import pytest

from leafcv.comparison import load_comparison
from leafcv.errors import Problem, SpecError

EXAMPLE = Path("/work/shared/comparison-example.toml")

# A small valid file, assembled from parts so each bad case changes exactly one thing.

FORMAT = "format = 1\n"

DATA = """
[data]
file = "points.csv"
[data.columns]
net_assimilation = "A"
intercellular_co2 = "Ci"
photon_flux = "Q"
leaf = "leaf_id"
[data.leaf]
groups = ["species", "month", "site"]
traits = ["leaf_n", "chl", "sla"]
"""

SAMPLER = "\n[sampler]\nchains = 2\nwarmup = 200\ndraws = 300\nseed = 7\n"

CV = '\n[cv]\nby = "leaf"\nmethod = "auto"\nfolds = 5\n'

STRUCTURE = """
[[structure]]
name = "traits"
vcmax25 = { fixed = ["leaf_n"], random = ["leaf"] }
jmax25 = { ratio_to = "vcmax25" }
"""


def compose(
    *, fmt: str = FORMAT, extra: str = "", data: str = DATA, sampler: str = SAMPLER,
    cv: str = CV, structures: str = STRUCTURE,
) -> str:
    """The small valid file with some of its parts replaced (``extra``: top-level keys)."""
    return fmt + extra + data + sampler + cv + structures


def write(tmp_path: Path, text: str, name: str = "compare.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def problems_of(tmp_path: Path, text: str) -> list[Problem]:
    """Load ``text`` expecting a SpecError naming the file; return its problems, each a Problem with a code."""
    path = write(tmp_path, text)
    with pytest.raises(SpecError) as info:
        load_comparison(path)
    assert info.value.source == str(path)
    assert info.value.problems, "a SpecError must carry at least one problem"
    for problem in info.value.problems:
        assert isinstance(problem, Problem) and problem.code, repr(problem)
    return info.value.problems


def assert_bad_case(tmp_path: Path, case: str, text: str, fragments: list[str], code: str) -> None:
    """Every fragment is in the problems, and the problem holding the first one has ``code``."""
    problems = problems_of(tmp_path, text)
    joined = "\n".join(problems)
    for fragment in fragments:
        assert fragment in joined, f"{case}: {fragment!r} not in\n{joined}"
    codes = {p.code for p in problems if fragments[0] in p}
    assert codes == {code}, f"{case}: codes {codes} for {fragments[0]!r}"
