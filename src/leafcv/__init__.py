"""leafcv: compare hierarchical FvCB structures by how well they predict a new leaf.

The Python API (see `leafcv.api`): ``leafcv.load(path)`` or ``leafcv.from_frame(table, roles=...,
structures=..., folder=...)`` -> `Study` (``.fit``, ``.run``), ``leafcv.open_run(folder)`` -> `Run`
(``.ranking``, ``.pointwise``, ``.fit``, ``.predictions``, ``.predict``).
"""
__version__ = "0.1.0"

from .api import Fit, Run, Study, from_frame, load, open_run  # noqa: E402

__all__ = ["Fit", "Run", "Study", "from_frame", "load", "open_run", "__version__"]
