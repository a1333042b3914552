"""Files written so that a reader (or a run killed half-way) sees the old file or the new one, never a part.

Tests: tests/test_compare.py, tests/batch/test_store.py.
"""
from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path


def umask() -> int:
    """The process umask (read by setting it and restoring it at once)."""
    old = os.umask(0)
    os.umask(old)
    return old


@contextlib.contextmanager
def replacing(path: Path):
    """Yield a temporary path in ``path``'s folder to write to; on success it is flushed to disk, given
    the mode an ordinary ``open`` would give (``0o666`` less the umask; ``mkstemp`` makes ``0o600``) and
    renamed over ``path``; on any failure it is removed and ``path`` is left as it was."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    os.close(fd)
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~umask())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_atomic(path: Path, data: str | bytes) -> None:
    """Write ``data`` (text as UTF-8, or bytes) to ``path`` so that a reader sees the old file or the
    new one, never a part (`replacing`)."""
    with replacing(path) as tmp, open(tmp, "wb") as fh:
        fh.write(data.encode() if isinstance(data, str) else data)
