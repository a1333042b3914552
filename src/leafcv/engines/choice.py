"""Choosing an engine by name: ``pystan`` (the default) or ``cmdstan``.

An engine is named on the command line (``--engine``), in the comparison file (``[engine] name``) or
in the API (``engine=``); a name travels with a batch's tasks to every worker, which builds its own
engine from it. An engine object (tests' fakes) may be passed in place of a name.
"""
from __future__ import annotations

from typing import Any

from .cmdstan_install import EngineUnavailable, cmdstan_folder, cmdstan_label  # noqa: F401 (re-exported)

ENGINE_NAMES: tuple[str, ...] = ("pystan", "cmdstan")
DEFAULT_ENGINE = "pystan"


def engine_name(engine: Any) -> str:
    """The name of ``engine`` (a name, an engine object, or None for the default)."""
    if engine is None:
        return DEFAULT_ENGINE
    if isinstance(engine, str):
        if engine not in ENGINE_NAMES:
            raise ValueError(f"unknown engine {engine!r}: use one of {', '.join(ENGINE_NAMES)}")
        return engine
    return str(getattr(engine, "name", type(engine).__name__))


def check_engine(engine: Any) -> str:
    """The engine's name, having checked that a named engine can run here (EngineUnavailable if not)."""
    name = engine_name(engine)
    if isinstance(engine, str) and name == "cmdstan":
        cmdstan_folder()
    return name


def engine_identity(engine: Any) -> str:
    """What a task key records of the engine: "" for PyStan (keys of the default engine are unchanged),
    else its name and Stan version, so a run folder never mixes draws of two engines."""
    name = engine_name(engine)
    if name == DEFAULT_ENGINE:
        return ""
    return f"{name} {engine_version(engine)}".strip()


def engine_version(engine: Any) -> str:
    """The Stan version an engine runs ("" when unknown)."""
    name = engine_name(engine)
    if name == "pystan":
        try:
            from importlib.metadata import version

            import httpstan
        except ImportError:       # not installed: the version is unknown
            return ""
        from pathlib import Path

        stan = _stan_version(Path(httpstan.__file__).parent / "include" / "stan" / "version.hpp")
        return f"Stan {stan} (pystan {version('pystan')}, httpstan {version('httpstan')})"
    if name == "cmdstan":
        return cmdstan_label()
    return str(getattr(engine, "version", ""))


def _stan_version(header) -> str:
    """"MAJOR.MINOR.PATCH" from Stan's version.hpp."""
    import re

    found = dict(re.findall(r"#define STAN_(MAJOR|MINOR|PATCH) (\d+)", header.read_text()))
    return ".".join(found.get(k, "?") for k in ("MAJOR", "MINOR", "PATCH"))


def make_engine(engine: Any, *, chains_at_once: int | None = None, compile_log: str | None = None, log=None):
    """An engine object: ``engine`` itself when it is one, else a new engine of that name."""
    if engine is not None and not isinstance(engine, str):
        return engine
    name = engine_name(engine)
    if name == "cmdstan":
        from .cmdstan_engine import CmdStanEngine

        return CmdStanEngine(log=log, chains_at_once=chains_at_once, compile_log=compile_log)
    from .pystan_engine import PyStanEngine

    return PyStanEngine(log=log, chains_at_once=chains_at_once, compile_log=compile_log)
