"""The command line calls only the Python API (`leafcv.api`): a look at its imports, and its commands
against what the API gives (fake engine, tests/fakes.py; no sampler)."""
from __future__ import annotations

import ast
from pathlib import Path

import numpy as np

from .fakes import FakeEngine

CLI = Path(__file__).resolve().parents[1] / "src" / "leafcv" / "cli.py"


def _leafcv_imports() -> dict[str, set[str]]:
    """Module of leafcv -> the names the CLI takes from it (function-level imports included)."""
    out: dict[str, set[str]] = {}
    for node in ast.walk(ast.parse(CLI.read_text())):
        if isinstance(node, ast.ImportFrom) and node.level:
            out.setdefault(node.module or "", set()).update(a.name for a in node.names)
        elif isinstance(node, ast.Import):
            for a in node.names:
                out.setdefault(a.name, set())
    return out


def test_the_cli_takes_from_leafcv_only_the_api_its_errors_and_its_choices():
    imports = _leafcv_imports()
    leafcv = {m: names for m, names in imports.items() if m in ("api", "engines.choice", "errors", "spec")
              or m.startswith("leafcv")}
    assert set(imports) - {"argparse", "logging", "signal", "sys", "tempfile", "time", "traceback", "__future__",
                           "pathlib"} == set(leafcv)
    assert leafcv["engines.choice"] == {"ENGINE_NAMES", "EngineUnavailable"}
    assert leafcv["spec"] == {"CV_METHODS"}
    assert leafcv["errors"] == {"EngineError", "UserInputError"}
    assert "pandas" not in imports


def _fake_fits(monkeypatch):
    """Make `Study.fit` use the fake engine, whatever the command line asks."""
    import leafcv.api as api

    original = api.Study.fit
    monkeypatch.setattr(api.Study, "fit", lambda self, structure, engine=None, progress=None:
                        original(self, structure, engine=FakeEngine(), progress=progress))


def test_fit_save_writes_the_fit_the_api_gives(quick_demo, tmp_path, monkeypatch, capsys):
    from leafcv.api import load
    from leafcv.cli import main
    from leafcv.cv.arviz_bridge import open_fit

    _fake_fits(monkeypatch)
    comparison = quick_demo[0]
    name = comparison.structures[0].name
    path = tmp_path / "fit.nc"
    assert main(["fit", str(comparison.path), "--structure", name, "--save", str(path)]) == 0
    assert f"fit written to {path}" in capsys.readouterr().out
    saved = open_fit(path)
    study = load(comparison.path)
    expected = study.fit(name).to_datatree()            # the same seed: the same fake draws
    for var in ("b0", "leaf_value"):
        np.testing.assert_allclose(saved.posterior[var].values, expected.posterior[var].values)
    assert saved.posterior.attrs["structure"] == name and "log_likelihood" not in saved.children
    again = study.fit(name).save(tmp_path / "again.nc")
    np.testing.assert_allclose(open_fit(again).posterior["b0"].values, saved.posterior["b0"].values)


def test_check_prints_the_studys_own_summary(quick_demo, capsys):
    from leafcv.api import load
    from leafcv.cli import main

    comparison, dataset, _ = quick_demo
    assert main(["check", str(comparison.path)]) == 0
    out = capsys.readouterr().out
    study = load(comparison.path)
    assert out == "\n".join([f"{comparison.path}: OK", *study.data_summary(), study.describe()]) + "\n"
    # the summary's counts, against the data file read here with pandas
    import pandas as pd

    data = pd.read_csv(comparison.data.file)
    leaf = comparison.data.columns["leaf"]
    curve = comparison.data.columns["curve"]
    assert f"  {data[leaf].nunique()} leaves, {data.groupby([leaf, curve]).ngroups} curves" in out
    assert f"{len(data)} points" in out
