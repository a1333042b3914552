"""Tests of leafcv.comparison: reading, validating and summarising a comparison file (format 1).

Outside references used here:
- the agreed format, /work/shared/comparison-example.toml ("the example"), whose key names are a
  contract, and the "The model" section of /work/shared/DESIGN.md (parameters, links, ratio_to);
- Python's own TOML reader (tomllib, PEP 680) as an independent reading of the example;
- linear algebra (NumPy's matrix rank) for why a constant trait cannot carry a slope.
Every data set below is invented for these tests.
"""
from __future__ import annotations

import shutil
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from leafcv.comparison import check_against_data, describe, load_comparison
from leafcv.data.dataset import Dataset
from leafcv.errors import SpecError
from leafcv.spec import PARAMETERS, CVSpec, ParamSpec, SamplerSpec

EXAMPLE = Path("/work/shared/comparison-example.toml")

# ----------------------------------------------------------------------------------------------
# A small valid file, assembled from parts so each bad case changes exactly one thing.
# ----------------------------------------------------------------------------------------------

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


def problems_of(tmp_path: Path, text: str) -> list[str]:
    """Load ``text`` expecting a SpecError naming the file; return its problems."""
    path = write(tmp_path, text)
    with pytest.raises(SpecError) as info:
        load_comparison(path)
    assert info.value.source == str(path)
    assert info.value.problems, "a SpecError must carry at least one problem"
    return info.value.problems


# ----------------------------------------------------------------------------------------------
# The agreed example (contract: comparison-example.toml)
# ----------------------------------------------------------------------------------------------


@pytest.fixture()
def example(tmp_path: Path):
    path = tmp_path / "comparison-example.toml"
    shutil.copy(EXAMPLE, path)
    return load_comparison(path), path


def test_example_data_sampler_cv(example) -> None:
    # Values read off comparison-example.toml; the data file is relative to the comparison file.
    comparison, path = example
    assert comparison.path == path
    assert comparison.format == 1
    assert comparison.data.file == path.parent / "observations.csv"
    assert comparison.data.file.is_absolute()
    # The example's data roles, stored under leafcv's observation variables (the Dataset.obs columns
    # each role fills); oxygen is commented out in the example, so it is not mapped.
    assert comparison.data.columns == {
        "a_net": "assim_umol", "ci": "ci_leaf", "ppfd": "light_in", "t_leaf": "leaf_temp_c",
        "leaf": "leaf_id", "curve": "curve",
    }
    assert comparison.data.ci_unit == "umol/mol"
    assert comparison.data.pressure_kpa is None
    assert comparison.data.groups == ("species", "month", "site")
    assert comparison.data.traits == ("leaf_n", "chl", "sla")
    assert comparison.sampler == SamplerSpec(chains=4, warmup=1000, draws=1000, seed=20261201)
    assert comparison.cv == CVSpec(by="leaf", method="auto", folds=10)


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


def test_describe_example(example) -> None:
    # Line formats given in the task for `leafcv check`; links per DESIGN.md "The model"
    # (log for rates, logit for alpha and theta).
    comparison, _ = example
    lines = describe(comparison).splitlines()
    # `leafcv check` names the data roles as the example writes them
    assert ("  columns: net_assimilation = 'assim_umol', intercellular_co2 = 'ci_leaf', photon_flux = 'light_in', "
            "leaf_temperature = 'leaf_temp_c', leaf = 'leaf_id', curve = 'curve'") in lines
    assert "  intercellular_co2 in umol/mol" in lines
    blocks = {}
    for line in lines:
        if line.startswith("structure "):
            current = line.split("'")[1]
            blocks[current] = []
        elif line.startswith("  ") and blocks and not line.startswith("  columns"):
            blocks[current].append(line.strip())
    assert list(blocks) == ["pooled", "leaf-vcmax-alpha", "traits-month-fixed", "traits-month-random"]
    assert "vcmax25: log link; intercept + fixed leaf_n, month + random leaf" in blocks["traits-month-fixed"]
    assert "jmax25: log(jmax25/vcmax25) shared by all leaves" in blocks["pooled"]
    assert "alpha: logit link; shared by all leaves" in blocks["pooled"]
    assert "vcmax25: log link; intercept + fixed leaf_n + random leaf, month" in blocks["traits-month-random"]
    assert all(len([x for x in b if not x.startswith("model:")]) == len(PARAMETERS) for b in blocks.values())
    # DESIGN.md "The model": hard minimum, 4/8 electrons, Arrhenius, normal likelihood by default
    assert all("model: hard minimum, 4/8 electrons per CO2, Arrhenius, normal likelihood, one residual SD" in b
               for b in blocks.values())


# ----------------------------------------------------------------------------------------------
# Valid variations
# ----------------------------------------------------------------------------------------------


def test_base_file_is_valid(tmp_path: Path) -> None:
    # Every bad case below differs from this file in one place, so its error comes from that change.
    comparison = load_comparison(write(tmp_path, compose()))
    assert [s.name for s in comparison.structures] == ["traits"]
    assert comparison.structures[0].params["vcmax25"] == ParamSpec(fixed=("leaf_n",), random=("leaf",))
    assert comparison.sampler == SamplerSpec(chains=2, warmup=200, draws=300, seed=7)


def test_optional_tables_and_defaults(tmp_path: Path) -> None:
    # [data.units] Pa + pressure_kpa, [data.leaf.centre]/[data.leaf.scale], centring, and the
    # defaults of an absent [sampler] and [cv] (SamplerSpec(), CVSpec()).
    data = DATA.replace('file = "points.csv"', 'file = "../shared/points.csv"') + """
[data.units]
intercellular_co2 = "Pa"
pressure_kpa = 95.5
[data.leaf.centre]
leaf_n = 2
[data.leaf.scale]
sla = 0.5
"""
    structures = """
[[structure]]
name = "month.random_v2"
vcmax25 = { fixed = ["leaf_n", "species"], random = ["leaf", "month"], centring = { month = "noncentred", leaf = "centred" } }
rd25 = { ratio_to = "vcmax25", random = ["leaf"] }
"""
    folder = tmp_path / "runs"
    folder.mkdir()
    comparison = load_comparison(write(folder, compose(data=data, sampler="", cv="", structures=structures)))
    assert comparison.data.file == tmp_path / "shared" / "points.csv"
    assert comparison.data.ci_unit == "Pa" and comparison.data.pressure_kpa == 95.5
    assert comparison.data.centre == {"leaf_n": 2.0} and comparison.data.scale == {"sla": 0.5}
    assert comparison.sampler == SamplerSpec() and comparison.cv == CVSpec()
    params = comparison.structures[0].params
    assert params["vcmax25"] == ParamSpec(
        fixed=("leaf_n", "species"), random=("leaf", "month"),
        centring={"month": "noncentred", "leaf": "centred"},
    )
    assert params["rd25"] == ParamSpec(random=("leaf",), ratio_to="vcmax25")
    text = describe(comparison)
    assert "rd25: log(rd25/vcmax25); intercept + random leaf" in text
    assert "(centring: month noncentred, leaf centred)" in text
    assert "leaf_n (centred at 2)" in text and "sla (centred at its leaf-table mean, divided by 0.5)" in text


# ----------------------------------------------------------------------------------------------
# Bad files: one change each, and the words the message must contain
# ----------------------------------------------------------------------------------------------

BAD_CASES = {
    "unknown top-level key with suggestion": (
        compose(extra="samplr = 3\n"),
        ["unknown key 'samplr'; did you mean 'sampler'? valid keys: format, data, sampler, cv, model, priors, structure, grid"],
    ),
    "unknown key in a nested table": (
        compose(data=DATA + '[data.units]\nintercellular_c02 = "Pa"\n'),
        ["data.units: unknown key 'intercellular_c02'; did you mean 'intercellular_co2'? "
         "valid keys: intercellular_co2, pressure_kpa"],
    ),
    "unknown data role": (
        compose(data=DATA.replace('leaf = "leaf_id"', 'leaf = "leaf_id"\nleaf_temp = "T"')),
        ["data.columns: unknown key 'leaf_temp'; did you mean 'leaf_temperature'? valid keys: net_assimilation, "
         "intercellular_co2, photon_flux, leaf, leaf_temperature, oxygen, curve"],
    ),
    "unknown parameter": (
        compose(structures=STRUCTURE + 'vcmax = { random = ["leaf"] }\n'),
        ["structure 'traits': unknown parameter 'vcmax'; did you mean 'vcmax25'?",
         "vcmax25, jmax25, alpha, theta, rd25"],
    ),
    "unknown trait with valid list": (
        compose(structures=STRUCTURE.replace('["leaf_n"]', '["leaf_N"]')),
        ["structure 'traits', vcmax25.fixed: unknown term 'leaf_N'; did you mean 'leaf_n'? "
         "valid terms: leaf_n, chl, sla, species, month, site"],
    ),
    "ratio_to on alpha": (
        compose(structures=STRUCTURE + 'alpha = { ratio_to = "vcmax25" }\n'),
        ["structure 'traits', alpha.ratio_to: only jmax25 and rd25 can be tied to vcmax25"],
    ),
    "ratio_to other than vcmax25": (
        compose(structures=STRUCTURE.replace('jmax25 = { ratio_to = "vcmax25" }', 'jmax25 = { ratio_to = "alpha" }')),
        ["structure 'traits', jmax25.ratio_to: must be 'vcmax25', got 'alpha'"],
    ),
    "duplicate structure name": (
        compose(structures=STRUCTURE + STRUCTURE),
        ["structure 'traits' (#2): duplicate name, also used by structure #1"],
    ),
    "names differing only in case": (
        compose(structures=STRUCTURE + STRUCTURE.replace('"traits"', '"Traits"')),
        ["structure 'Traits' (#2): name differs from structure 'traits' (#1) only in letter case"],
    ),
    "missing name": (
        compose(structures=STRUCTURE + '\n[[structure]]\nalpha = { random = ["leaf"] }\n'),
        ["structure #2: name is missing"],
    ),
    "bad name characters": (
        compose(structures=STRUCTURE.replace('"traits"', '"traits v2/b"')),
        ["structure 'traits v2/b': name may only contain letters, digits, '-', '_' and '.'", "' ', '/'"],
    ),
    "format missing": (
        compose(fmt=""),
        ["format is missing; add `format = 2`"],
    ),
    "format 3": (
        compose(fmt="format = 3\n"),
        ["format = 3 is not supported", "reads formats 1, 2"],
    ),
    "format-2 keys in a format-1 file": (
        compose(extra='[model]\ntpu = true\n'),
        ["format 1 has no model; set `format = 2`"],
    ),
    "bad method": (
        compose(cv=CV.replace('"auto"', '"loo"')),
        ["cv.method: unknown method 'loo'; valid methods: auto, exact, kfold"],
    ),
    "cv.by unknown grouping": (
        compose(cv=CV.replace('by = "leaf"', 'by = "specis"')),
        ["cv.by: unknown grouping 'specis'; did you mean 'species'? valid choices: leaf, species, month, site"],
    ),
    "cv.by a trait": (
        compose(cv=CV.replace('by = "leaf"', 'by = "sla"')),
        ["cv.by: 'sla' is a trait"],
    ),
    "folds below 2": (
        compose(cv=CV.replace("folds = 5", "folds = 1")),
        ["cv.folds: expected an integer >= 2, got 1"],
    ),
    "wrong type for chains": (
        compose(sampler=SAMPLER.replace("chains = 2", 'chains = "4"')),
        ["sampler.chains: expected a positive integer, got a string ('4')"],
    ),
    "boolean for draws": (
        compose(sampler=SAMPLER.replace("draws = 300", "draws = true")),
        ["sampler.draws: expected a positive integer, got true/false (true)"],
    ),
    "zero warmup": (
        compose(sampler=SAMPLER.replace("warmup = 200", "warmup = 0")),
        ["sampler.warmup: expected a positive integer, got 0"],
    ),
    "negative seed": (
        compose(sampler=SAMPLER.replace("seed = 7", "seed = -1")),
        ["sampler.seed: expected an integer from 0 to 4294967295, got -1"],
    ),
    "adapt_delta of 1": (
        compose(sampler=SAMPLER + "adapt_delta = 1.0\n"),
        ["sampler.adapt_delta: expected a number strictly between 0 and 1, got 1"],
    ),
    "max_treedepth too deep": (
        compose(sampler=SAMPLER + "max_treedepth = 25\n"),
        ["sampler.max_treedepth: expected an integer from 1 to 20, got 25"],
    ),
    "centring key not in random": (
        compose(structures=STRUCTURE.replace('random = ["leaf"] }', 'random = ["leaf"], centring = { month = "auto" } }')),
        ["structure 'traits', vcmax25.centring: 'month' is not in vcmax25.random"],
    ),
    "bad centring value": (
        compose(structures=STRUCTURE.replace('random = ["leaf"] }', 'random = ["leaf"], centring = { leaf = "centered" } }')),
        ["structure 'traits', vcmax25.centring.leaf: unknown choice 'centered'; did you mean 'centred'?",
         "auto, centred, noncentred"],
    ),
    "trait listed as group too": (
        compose(data=DATA.replace('"month", "site"]', '"month", "site", "chl"]')),
        ["data.leaf: 'chl' is listed in both groups and traits"],
    ),
    "scale key not a trait": (
        compose(data=DATA + "[data.leaf.scale]\nspecies = 2.0\n"),
        ["data.leaf.scale: 'species' is not a listed trait; listed traits: leaf_n, chl, sla"],
    ),
    "scale not positive": (
        compose(data=DATA + "[data.leaf.scale]\nsla = 0\n"),
        ["data.leaf.scale.sla: expected a positive number, got 0"],
    ),
    "leaf as a fixed term": (
        compose(structures=STRUCTURE + 'alpha = { fixed = ["leaf"] }\n'),
        ["structure 'traits', alpha.fixed: 'leaf' cannot be a fixed term", 'use random = ["leaf"]'],
    ),
    "trait as a random term": (
        compose(structures=STRUCTURE + 'alpha = { random = ["leaf", "chl"] }\n'),
        ["structure 'traits', alpha.random: 'chl' is a trait; random lists groupings", 'slopes = { chl = "<grouping>" }'],
    ),
    "unknown random grouping": (
        compose(structures=STRUCTURE + 'alpha = { random = ["plant"] }\n'),
        ["structure 'traits', alpha.random: unknown grouping 'plant'; valid groupings: leaf, species, month, site"],
    ),
    "repeated term": (
        compose(structures=STRUCTURE.replace('["leaf_n"]', '["leaf_n", "sla", "leaf_n"]')),
        ["structure 'traits', vcmax25.fixed: repeated entry 'leaf_n'"],
    ),
    "same grouping fixed and random": (
        compose(structures=STRUCTURE + 'alpha = { fixed = ["month"], random = ["leaf", "month"] }\n'),
        ["structure 'traits', alpha: 'month' is both fixed and random"],
    ),
    "unknown key in a parameter table": (
        compose(structures=STRUCTURE + 'alpha = { fixd = ["chl"] }\n'),
        ["structure 'traits', alpha: unknown key 'fixd'; did you mean 'fixed'? valid keys: fixed, random, ratio_to, centring"],
    ),
    "required column missing": (
        compose(data=DATA.replace('photon_flux = "Q"\n', "")),
        ["data.columns: required data role 'photon_flux' is missing; add photon_flux = \"<your column>\""],
    ),
    "empty column name": (
        compose(data=DATA.replace('photon_flux = "Q"', 'photon_flux = ""')),
        ["data.columns.photon_flux: is empty"],
    ),
    "two roles on one column": (
        compose(data=DATA.replace('photon_flux = "Q"', 'photon_flux = "A"')),
        ["data.columns: net_assimilation and photon_flux both name the column 'A'"],
    ),
    "unknown intercellular CO2 unit": (
        compose(data=DATA + '[data.units]\nintercellular_co2 = "ppm"\n'),
        ["data.units.intercellular_co2: must be 'umol/mol' or 'Pa', got 'ppm'"],
    ),
    "Pa without pressure": (
        compose(data=DATA + '[data.units]\nintercellular_co2 = "Pa"\n'),
        ["data.units: intercellular_co2 = 'Pa' needs pressure_kpa"],
    ),
    "no [data.columns]": (
        compose(data=DATA[:DATA.index("[data.columns]")] + DATA[DATA.index("[data.leaf]"):]),
        ["[data.columns] is missing", "at least net_assimilation, intercellular_co2, photon_flux, leaf"],
    ),
    "data file missing": (
        compose(data=DATA.replace('file = "points.csv"\n', "")),
        ["data.file is missing"],
    ),
    "groups given as a string": (
        compose(data=DATA.replace('["species", "month", "site"]', '"species"')),
        ["data.leaf.groups: expected a list of strings"],
    ),
    "leaf id column as a group": (
        compose(data=DATA.replace('"month", "site"]', '"month", "site", "leaf_id"]')),
        ["data.leaf.groups: 'leaf_id' is the leaf id column"],
    ),
    "single [structure] table": (
        compose(structures=STRUCTURE.replace("[[structure]]", "[structure]")),
        ["write each structure as [[structure]]"],
    ),
    "no structure": (
        compose(structures=""),
        ["no [[structure]] or [[grid]] found"],
    ),
}


@pytest.mark.parametrize("case", list(BAD_CASES))
def test_bad_file(tmp_path: Path, case: str) -> None:
    # Rules of format 1 as agreed for the comparison file (task brief; comparison-example.toml).
    text, fragments = BAD_CASES[case]
    problems = problems_of(tmp_path, text)
    joined = "\n".join(problems)
    for fragment in fragments:
        assert fragment in joined, f"{case}: {fragment!r} not in\n{joined}"


def test_several_problems_reported_together(tmp_path: Path) -> None:
    # One SpecError lists every problem, so one run of `leafcv check` shows them all.
    text = compose(
        fmt="",
        sampler=SAMPLER.replace("chains = 2", "chains = 2.5"),
        cv=CV.replace('"auto"', '"fast"'),
        structures=STRUCTURE.replace('["leaf_n"]', '["nitrogen"]') + 'alpha = { ratio_to = "vcmax25" }\n',
    )
    problems = problems_of(tmp_path, text)
    expected = [
        "format is missing",
        "sampler.chains: expected a positive integer, got a number (2.5)",
        "cv.method: unknown method 'fast'",
        "structure 'traits', vcmax25.fixed: unknown term 'nitrogen'",
        "structure 'traits', alpha.ratio_to:",
    ]
    assert len(problems) == len(expected)
    for fragment in expected:
        assert sum(fragment in p for p in problems) == 1, fragment


# ----------------------------------------------------------------------------------------------
# Data roles: plain-English keys; the earlier keys are refused with their replacement named
# (the example's header and DESIGN.md "Data roles")
# ----------------------------------------------------------------------------------------------

RENAMED = {
    "a_net": "net_assimilation",
    "ci": "intercellular_co2",
    "ppfd": "photon_flux",
    "t_leaf": "leaf_temperature",
    "o2": "oxygen",
}
ROLE_LINES = {"net_assimilation": 'net_assimilation = "A"\n', "intercellular_co2": 'intercellular_co2 = "Ci"\n',
              "photon_flux": 'photon_flux = "Q"\n'}


def data_with_columns(lines: str) -> str:
    """DATA with its [data.columns] entries replaced by ``lines`` (leaf kept)."""
    head, rest = DATA.split("[data.columns]\n")
    return head + "[data.columns]\n" + lines + 'leaf = "leaf_id"\n' + rest[rest.index("[data.leaf]"):]


@pytest.mark.parametrize("old", list(RENAMED))
def test_old_column_key_refused_with_new_key(tmp_path: Path, old: str) -> None:
    # The old key replaces its new key (a required role stays mapped only through the old key), so
    # the one refusal must say everything: no "required role missing", no "unknown key" besides it.
    new = RENAMED[old]
    lines = "".join(ROLE_LINES.values()).replace(ROLE_LINES.get(new, "\0"), "") + f'{old} = "X"\n'
    problems = problems_of(tmp_path, compose(data=data_with_columns(lines)))
    assert problems == [f"compare.toml: [data.columns] key {old!r} was renamed: use {new!r}"]


@pytest.mark.parametrize("old", list(RENAMED))
def test_old_units_key_refused_with_new_key(tmp_path: Path, old: str) -> None:
    problems = problems_of(tmp_path, compose(data=DATA + f'[data.units]\n{old} = "umol/mol"\n'))
    assert len(problems) == 1
    assert problems[0].startswith(f"compare.toml: [data.units] key {old!r} was renamed: use {RENAMED[old]!r}")
    # [data.units] declares only the unit of intercellular CO2 (and the pressure for Pa), so a role
    # without a unit there is also told which keys the table takes
    if old == "ci":
        assert problems[0] == "compare.toml: [data.units] key 'ci' was renamed: use 'intercellular_co2'"
    else:
        assert problems[0].endswith("; note that [data.units] takes only intercellular_co2 and pressure_kpa")


def test_every_old_key_reported_in_the_one_error(tmp_path: Path) -> None:
    # A file written with every old key, plus an unrelated mistake: one SpecError lists them all.
    lines = 'a_net = "A"\nci = "Ci"\nppfd = "Q"\nt_leaf = "T"\no2 = "O"\n'
    data = data_with_columns(lines) + '[data.units]\nci = "Pa"\npressure_kpa = 98.0\n'
    text = compose(data=data, sampler=SAMPLER.replace("chains = 2", "chains = 0"))
    path = write(tmp_path, text, name="demo.toml")
    with pytest.raises(SpecError) as info:
        load_comparison(path)
    problems = info.value.problems
    assert info.value.source == str(path)
    expected = [f"demo.toml: [data.columns] key {old!r} was renamed: use {new!r}" for old, new in RENAMED.items()]
    expected += ["demo.toml: [data.units] key 'ci' was renamed: use 'intercellular_co2'",
                 "sampler.chains: expected a positive integer, got 0"]
    assert sorted(problems) == sorted(expected)
    assert "demo.toml: [data.columns] key 'ci' was renamed: use 'intercellular_co2'" in str(info.value)


def test_old_key_beside_its_new_key_is_still_refused(tmp_path: Path) -> None:
    # Keeping the old key next to the new one would leave a stale line in the file.
    data = DATA.replace('photon_flux = "Q"', 'photon_flux = "Q"\nppfd = "Q2"')
    problems = problems_of(tmp_path, compose(data=data))
    assert problems == ["compare.toml: [data.columns] key 'ppfd' was renamed: use 'photon_flux'"]


def test_every_new_key_loads(tmp_path: Path) -> None:
    # All seven data roles, and the unit of intercellular CO2 in Pa; stored by observation variable.
    lines = ('net_assimilation = "A"\nintercellular_co2 = "Ci"\nphoton_flux = "Q"\nleaf_temperature = "T"\n'
             'oxygen = "O"\ncurve = "run"\n')
    data = data_with_columns(lines) + '[data.units]\nintercellular_co2 = "Pa"\npressure_kpa = 98.0\n'
    comparison = load_comparison(write(tmp_path, compose(data=data)))
    assert comparison.data.columns == {"a_net": "A", "ci": "Ci", "ppfd": "Q", "t_leaf": "T", "o2": "O",
                                       "curve": "run", "leaf": "leaf_id"}
    assert comparison.data.ci_unit == "Pa" and comparison.data.pressure_kpa == 98.0
    assert ("columns: net_assimilation = 'A', intercellular_co2 = 'Ci', photon_flux = 'Q', "
            "leaf_temperature = 'T', oxygen = 'O', curve = 'run', leaf = 'leaf_id'") in describe(comparison)


def test_roles_fill_their_observation_columns(tmp_path: Path) -> None:
    # End to end on the demo's invented data: each role's column of the user's file arrives in the
    # observation variable of that role (the demo's own column names are kept on the right-hand side).
    from leafcv.api import load
    from leafcv.demo import write_demo

    write_demo(tmp_path, quick=True)
    table = pd.read_csv(tmp_path / "observations.csv")
    table["o2_mmol"] = 205.0
    table.to_csv(tmp_path / "observations.csv", index=False)
    text = (tmp_path / "demo.toml").read_text()
    assert 'intercellular_co2 = "ci_ppm"' in text and 'net_assimilation = "assim"' in text
    text = text.replace('leaf_temperature = "tl_c"\n', 'leaf_temperature = "tl_c"\noxygen = "o2_mmol"\n')
    path = write(tmp_path, text)
    comparison, dataset = load(path)
    assert comparison.data.columns["o2"] == "o2_mmol"
    order = dataset.obs["row"].to_numpy() - 2             # file line -> table row (header is line 1)
    np.testing.assert_array_equal(dataset.obs["a_net"], table["assim"].to_numpy()[order])
    np.testing.assert_array_equal(dataset.obs["ci"], table["ci_ppm"].to_numpy()[order])
    np.testing.assert_array_equal(dataset.obs["ppfd"], table["par_in"].to_numpy()[order])
    np.testing.assert_array_equal(dataset.obs["t_leaf"], table["tl_c"].to_numpy()[order])
    assert (dataset.obs["o2"] == 205.0).all()
    assert not any("column mapped" in note and "oxygen" in note for note in dataset.notes)


def test_toml_syntax_error_names_line(tmp_path: Path) -> None:
    # tomllib reports the position of a syntax error; the message passes its line on.
    text = 'format = 1\n[sampler]\nchains = \n'
    problems = problems_of(tmp_path, text)
    assert len(problems) == 1
    assert problems[0].startswith("TOML syntax error at line 3, column")
    with pytest.raises(tomllib.TOMLDecodeError, match="line 3"):
        tomllib.loads(text)


def test_toml_error_at_end_of_file(tmp_path: Path) -> None:
    # tomllib (Python 3.11) reports an unclosed list as "Invalid value (at end of document)".
    problems = problems_of(tmp_path, 'format = 1\ngroups = ["a",\n')
    assert len(problems) == 1
    assert problems[0].startswith("TOML syntax error at the end of the file: Invalid value")


def test_missing_comparison_file(tmp_path: Path) -> None:
    path = tmp_path / "absent.toml"
    with pytest.raises(SpecError) as info:
        load_comparison(path)
    assert info.value.source == str(path)
    assert info.value.problems[0].startswith("cannot read the comparison file")


# ----------------------------------------------------------------------------------------------
# Problems that need the data
# ----------------------------------------------------------------------------------------------

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
    assert [p.split(",")[0] for p in problems] == ["structure 'A'", "structure 'B'"]


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
