"""Atomic writes of the report's files: a reader sees the old file or the new one, never a part.

Tests: tests/report/test_report_page.py, tests/report/test_report_figures.py.
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path


def write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same folder, then rename it.

    The file gets the mode an ordinary ``open`` gives (``0o666`` less the umask).
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_text(path: Path, text: str) -> None:
    write_bytes(path, text.encode("utf-8"))
