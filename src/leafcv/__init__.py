"""leafcv: compare hierarchical FvCB structures by how well they predict a new leaf.

The Python API (see `leafcv.api`): ``leafcv.load(path)`` -> `Study` (``.fit``, ``.run``),
``leafcv.open_run(folder)`` -> `Run` (``.ranking``, ``.pointwise``, ``.fit``).
"""
__version__ = "0.1.0"

from .api import Fit, Run, Study, load, open_run  # noqa: E402

__all__ = ["Fit", "Run", "Study", "load", "open_run", "__version__"]
