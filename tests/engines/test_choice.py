"""Choosing the engine (leafcv.engines.choice) without sampling: names, task-key identity, and the one
clear message, exit code 3 and no traceback when CmdStan is chosen but cannot run here (DESIGN.md
"Engines" and "Interfaces": exit code 3 for an engine failure)."""
from __future__ import annotations

import sys

import pytest

from leafcv.engines.choice import (
    EngineUnavailable, check_engine, engine_identity, engine_name, make_engine,
)


def test_names() -> None:
    assert engine_name(None) == "pystan"
    assert engine_name("cmdstan") == "cmdstan"
    with pytest.raises(ValueError, match="pystan, cmdstan"):
        engine_name("stan")
    assert make_engine("pystan").name == "pystan"
    fake = type("Fake", (), {"name": "fake"})()
    assert make_engine(fake) is fake and engine_name(fake) == "fake"


def test_pystan_keys_carry_no_engine_identity() -> None:
    # keys of the default engine are those of runs made before engines could be chosen
    assert engine_identity(None) == "" and engine_identity("pystan") == ""


def test_without_cmdstanpy(monkeypatch) -> None:
    monkeypatch.setitem(sys.modules, "cmdstanpy", None)         # import cmdstanpy fails
    with pytest.raises(EngineUnavailable) as info:
        check_engine("cmdstan")
    text = str(info.value)
    assert 'pip install "leafcv[cmdstan]"' in text and "install_cmdstan" in text and "CMDSTAN=" in text


def test_without_cmdstan(monkeypatch, tmp_path) -> None:
    pytest.importorskip("cmdstanpy")
    monkeypatch.setenv("CMDSTAN", str(tmp_path / "no-such-folder"))
    with pytest.raises(EngineUnavailable) as info:
        check_engine("cmdstan")
    text = str(info.value)
    assert str(tmp_path / "no-such-folder") in text and "python -m cmdstanpy.install_cmdstan" in text


@pytest.mark.parametrize("command", ["fit", "compare"])
def test_cli_says_what_to_do(monkeypatch, tmp_path, capsys, quick_demo, command) -> None:
    from leafcv.cli import EXIT_ENGINE, main

    monkeypatch.setitem(sys.modules, "cmdstanpy", None)
    comparison = quick_demo[0]
    args = [command, str(comparison.path), "--engine", "cmdstan"]
    args += ["--structure", comparison.structures[0].name] if command == "fit" else ["--out", str(tmp_path / "run")]
    assert main(args) == EXIT_ENGINE
    err = capsys.readouterr().err
    assert "Traceback" not in err and "details saved" not in err
    assert err.count("\n") == 1 and 'pip install "leafcv[cmdstan]"' in err, err
    assert not (tmp_path / "run" / "tasks").exists()


def test_comparison_file_engine_is_used(monkeypatch, tmp_path, capsys, quick_demo) -> None:
    # [engine] name = "cmdstan" in the file, no --engine: the file's choice is the one checked
    from leafcv.cli import EXIT_ENGINE, main

    monkeypatch.setitem(sys.modules, "cmdstanpy", None)
    path = quick_demo[0].path
    text = path.read_text()
    assert "format = 1" in text
    copy = path.parent / "with-engine.toml"
    copy.write_text(text.replace("format = 1", "format = 2", 1) + '\n[engine]\nname = "cmdstan"\n')
    assert main(["fit", str(copy), "--structure", quick_demo[0].structures[0].name]) == EXIT_ENGINE
    assert "leafcv[cmdstan]" in capsys.readouterr().err
