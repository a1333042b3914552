"""Finding the CmdStan installation cmdstanpy will use, and its version, for the engine choice
(`leafcv.engines.choice`) and the CmdStan engine (`leafcv.engines.cmdstan_engine`); imports neither.
Tests: tests/engines/test_choice.py.
"""
from __future__ import annotations

import os

from ..errors import EngineError


class EngineUnavailable(EngineError):
    """The chosen engine is not installed here; the message says how to install it."""


def cmdstan_folder() -> str:
    """The CmdStan folder cmdstanpy will use (env CMDSTAN, else cmdstanpy's own installs), or
    EngineUnavailable saying how to get one."""
    try:
        import cmdstanpy
    except ImportError:
        raise EngineUnavailable(
            "the cmdstan engine needs cmdstanpy, which is not installed: pip install \"leafcv[cmdstan]\", then "
            "install CmdStan with `python -m cmdstanpy.install_cmdstan` (or set CMDSTAN=/path/to/cmdstan), "
            "or leave out --engine cmdstan to use PyStan") from None
    try:
        return str(cmdstanpy.cmdstan_path())
    except (ValueError, RuntimeError) as exc:
        where = (f"CMDSTAN={os.environ['CMDSTAN']} is not a usable CmdStan folder ({exc}); "
                 if os.environ.get("CMDSTAN") else "no CmdStan installation was found; ")
        raise EngineUnavailable(
            "the cmdstan engine needs CmdStan: " + where + "install it with `python -m cmdstanpy.install_cmdstan`, "
            "or set CMDSTAN=/path/to/cmdstan, or leave out --engine cmdstan to use PyStan") from None


def cmdstan_version() -> str:
    """MAJOR.MINOR.PATCH from the CmdStan folder's makefile (cmdstanpy's own reading keeps MAJOR.MINOR)."""
    import re
    from pathlib import Path

    import cmdstanpy

    try:
        text = (Path(cmdstan_folder()) / "makefile").read_text()
        found = re.search(r"(?m)^CMDSTAN_VERSION := (\S+)", text)
        if found:
            return found.group(1)
    except OSError:
        pass
    version = cmdstanpy.cmdstan_version()
    return ".".join(map(str, version)) if version else "unknown"


def cmdstan_label() -> str:
    """"CmdStan MAJOR.MINOR.PATCH" of the installation found (EngineUnavailable when there is none)."""
    cmdstan_folder()
    return f"CmdStan {cmdstan_version()}"
