"""Format 2 of the comparison file: [model], [priors], random slopes, within/between splits,
correlated leaf effects and [[grid]]; the errors that name the structure and the term; what the design
builds from each new term. Runs on the quick demo data; no Stan."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from leafcv.api import load
from leafcv.comparison import describe
from leafcv.demo import write_demo
from leafcv.design import build_design
from leafcv.errors import UserInputError
from leafcv.priors import prior_from_natural

BASE = """jmax25 = { ratio_to = "vcmax25" }
rd25 = { ratio_to = "vcmax25" }
"""


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("format2")
    write_demo(folder, quick=True)
    obs = pd.read_csv(folder / "observations.csv")
    # extra leaf-level columns for the error cases: one level per leaf, a single level, a copy of a
    # trait, and a trait that varies within leaves
    obs["plot"] = obs["plant_leaf"]
    obs["site"] = "S1"
    obs["n_twice"] = 2 * obs["n_area"]
    obs["wobbly"] = obs["n_area"] + np.arange(len(obs)) * 1e-3
    obs.to_csv(folder / "observations.csv", index=False)
    return folder


def header(demo_dir: Path, groups=("taxon", "campaign"), traits=("n_area", "chl_ug", "sla_m2kg", "day_of_year")) -> str:
    """The demo's comparison file up to its first structure, in format 2, with `groups` and `traits`."""
    text = (demo_dir / "demo.toml").read_text()
    head = text[:text.index("[[structure]]")].replace("format = 1", "format = 2")
    lists = {"groups": groups, "traits": traits}
    lines = []
    for line in head.splitlines():
        key = line.split("=")[0].strip()
        lines.append(f"{key} = [" + ", ".join(f'"{v}"' for v in lists[key]) + "]" if key in lists else line)
    return "\n".join(lines) + "\n"


def write(demo_dir: Path, body: str, name: str = "c.toml", **kw) -> Path:
    path = demo_dir / name
    path.write_text(header(demo_dir, **kw) + "\n" + body)
    return path


def problems(demo_dir: Path, body: str, **kw) -> str:
    with pytest.raises(UserInputError) as exc:
        load(write(demo_dir, body, **kw))
    return "\n".join(exc.value.problems)


# ---------------------------------------------------------------------------------------------
# Data roles: format 2 reads the same plain-English keys as format 1 and refuses the renamed ones
# ---------------------------------------------------------------------------------------------

RENAMED = {"a_net": "net_assimilation", "ci": "intercellular_co2", "ppfd": "photon_flux",
           "t_leaf": "leaf_temperature", "o2": "oxygen"}


def test_format2_reads_the_data_roles(demo_dir):
    head = header(demo_dir)
    assert "format = 2" in head and 'net_assimilation = "assim"' in head and 'intercellular_co2 = "umol/mol"' in head
    comparison, dataset = load(write(demo_dir, '[[structure]]\nname = "a"\n' + BASE))
    assert comparison.format == 2
    assert comparison.data.columns["a_net"] == "assim" and comparison.data.ci_unit == "umol/mol"
    assert dataset.n_leaves == 16


def test_format2_refuses_every_renamed_key(demo_dir):
    head = header(demo_dir)
    for old, new in RENAMED.items():
        head = head.replace(f"\n{new} = ", f"\n{old} = ")       # the [data.columns] and [data.units] lines
    head = head.replace('leaf = "plant_leaf"', 'leaf = "plant_leaf"\no2 = "o2_col"')
    path = demo_dir / "old-keys.toml"
    path.write_text(head + '\n[[structure]]\nname = "a"\n' + BASE)
    with pytest.raises(UserInputError) as exc:
        load(path)
    expected = [f"old-keys.toml: [data.columns] key {old!r} was renamed: use {new!r}" for old, new in RENAMED.items()]
    expected.append("old-keys.toml: [data.units] key 'ci' was renamed: use 'intercellular_co2'")
    assert sorted(exc.value.problems) == sorted(expected)


# ---------------------------------------------------------------------------------------------
# [model] and per-structure overrides
# ---------------------------------------------------------------------------------------------

def test_model_options_and_structure_override(demo_dir):
    comparison, _ = load(write(demo_dir, """
[model]
likelihood = "student_t"
electron = "4.5-10.5"

[[structure]]
name = "a"
""" + BASE + """
[[structure]]
name = "b"
model = { likelihood = "normal", transition = "smooth", smooth_curvature = 0.95, tpu = true, temperature = "peaked", sigma = "by_curve" }
""" + BASE))
    a, b = comparison.structures
    assert a.options.student_t and a.options.electron == "4.5-10.5" and a.options.transition == "min"
    assert not b.options.student_t and b.options.electron == "4.5-10.5"    # inherits what it does not override
    assert b.options.transition == "smooth" and b.options.smooth_curvature == 0.95
    assert b.options.tpu and b.options.peaked and b.options.sigma_by_curve


@pytest.mark.parametrize("body,fragments", [
    ('[model]\nsmooth_curvature = 0.9\n[[structure]]\nname = "a"\n',
     ["model.smooth_curvature applies only with transition = \"smooth\""]),
    ('[[structure]]\nname = "a"\nmodel = { likelihood = "cauchy" }\n',
     ["structure 'a': model.likelihood: unknown choice 'cauchy'", "normal, student_t"]),
    ('[[structure]]\nname = "a"\nlkj_eta = 2\nvcmax25 = { random = ["leaf"] }\nalpha = { random = ["leaf"] }\n',
     ["structure 'a': lkj_eta applies only with leaf_correlation = true"]),
    ('[[structure]]\nname = "a"\nleaf_correlation = true\nvcmax25 = { random = ["leaf"] }\n',
     ["structure 'a': leaf_correlation applies only with leaf effects on two or more parameters",
      "leaf effects here: vcmax25"]),
    ('[[structure]]\nname = "a"\npriors = { tpu25 = { within95 = [3, 48] } }\n',
     ["structure 'a': priors.tpu25 applies only with TPU limitation on"]),
])
def test_options_that_do_not_apply(demo_dir, body, fragments):
    text = problems(demo_dir, body)
    for f in fragments:
        assert f in text, text


# ---------------------------------------------------------------------------------------------
# [priors] on the natural scale
# ---------------------------------------------------------------------------------------------

def test_within95_gives_the_stated_lognormal_quantiles():
    # a lognormal whose 2.5 % and 97.5 % quantiles are 15 and 240 (scipy.stats.lognorm as the reference)
    prior, message = prior_from_natural({"median": 60, "within95": [15, 240]}, "log")
    assert message is None and prior.family == "normal"
    q = stats.lognorm(s=prior.b, scale=math.exp(prior.a)).ppf([0.025, 0.5, 0.975])
    np.testing.assert_allclose(q, [15, 60, 240], rtol=1e-6)


def test_within95_gives_the_stated_logit_normal_quantiles():
    prior, _ = prior_from_natural({"within95": [0.1, 0.5]}, "logit")
    q = 1 / (1 + np.exp(-stats.norm(prior.a, prior.b).ppf([0.025, 0.975])))
    np.testing.assert_allclose(q, [0.1, 0.5], rtol=1e-6)


@pytest.mark.parametrize("value,link,fragment", [
    ({"median": 100, "within95": [15, 240]}, "log", "does not sit in the middle of within95"),
    ({"beta": [2, 2]}, "log", "a beta prior applies only to alpha and theta"),
    ({"within95": [0.2, 1.5]}, "logit", "0 < lower < upper < 1"),
    ({"within95": [240, 15]}, "log", "0 < lower < upper"),
    ({"mean": 3}, "log", "unknown key(s) mean"),
])
def test_bad_priors(value, link, fragment):
    prior, message = prior_from_natural(value, link)
    assert prior is None and fragment in message


def test_prior_overrides_reach_the_design_and_its_written_priors(demo_dir):
    comparison, dataset = load(write(demo_dir, """
[priors]
vcmax25 = { within95 = [20, 180] }
leaf_sd = 0.3

[[structure]]
name = "a"
vcmax25 = { random = ["leaf"] }
priors = { alpha = { beta = [4, 12] }, jmax25_ratio = { within95 = [1.2, 2.4] } }
""" + BASE))
    design = build_design(comparison.structures[0], dataset, comparison.data)
    d = design.stan_data
    np.testing.assert_allclose(np.exp(d["prior_a"][0]), math.sqrt(20 * 180))
    np.testing.assert_allclose(d["prior_b"][0], math.log(180 / 20) / (2 * 1.959963984540054))
    assert d["prior_family"][2] == 2 and list(d["prior_a"][[2]]) == [4.0] and d["prior_b"][2] == 12.0
    np.testing.assert_allclose(np.exp(d["prior_a"][1]), math.sqrt(1.2 * 2.4))
    assert list(d["leaf_tau_sd"]) == [0.3]
    lines = "\n".join(design.prior_lines)
    assert "vcmax25 at reference traits and levels: lognormal, median 60, 95 % within 20-180" in lines
    assert "alpha at reference traits and levels: beta(4, 12) on the natural scale" in lines
    assert "SD of leaf effects on vcmax25: half-normal(0, 0.3)" in lines


# ---------------------------------------------------------------------------------------------
# Random slopes, within/between splits, correlated leaf effects: the design
# ---------------------------------------------------------------------------------------------

def test_random_slope_multiplies_the_centred_trait(demo_dir):
    comparison, dataset = load(write(demo_dir, """
[[structure]]
name = "a"
vcmax25 = { fixed = ["n_area"], random = ["leaf"], slopes = { n_area = "taxon" } }
""" + BASE))
    design = build_design(comparison.structures[0], dataset, comparison.data)
    (gt,) = design.group_terms
    assert gt.slope_of == "n_area" and gt.grouping == "taxon" and len(gt.levels) == 4
    centre, scale = design.trait_transform["n_area"]
    np.testing.assert_allclose(design.stan_data["re_x"][0], (dataset.leaves["n_area"] - centre) / scale)


def test_split_columns_are_group_mean_centred(demo_dir):
    comparison, dataset = load(write(demo_dir, """
[[structure]]
name = "a"
vcmax25 = { split = { n_area = "taxon" }, random = ["leaf"] }
""" + BASE))
    design = build_design(comparison.structures[0], dataset, comparison.data)
    kinds = [c.kind for c in design.coefficients]
    assert kinds == ["within", "between"]
    X = design.stan_data["X"]
    taxon = dataset.leaves["taxon"].astype(str).to_numpy()
    x = dataset.leaves["n_area"].to_numpy(float)
    centre, _ = design.trait_transform["n_area"]
    for t in set(taxon):
        m = taxon == t
        assert abs(X[m, 0].sum()) < 1e-9                       # within: deviations from the taxon mean
        np.testing.assert_allclose(X[m, 1], x[m].mean() - centre)   # between: the taxon mean
    np.testing.assert_allclose(X[:, 0] + X[:, 1], x - centre)   # together they are the centred trait


def test_correlated_leaf_cells_come_leaf_by_leaf(demo_dir):
    comparison, dataset = load(write(demo_dir, """
[[structure]]
name = "a"
leaf_correlation = true
vcmax25 = { random = ["leaf"] }
alpha = { random = ["leaf"] }
""" + BASE))
    design = build_design(comparison.structures[0], dataset, comparison.data)
    d = design.stan_data
    L = d["L"]
    assert d["leaf_corr"] == 1 and d["Rl"] == 2 and d["Mc"] + d["Mn"] == 2 * L
    for cells in (np.asarray(d["cen_cell"]) - 1, np.asarray(d["nc_cell"]) - 1):
        pairs = cells.reshape(-1, 2)
        np.testing.assert_array_equal(pairs[:, 0] % L, pairs[:, 1] % L)        # one leaf per pair
        np.testing.assert_array_equal(pairs[:, 0] // L, 0)                      # vcmax25 first
        np.testing.assert_array_equal(pairs[:, 1] // L, 2)                      # then alpha
    assert any("LKJ(2)" in p for p in design.prior_lines)


# ---------------------------------------------------------------------------------------------
# Errors that name the structure and the term
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("body,kw,fragments", [
    ('vcmax25 = { fixed = ["n_area"], slopes = { n_aera = "taxon" } }', {},
     ["structure 'a', vcmax25.slopes: unknown trait 'n_aera'; did you mean 'n_area'?", "n_area, chl_ug, sla_m2kg"]),
    ('vcmax25 = { slopes = { n_area = "taxon" } }', {},
     ["structure 'a', vcmax25.slopes: the taxon-specific slopes on 'n_area' vary around a mean slope",
      "add 'n_area' to vcmax25.fixed"]),
    ('vcmax25 = { fixed = ["n_area"], slopes = { n_area = "leaf" } }', {},
     ["structure 'a', vcmax25.slopes.n_area: a trait is one value per leaf"]),
    ('vcmax25 = { fixed = ["n_area"], slopes = { n_area = "site" } }', {"groups": ("taxon", "site")},
     ["structure 'a', vcmax25.slopes.n_area: grouping 'site' has a single level ('S1')"]),
    ('vcmax25 = { split = { n_area = "plot" } }', {"groups": ("taxon", "plot")},
     ["structure 'a', vcmax25.split.n_area: every level of 'plot' has one leaf"]),
    ('vcmax25 = { fixed = ["n_area"], split = { n_area = "taxon" } }', {},
     ["'n_area' is both in fixed and in split"]),
    ('vcmax25 = { fixed = ["n_area", "n_twice"] }', {"traits": ("n_area", "chl_ug", "sla_m2kg", "day_of_year", "n_twice")},
     ["structure 'a': vcmax25: fixed term 'n_twice' is perfectly collinear with the intercept and 'n_area'"]),
    ('vcmax25 = { fixed = ["taxon"], split = { n_area = "taxon" } }', {},
     ["structure 'a': vcmax25: fixed term 'n_area between taxon' is perfectly collinear"]),
])
def test_term_errors(demo_dir, body, kw, fragments):
    text = problems(demo_dir, '[[structure]]\nname = "a"\n' + body + "\n" + BASE, **kw)
    for f in fragments:
        assert f in text, text


def test_trait_varying_within_leaves_names_the_structures(demo_dir):
    text = problems(demo_dir, '[[structure]]\nname = "a"\nvcmax25 = { fixed = ["wobbly"] }\n' + BASE,
                    traits=("n_area", "chl_ug", "sla_m2kg", "day_of_year", "wobbly"))
    assert "must be constant within a leaf" in text and "structure 'a' uses 'wobbly' on vcmax25" in text


# ---------------------------------------------------------------------------------------------
# [[grid]]
# ---------------------------------------------------------------------------------------------

GRID = """
[[grid]]
name = "g"
leaf_effects = ["vcmax25", "jmax25", "alpha", "rd25"]
base = { jmax25 = { ratio_to = "vcmax25" }, rd25 = { ratio_to = "vcmax25" } }
[grid.choices.traits]
none = {}
n-chl = { vcmax25 = { fixed = ["n_area"] }, alpha = { fixed = ["chl_ug"] } }
"""


def test_grid_expands_into_predictably_named_structures(demo_dir):
    comparison, _ = load(write(demo_dir, GRID))
    names = [s.name for s in comparison.structures]
    assert len(names) == 16 * 2 and len(set(names)) == 32
    assert names[0] == "g.leaf-none.traits-none" and names[1] == "g.leaf-none.traits-n-chl"
    assert "g.leaf-vcmax25_alpha.traits-n-chl" in names
    assert names[-1] == "g.leaf-vcmax25_jmax25_alpha_rd25.traits-n-chl"
    st = comparison.structure("g.leaf-vcmax25_alpha.traits-n-chl")
    assert st.params["vcmax25"].random == ("leaf",) and st.params["vcmax25"].fixed == ("n_area",)
    assert st.params["alpha"].fixed == ("chl_ug",) and st.params["jmax25"].random == ()
    assert st.params["rd25"].ratio_to == "vcmax25"
    text = describe(comparison)
    assert "structure 'g.leaf-vcmax25_alpha.traits-n-chl'  [grid 'g': leaf=vcmax25_alpha, traits=n-chl]" in text


def test_grid_conflict_and_name_clash(demo_dir):
    text = problems(demo_dir, GRID.replace("none = {}", 'none = { jmax25 = { ratio_to = "rd25" } }')
                    + '\n[[structure]]\nname = "g.leaf-none.traits-n-chl"\n')
    assert "grid 'g', traits=none, jmax25: ratio_to is set to" in text
    assert "the name is already used by another structure" in text


def test_design_errors_are_reported_for_every_structure(demo_dir):
    # a data problem in one structure must not hide a collinear term in the next
    text = problems(demo_dir, '[[structure]]\nname = "a"\nvcmax25 = { fixed = ["n_area"], slopes = { n_area = "site" } }\n'
                    + BASE + '\n[[structure]]\nname = "b"\nvcmax25 = { fixed = ["n_area", "n_twice"] }\n' + BASE,
                    groups=("taxon", "site"), traits=("n_area", "chl_ug", "sla_m2kg", "day_of_year", "n_twice"))
    assert "structure 'a', vcmax25.slopes.n_area: grouping 'site' has a single level" in text
    assert "structure 'b': vcmax25: fixed term 'n_twice' is perfectly collinear" in text


def test_the_varying_trait_problem_carries_its_code_and_column():
    # callers act on a problem's code and location, never on its words (leafcv.errors.Problem)
    import pickle

    import numpy as np

    from leafcv.data.reading import _constancy_problems
    from leafcv.errors import Problem

    (p,) = _constancy_problems(np.array(["L1", "L1", "L2"], dtype=object), np.array([1.0, 2.0, 3.0]), np.array([2, 3, 4]),
                               "wobbly", "trait")
    assert isinstance(p, Problem) and p.code == "varies-within-leaf" and p.location == "wobbly"
    assert "leaf 'L1'" in p and pickle.loads(pickle.dumps(p)).code == p.code
