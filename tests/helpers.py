"""Small helpers shared by tests."""
from __future__ import annotations

from dataclasses import replace

from leafcv.spec import Comparison, ParamSpec, Structure


def pooled_structure(comparison: Comparison) -> Structure:
    """The default demo's "pooled" baseline (every parameter shared by all leaves; Jmax25 and Rd25 as
    ratios to Vcmax25), built for a comparison that does not list it (the quick demo)."""
    base = comparison.structure("leaf-vcmax-alpha")
    params = {k: (ParamSpec() if k in ("vcmax25", "alpha") else v) for k, v in base.params.items()}
    return replace(base, name="pooled", params=params)
