"""Files written so that a reader (or a run killed half-way) sees the old file or the new one, never a part."""
from __future__ import annotations

import os
import tempfile
from pathlib import Path


def umask() -> int:
    """The process umask (read by setting it and restoring it at once)."""
    old = os.umask(0)
    os.umask(old)
    return old


def write_atomic(path: Path, data: str | bytes) -> None:
    """Write ``data`` (text as UTF-8, or bytes) to ``path`` through a temporary file in the same folder,
    flushed to disk, then renamed over ``path``.

    The file gets the mode an ordinary ``open`` would give it, ``0o666`` less the umask (``mkstemp``
    creates its file ``0o600``).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data.encode() if isinstance(data, str) else data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~umask())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
