"""Tests of leafcv.comparison.sections: format, [data] (data roles, units, leaf-level columns), [sampler]
and [cv] of the comparison file, read from the agreed example and from one-change variations."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from leafcv.comparison import describe, load_comparison
from leafcv.errors import SpecError
from leafcv.spec import CVSpec, ParamSpec, SamplerSpec

from .common import CV, DATA, EXAMPLE, SAMPLER, assert_bad_case, compose, problems_of, write


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


BAD_CASES = {
    "unknown key in a nested table": (
        compose(data=DATA + '[data.units]\nintercellular_c02 = "Pa"\n'),
        ["data.units: unknown key 'intercellular_c02'; did you mean 'intercellular_co2'? "
         "valid keys: intercellular_co2, pressure_kpa"],
        "unknown-key",
    ),
    "unknown data role": (
        compose(data=DATA.replace('leaf = "leaf_id"', 'leaf = "leaf_id"\nleaf_temp = "T"')),
        ["data.columns: unknown key 'leaf_temp'; did you mean 'leaf_temperature'? valid keys: net_assimilation, "
         "intercellular_co2, photon_flux, leaf, leaf_temperature, oxygen, curve"],
        "unknown-key",
    ),
    "bad method": (
        compose(cv=CV.replace('"auto"', '"loo"')),
        ["cv.method: unknown method 'loo'; valid methods: auto, exact, kfold"],
        "unknown-choice",
    ),
    "cv.by unknown grouping": (
        compose(cv=CV.replace('by = "leaf"', 'by = "specis"')),
        ["cv.by: unknown grouping 'specis'; did you mean 'species'? valid choices: leaf, species, month, site"],
        "unknown-term",
    ),
    "cv.by a trait": (
        compose(cv=CV.replace('by = "leaf"', 'by = "sla"')),
        ["cv.by: 'sla' is a trait"],
        "misplaced-term",
    ),
    "folds below 2": (
        compose(cv=CV.replace("folds = 5", "folds = 1")),
        ["cv.folds: expected an integer >= 2, got 1"],
        "out-of-range",
    ),
    "wrong type for chains": (
        compose(sampler=SAMPLER.replace("chains = 2", 'chains = "4"')),
        ["sampler.chains: expected a positive integer, got a string ('4')"],
        "wrong-type",
    ),
    "boolean for draws": (
        compose(sampler=SAMPLER.replace("draws = 300", "draws = true")),
        ["sampler.draws: expected a positive integer, got true/false (true)"],
        "wrong-type",
    ),
    "zero warmup": (
        compose(sampler=SAMPLER.replace("warmup = 200", "warmup = 0")),
        ["sampler.warmup: expected a positive integer, got 0"],
        "out-of-range",
    ),
    "negative seed": (
        compose(sampler=SAMPLER.replace("seed = 7", "seed = -1")),
        ["sampler.seed: expected an integer from 0 to 4294967295, got -1"],
        "out-of-range",
    ),
    "adapt_delta of 1": (
        compose(sampler=SAMPLER + "adapt_delta = 1.0\n"),
        ["sampler.adapt_delta: expected a number strictly between 0 and 1, got 1"],
        "out-of-range",
    ),
    "max_treedepth too deep": (
        compose(sampler=SAMPLER + "max_treedepth = 25\n"),
        ["sampler.max_treedepth: expected an integer from 1 to 20, got 25"],
        "out-of-range",
    ),
    "trait listed as group too": (
        compose(data=DATA.replace('"month", "site"]', '"month", "site", "chl"]')),
        ["data.leaf: 'chl' is listed in both groups and traits"],
        "group-and-trait",
    ),
    "scale key not a trait": (
        compose(data=DATA + "[data.leaf.scale]\nspecies = 2.0\n"),
        ["data.leaf.scale: 'species' is not a listed trait; listed traits: leaf_n, chl, sla"],
        "unknown-term",
    ),
    "scale not positive": (
        compose(data=DATA + "[data.leaf.scale]\nsla = 0\n"),
        ["data.leaf.scale.sla: expected a positive number, got 0"],
        "out-of-range",
    ),
    "required column missing": (
        compose(data=DATA.replace('photon_flux = "Q"\n', "")),
        ["data.columns: required data role 'photon_flux' is missing; add photon_flux = \"<your column>\""],
        "missing-role",
    ),
    "empty column name": (
        compose(data=DATA.replace('photon_flux = "Q"', 'photon_flux = ""')),
        ["data.columns.photon_flux: is empty"],
        "empty-value",
    ),
    "two roles on one column": (
        compose(data=DATA.replace('photon_flux = "Q"', 'photon_flux = "A"')),
        ["data.columns: net_assimilation and photon_flux both name the column 'A'"],
        "shared-column",
    ),
    "unknown intercellular CO2 unit": (
        compose(data=DATA + '[data.units]\nintercellular_co2 = "ppm"\n'),
        # the wording of leafcv.data.mapping, shared with load_dataset (tests/data/test_mapping.py)
        ["[data.units] intercellular_co2 = 'ppm' is not a known unit (did you mean 'umol/mol'?); "
         "valid units: 'umol/mol', 'Pa' ('Pa' also needs pressure_kpa)"],
        "unknown-unit",
    ),
    "Pa without pressure": (
        compose(data=DATA + '[data.units]\nintercellular_co2 = "Pa"\n'),
        ['[data.units] intercellular_co2 = "Pa" needs pressure_kpa, the air pressure in kPa'],
        "missing-pressure",
    ),
    "no [data.columns]": (
        compose(data=DATA[:DATA.index("[data.columns]")] + DATA[DATA.index("[data.leaf]"):]),
        ["[data.columns] is missing", "at least net_assimilation, intercellular_co2, photon_flux, leaf"],
        "missing-key",
    ),
    "data file missing": (
        compose(data=DATA.replace('file = "points.csv"\n', "")),
        ["data.file is missing"],
        "missing-key",
    ),
    "groups given as a string": (
        compose(data=DATA.replace('["species", "month", "site"]', '"species"')),
        ["data.leaf.groups: expected a list of strings"],
        "wrong-type",
    ),
    "leaf id column as a group": (
        compose(data=DATA.replace('"month", "site"]', '"month", "site", "leaf_id"]')),
        ["data.leaf.groups: 'leaf_id' is the leaf id column"],
        "leaf-id-column",
    ),
}


@pytest.mark.parametrize("case", list(BAD_CASES))
def test_bad_file(tmp_path: Path, case: str) -> None:
    # Rules of the comparison file as agreed (task brief; comparison-example.toml), and the code of each.
    text, fragments, code = BAD_CASES[case]
    assert_bad_case(tmp_path, case, text, fragments, code)


# Data roles: plain-English keys; the earlier keys are refused with their replacement named
# (the example's header and DESIGN.md "Data roles")

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

    assert problems[0].code == "renamed-key" and problems[0].location == f"[data.columns] {old}"


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

    assert problems[0].code == "renamed-key" and problems[0].location == f"[data.units] {old}"


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


def test_renamed_key_with_a_bad_value_is_refused_once(tmp_path: Path) -> None:
    # The refusal covers the whole entry: its empty value is not a second problem.
    problems = problems_of(tmp_path, compose(data=DATA.replace('photon_flux = "Q"', 'ppfd = ""')))
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


# [engine] (format 2): the Stan engine by name, "pystan" (the default) or "cmdstan" (DESIGN.md "Engines")

@pytest.mark.parametrize("name", ["pystan", "cmdstan"])
def test_engine_name_is_read(tmp_path: Path, name: str) -> None:
    comparison = load_comparison(write(tmp_path, compose(fmt="format = 2\n", extra=f'\n[engine]\nname = "{name}"\n')))
    assert comparison.engine == name


def test_engine_absent_is_the_default(tmp_path: Path) -> None:
    assert load_comparison(write(tmp_path, compose(fmt="format = 2\n"))).engine is None


@pytest.mark.parametrize("case, extra, fragments, code", [
    ("unknown engine", '\n[engine]\nname = "cmdstanpy"\n', ["engine.name", "cmdstan", "pystan"], "unknown-choice"),
    ("engine not a string", '\n[engine]\nname = 2\n', ["engine.name: expected one of pystan, cmdstan"], "wrong-type"),
    ("unknown key", '\n[engine]\nname = "pystan"\nthreads = 4\n', ["threads"], "unknown-key"),
])
def test_bad_engine(tmp_path: Path, case: str, extra: str, fragments: list[str], code: str) -> None:
    assert_bad_case(tmp_path, case, compose(fmt="format = 2\n", extra=extra), fragments, code)


def test_engine_needs_format_2(tmp_path: Path) -> None:
    assert_bad_case(tmp_path, "engine in format 1", compose(extra='\n[engine]\nname = "cmdstan"\n'),
                    ["format 1 has no engine; set `format = 2`"], "needs-format-2")
