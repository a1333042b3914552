"""Tests of leafcv.comparison.structures: [[structure]] names and parameter entries, read from the agreed
example and from one-change variations.

Outside reference: Python's own TOML reader (tomllib, PEP 680) as an independent reading of the example."""
from __future__ import annotations

import shutil
import tomllib
from pathlib import Path

import pytest

from leafcv.comparison import load_comparison
from leafcv.spec import PARAMETERS, ParamSpec

from .common import EXAMPLE, STRUCTURE, assert_bad_case, compose


@pytest.fixture()
def example(tmp_path: Path):
    path = tmp_path / "comparison-example.toml"
    shutil.copy(EXAMPLE, path)
    return load_comparison(path), path


def test_example_structures(example) -> None:
    # The four structures of comparison-example.toml, in file order; an unnamed parameter is
    # "one value shared by all leaves" (comment in the example), i.e. ParamSpec().
    comparison, _ = example
    ratio = ParamSpec(ratio_to="vcmax25")
    shared = ParamSpec()
    leaf = ParamSpec(random=("leaf",))
    expected = {
        "pooled": dict(vcmax25=shared, jmax25=ratio, alpha=shared, theta=shared, rd25=ratio),
        "leaf-vcmax-alpha": dict(vcmax25=leaf, jmax25=ratio, alpha=leaf, theta=shared, rd25=ratio),
        "traits-month-fixed": dict(
            vcmax25=ParamSpec(fixed=("leaf_n", "month"), random=("leaf",)), jmax25=ratio,
            alpha=ParamSpec(fixed=("chl", "sla"), random=("leaf",)), theta=shared, rd25=ratio,
        ),
        "traits-month-random": dict(
            vcmax25=ParamSpec(fixed=("leaf_n",), random=("leaf", "month")), jmax25=ratio,
            alpha=ParamSpec(fixed=("chl", "sla"), random=("leaf",)), theta=shared, rd25=ratio,
        ),
    }
    assert [s.name for s in comparison.structures] == list(expected)
    for structure in comparison.structures:
        assert list(structure.params) == list(PARAMETERS)
        assert structure.params == expected[structure.name], structure.name
    assert comparison.structure("traits-month-random") is comparison.structures[3]


def test_example_agrees_with_tomllib(example) -> None:
    # Independent reading: every term list in the raw TOML (tomllib, PEP 680) is what we stored.
    comparison, path = example
    raw = tomllib.loads(path.read_text(encoding="utf-8"))["structure"]
    assert len(raw) == len(comparison.structures) == 4
    for table, structure in zip(raw, comparison.structures):
        assert table["name"] == structure.name
        for pname in PARAMETERS:
            written = table.get(pname, {})
            spec = structure.params[pname]
            assert spec.fixed == tuple(written.get("fixed", []))
            assert spec.random == tuple(written.get("random", []))
            assert spec.ratio_to == written.get("ratio_to")


BAD_CASES = {
    "unknown parameter": (
        compose(structures=STRUCTURE + 'vcmax = { random = ["leaf"] }\n'),
        ["structure 'traits': unknown parameter 'vcmax'; did you mean 'vcmax25'?",
         "vcmax25, jmax25, alpha, theta, rd25"],
        "unknown-parameter",
    ),
    "unknown trait with valid list": (
        compose(structures=STRUCTURE.replace('["leaf_n"]', '["leaf_N"]')),
        ["structure 'traits', vcmax25.fixed: unknown term 'leaf_N'; did you mean 'leaf_n'? "
         "valid terms: leaf_n, chl, sla, species, month, site"],
        "unknown-term",
    ),
    "ratio_to on alpha": (
        compose(structures=STRUCTURE + 'alpha = { ratio_to = "vcmax25" }\n'),
        ["structure 'traits', alpha.ratio_to: only jmax25 and rd25 can be tied to vcmax25"],
        "ratio-not-allowed",
    ),
    "ratio_to other than vcmax25": (
        compose(structures=STRUCTURE.replace('jmax25 = { ratio_to = "vcmax25" }', 'jmax25 = { ratio_to = "alpha" }')),
        ["structure 'traits', jmax25.ratio_to: must be 'vcmax25', got 'alpha'"],
        "wrong-value",
    ),
    "duplicate structure name": (
        compose(structures=STRUCTURE + STRUCTURE),
        ["structure 'traits' (#2): duplicate name, also used by structure #1"],
        "duplicate-name",
    ),
    "names differing only in case": (
        compose(structures=STRUCTURE + STRUCTURE.replace('"traits"', '"Traits"')),
        ["structure 'Traits' (#2): name differs from structure 'traits' (#1) only in letter case"],
        "duplicate-name",
    ),
    "missing name": (
        compose(structures=STRUCTURE + '\n[[structure]]\nalpha = { random = ["leaf"] }\n'),
        ["structure #2: name is missing"],
        "missing-key",
    ),
    "bad name characters": (
        compose(structures=STRUCTURE.replace('"traits"', '"traits v2/b"')),
        ["structure 'traits v2/b': name may only contain letters, digits, '-', '_' and '.'", "' ', '/'"],
        "bad-name",
    ),
    "centring key not in random": (
        compose(structures=STRUCTURE.replace('random = ["leaf"] }', 'random = ["leaf"], centring = { month = "auto" } }')),
        ["structure 'traits', vcmax25.centring: 'month' is not in vcmax25.random"],
        "misplaced-term",
    ),
    "bad centring value": (
        compose(structures=STRUCTURE.replace('random = ["leaf"] }', 'random = ["leaf"], centring = { leaf = "centered" } }')),
        ["structure 'traits', vcmax25.centring.leaf: unknown choice 'centered'; did you mean 'centred'?",
         "auto, centred, noncentred"],
        "unknown-choice",
    ),
    "leaf as a fixed term": (
        compose(structures=STRUCTURE + 'alpha = { fixed = ["leaf"] }\n'),
        ["structure 'traits', alpha.fixed: 'leaf' cannot be a fixed term", 'use random = ["leaf"]'],
        "misplaced-term",
    ),
    "trait as a random term": (
        compose(structures=STRUCTURE + 'alpha = { random = ["leaf", "chl"] }\n'),
        ["structure 'traits', alpha.random: 'chl' is a trait; random lists groupings", 'slopes = { chl = "<grouping>" }'],
        "misplaced-term",
    ),
    "unknown random grouping": (
        compose(structures=STRUCTURE + 'alpha = { random = ["plant"] }\n'),
        ["structure 'traits', alpha.random: unknown grouping 'plant'; valid groupings: leaf, species, month, site"],
        "unknown-term",
    ),
    "repeated term": (
        compose(structures=STRUCTURE.replace('["leaf_n"]', '["leaf_n", "sla", "leaf_n"]')),
        ["structure 'traits', vcmax25.fixed: repeated entry 'leaf_n'"],
        "repeated-entry",
    ),
    "same grouping fixed and random": (
        compose(structures=STRUCTURE + 'alpha = { fixed = ["month"], random = ["leaf", "month"] }\n'),
        ["structure 'traits', alpha: 'month' is both fixed and random"],
        "conflicting-terms",
    ),
    "unknown key in a parameter table": (
        compose(structures=STRUCTURE + 'alpha = { fixd = ["chl"] }\n'),
        ["structure 'traits', alpha: unknown key 'fixd'; did you mean 'fixed'? valid keys: fixed, random, ratio_to, centring, slopes, split, smooth"],
        "unknown-key",
    ),
    "smooth over a grouping": (
        compose(structures=STRUCTURE + 'alpha = { smooth = ["month"] }\n'),
        ["structure 'traits', alpha.smooth: 'month' is a grouping; a smooth needs a numeric leaf covariate"],
        "misplaced-term",
    ),
    "smooth over an unknown column": (
        compose(structures=STRUCTURE + 'alpha = { smooth = ["doy"] }\n'),
        ["structure 'traits', alpha.smooth: unknown trait 'doy'"],
        "unknown-term",
    ),
    "smooth and fixed on one trait": (
        compose(structures=STRUCTURE.replace('["leaf_n"]', '["leaf_n"], smooth = ["leaf_n"]')),
        ["structure 'traits', vcmax25: 'leaf_n' is both smooth and a slope"],
        "conflicting-terms",
    ),
    "single [structure] table": (
        compose(structures=STRUCTURE.replace("[[structure]]", "[structure]")),
        ["write each structure as [[structure]]"],
        "wrong-type",
    ),
}


@pytest.mark.parametrize("case", list(BAD_CASES))
def test_bad_file(tmp_path: Path, case: str) -> None:
    # Rules of the comparison file as agreed (task brief; comparison-example.toml), and the code of each.
    text, fragments, code = BAD_CASES[case]
    assert_bad_case(tmp_path, case, text, fragments, code)
