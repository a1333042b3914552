"""Convergence grades of a fit (leafcv.diagnostics): converged, marginal or failed from R-hat, ESS and
divergences, and the worst grade of several fits."""
from __future__ import annotations

import pytest

from leafcv.diagnostics import Diagnostics, worst_grade


@pytest.mark.parametrize("kw, grade", [
    ({}, "converged"),
    ({"max_rhat": 1.03, "problems": ("R-hat",)}, "marginal"),
    ({"divergences": 3, "problems": ("div",)}, "marginal"),
    ({"divergences": 6, "problems": ("div",)}, "failed"),
    ({"max_rhat": 1.06, "problems": ("R-hat",)}, "failed"),
    ({"min_ess_bulk": 90.0, "problems": ("ESS",)}, "failed"),
])
def test_grades(kw, grade):
    base = dict(max_rhat=1.005, min_ess_bulk=500.0, min_ess_tail=500.0, divergences=0, treedepth_hits=0,
                min_ebfmi=0.9, n_draws=500, chains=4, worst="", problems=())
    d = Diagnostics(**{**base, **kw})
    assert d.grade == grade
    assert worst_grade(["converged", grade, "converged"]) == grade
