"""Every structure's Stan data, for the demo (default and quick) and for every file in comparisons/ on the
quick demo's data, matches a snapshot taken before the design code was rebuilt around typed terms
(issue "A Python API over a typed model of terms"): a refactor of how structures become Stan data must
not change what the program receives. Each array is stored as its shape and a SHA-256 of its values
(floats rounded to 10 significant digits), so a mismatch names the structure and the key.

Regenerate only for an intended change of the program's data, and say why in the commit:
    python3 -m tests.test_stan_data_snapshot
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
from leafcv.design import build_design
from leafcv.inits import fit_leaves

ROOT = Path(__file__).resolve().parents[1]
SNAPSHOT = ROOT / "tests" / "snapshots" / "stan_data.json"
FILES = sorted((ROOT / "comparisons").glob("*.toml"))


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
        for k in ("K", "R", "Q", "Qc", "Mc", "Mn", "leaf_corr", "use_tpu", "S"):
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
