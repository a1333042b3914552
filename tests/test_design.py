"""Structure + data -> Stan data (leafcv.design): coding of fixed terms, random terms, held-out leaves, ratios.

Snapshot: every structure's Stan data, for the demo (default and quick) and for every file in
comparisons/ on the quick demo's data, matches a snapshot taken before the design code was rebuilt
around typed terms (issue "A Python API over a typed model of terms"): a refactor of how structures
become Stan data must not change what the program receives. Each array is stored as its shape and a SHA-256 of its values
(floats rounded to 10 significant digits), so a mismatch names the structure and the key.

Regenerate only for an intended change of the program's data, and say why in the commit:
    python3 -m tests.test_design
"""
from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from leafcv.api import load
from leafcv.demo import write_demo
from leafcv.design import build_design, natural_values
from leafcv.inits import fit_leaves
from .helpers import pooled_structure

ROOT = Path(__file__).resolve().parents[1]
SNAPSHOT = ROOT / "tests" / "snapshots" / "stan_data.json"
FILES = sorted((ROOT / "comparisons").glob("*.toml"))


def test_treatment_coding_and_trait_centring(quick_demo):
    comparison, dataset, _ = quick_demo
    design = build_design(comparison.structure("traits-month-fixed"), dataset, comparison.data)
    d = design.stan_data
    labels = [c.label for c in design.coefficients]
    # treatment coding: first level in sorted order is the reference, one 0/1 column per other level
    assert labels == ["n_area", "campaign=2026-07", "campaign=2026-09", "chl_ug", "sla_m2kg"]
    camp = dataset.leaves["campaign"].to_numpy()
    np.testing.assert_array_equal(d["X"][:, 1], (camp == "2026-07").astype(float))
    # traits centred at the stated value and divided by the stated scale (comparison file)
    np.testing.assert_allclose(d["X"][:, 3], (dataset.leaves["chl_ug"].to_numpy() - 45.0) / 10)
    # columns map to their parameter: n_area and campaign to vcmax25 (1), chl and sla to alpha (3)
    np.testing.assert_array_equal(np.argmax(d["fixed_map"], axis=1), [0, 0, 0, 2, 2])
    assert d["ratio_j"] == 1 and d["ratio_rd"] == 1


def test_held_out_leaves_are_non_centred_and_out_of_the_likelihood(quick_demo):
    comparison, dataset, _ = quick_demo
    L = dataset.n_leaves
    train = np.ones(L, bool)
    train[[0, 5]] = False
    design = build_design(comparison.structure("traits-month-random"), dataset, comparison.data,
                          train_leaves=train, leaf_fits=fit_leaves(dataset))
    d = design.stan_data
    assert d["N"] == int(train[dataset.obs["leaf_index"]].sum())
    assert not set(np.asarray(d["leaf"]) - 1) & {0, 5}
    cen_leaves = set(design.cen_cells % L)
    assert not cen_leaves & {0, 5}
    # every (leaf, parameter) cell with a leaf effect is either centred or non-centred, never both
    cells = np.concatenate([design.cen_cells, design.nc_cells])
    assert len(cells) == len(set(cells)) == L * len(design.leaf_terms)
    # campaign random term on vcmax25 with 3 levels
    (g,) = design.group_terms
    assert g.grouping == "campaign" and len(g.levels) == 3 and d["Q"] == 3


def test_ratio_parameters_resolve_to_natural_values(quick_demo):
    comparison, dataset, _ = quick_demo
    design = build_design(pooled_structure(comparison), dataset, comparison.data)
    eta = np.zeros((dataset.n_leaves, 5))
    eta[:, 0] = np.log(50.0)
    eta[:, 1] = np.log(1.8)
    eta[:, 4] = np.log(0.015)
    nat = natural_values(design, eta)
    np.testing.assert_allclose(nat["jmax25"], 90.0)
    np.testing.assert_allclose(nat["rd25"], 0.75)
    np.testing.assert_allclose(nat["alpha"], 0.5)


def test_centring_override_is_respected(quick_demo):
    from dataclasses import replace

    comparison, dataset, _ = quick_demo
    s = comparison.structure("leaf-vcmax-alpha")
    params = dict(s.params)
    params["vcmax25"] = replace(params["vcmax25"], centring={"leaf": "noncentred"})
    design = build_design(replace(s, params=params), dataset, comparison.data, leaf_fits=fit_leaves(dataset))
    lt = {t.param: t for t in design.leaf_terms}
    assert lt["vcmax25"].centred_leaves == 0 and "chosen by the user" in lt["vcmax25"].reason


# ------------------------------------------------------------------------------------------
# every structure's Stan data against the snapshot

def _digest(value) -> dict:
    arr = np.asarray(value)
    if arr.dtype.kind in "fc":
        text = np.array2string(arr.astype(float).ravel(), precision=9, floatmode="maxprec_equal",
                               threshold=arr.size + 1, max_line_width=10**9, formatter={"float_kind": lambda x: f"{x:.9e}"})
    else:
        text = np.array2string(arr.astype(np.int64).ravel(), threshold=arr.size + 1, max_line_width=10**9)
    return {"shape": list(arr.shape), "sha256": hashlib.sha256(text.encode()).hexdigest()[:16]}


def _cases(folder: Path):
    """(case name, comparison file) for the default demo, the quick demo and every ready-made file."""
    default, quick = folder / "default", folder / "quick"
    yield "demo", write_demo(default, quick=False)
    yield "demo-quick", write_demo(quick, quick=True)
    for path in FILES:
        target = quick / path.name
        shutil.copy(path, target)
        yield f"comparisons/{path.name}", target


def snapshot(folder: Path) -> dict:
    out = {}
    fits = {}
    for case, path in _cases(folder):
        comparison, dataset = load(path)
        key = str(comparison.data.file)
        if key not in fits:
            fits[key] = fit_leaves(dataset)
        structures = list(comparison.structures)
        if case == "demo-quick":
            structures.append(_centred_campaigns(comparison.structure("traits-month-random")))
        for st in structures:
            design = build_design(st, dataset, comparison.data, leaf_fits=fits[key])
            out[f"{case} :: {st.name}"] = {k: _digest(v) for k, v in sorted(design.stan_data.items())}
    return out


def _centred_campaigns(st):
    """Campaign effects written centred by the user's choice: no ready-made file has centred group levels."""
    params = dict(st.params)
    params["vcmax25"] = replace(params["vcmax25"], centring={"campaign": "centred"})
    return replace(st, name=st.name + "-centred-campaigns", params=params)


@pytest.fixture(scope="module")
def current(tmp_path_factory):
    return snapshot(tmp_path_factory.mktemp("snapshot"))


def test_every_structures_stan_data_matches_the_snapshot(current):
    expected = json.loads(SNAPSHOT.read_text())
    assert sorted(current) == sorted(expected), "structures added or removed: regenerate deliberately"
    problems = []
    for name, keys in expected.items():
        got = current[name]
        for k in sorted(set(keys) | set(got)):
            if keys.get(k) != got.get(k):
                problems.append(f"{name}: {k}: expected {keys.get(k)}, got {got.get(k)}")
    assert not problems, "\n".join(problems[:40])


def test_the_snapshot_covers_every_kind_of_term(current):
    # the snapshot guards the refactor only if it holds every kind of term the program takes
    flat = {k: v for name, keys in current.items() for k, v in keys.items()}
    sizes = {}
    for name, keys in current.items():
        for k in ("K", "R", "Q", "Qc", "Mc", "Mn", "leaf_corr", "use_tpu", "S", "Rs", "Ms"):
            sizes.setdefault(k, set()).add(tuple(keys[k]["shape"]) + (keys[k]["sha256"],))
    assert len(current) >= 20
    assert all(len(v) >= 2 for v in sizes.values()), {k: len(v) for k, v in sizes.items()}
    assert "scale_mult" in flat


if __name__ == "__main__":
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        SNAPSHOT.parent.mkdir(parents=True, exist_ok=True)
        SNAPSHOT.write_text(json.dumps(snapshot(Path(tmp)), indent=1, sort_keys=True) + "\n")
    print(f"wrote {SNAPSHOT}")


def test_a_design_problem_carries_its_code(quick_demo):
    # group-mean centring: the between-taxon slope is a function of taxon, so with taxon's fixed levels
    # it is perfectly collinear (Enders & Tofighi 2007, from memory)
    from dataclasses import replace

    import pytest

    from leafcv.errors import SpecError
    from leafcv.spec import ParamSpec

    comparison, dataset, _ = quick_demo
    st = comparison.structure("leaf-vcmax-alpha")
    params = dict(st.params, vcmax25=ParamSpec(fixed=("taxon",), split=(("n_area", "taxon"),)))
    with pytest.raises(SpecError) as err:
        build_design(replace(st, params=params), dataset, comparison.data)
    (p,) = err.value.problems
    assert p.code == "collinear-term" and "n_area between taxon" in p and p.location.endswith("vcmax25")
