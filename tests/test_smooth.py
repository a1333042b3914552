"""The smooth term (leafcv.smooth): its basis checked against textbook properties of B-splines and of the
second-order difference penalty, its place in the design and in predictions for new leaves."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.interpolate import BSpline

from leafcv.design import build_design, smooth_values
from leafcv.smooth import SMOOTH_BASIS, SplineBasis, SmoothTrend, _bspline


def test_the_b_spline_basis_is_scipys_and_sums_to_one():
    # cubic B-splines on any knots inside their base interval sum to 1 (de Boor 1978, "A Practical Guide
    # to Splines", ch. IX, partition of unity); each column equals SciPy's own basis element
    x = np.linspace(100, 300, 57)
    basis = SplineBasis.fit(x, 200.0, 30.0)
    B = _bspline(x, basis.knots, basis.lo, basis.hi)
    np.testing.assert_allclose(B.sum(axis=1), 1.0, atol=1e-12)
    for j in (0, 4, SMOOTH_BASIS - 1):
        element = BSpline.basis_element(basis.knots[j:j + 5], extrapolate=False)
        inside = (x >= basis.knots[j]) & (x < basis.knots[j + 4])
        np.testing.assert_allclose(B[inside, j], element(x[inside]), atol=1e-12)


def test_the_penalty_leaves_straight_lines_free_and_the_wiggle_has_the_rest():
    # a second-order difference penalty is zero on constant and linear coefficient sequences (Eilers & Marx
    # 1996, section 3), which on equally spaced knots give the constant and linear functions: the mixed-model
    # wiggle has SMOOTH_BASIS - 2 columns, and with the intercept and the linear column it spans what the
    # full B-spline basis spans at the data
    x = np.sort(np.random.default_rng(1).uniform(120, 270, 40))
    basis = SplineBasis.fit(x, 190.0, 30.0)
    assert basis.size == SMOOTH_BASIS - 2
    d = np.diff(np.eye(SMOOTH_BASIS), n=2, axis=0)
    line = 3.0 + 0.5 * np.arange(SMOOTH_BASIS)
    np.testing.assert_allclose(d @ line, 0.0, atol=1e-12)
    B = _bspline(x, basis.knots, basis.lo, basis.hi)
    np.testing.assert_allclose(B @ line, 3.0 + 0.5 * (x - basis.lo) / (basis.knots[4] - basis.knots[3]) + 0.5 * 1,
                               atol=1e-9)
    # a linear coefficient sequence is a straight line in x: sum_k k B_k(x) = (x - t_0) / h - 2 from the
    # Greville abscissae t_0 + (k + 2) h of cubic B-splines on knots of step h (de Boor 1978, ch. XI)
    Z = basis.columns(x)
    full = np.column_stack([np.ones_like(x), (x - 190.0) / 30.0, Z])
    assert np.linalg.matrix_rank(full, tol=1e-8) == SMOOTH_BASIS
    assert np.linalg.matrix_rank(np.column_stack([full, B]), tol=1e-8) == SMOOTH_BASIS


def test_the_wiggle_never_trades_off_with_the_intercept_or_the_slope():
    x = np.random.default_rng(2).uniform(0, 10, 30)
    basis = SplineBasis.fit(x, 5.0, 2.0)
    Z = basis.columns(x)
    null = np.column_stack([np.ones_like(x), (x - 5.0) / 2.0])
    np.testing.assert_allclose(null.T @ Z, 0.0, atol=1e-9)                 # orthogonal over the leaves
    np.testing.assert_allclose(np.sqrt(np.mean(np.sum(Z ** 2, axis=1))), 1.0)   # tau is its RMS over them


def test_outside_the_observed_range_the_bend_is_held_at_the_nearest_end():
    x = np.linspace(0, 10, 25)
    basis = SplineBasis.fit(x, 5.0, 1.0)
    np.testing.assert_allclose(basis.columns(np.array([-4.0, 15.0])), basis.columns(np.array([0.0, 10.0])))
    np.testing.assert_array_equal(basis.outside(np.array([-4.0, 0.0, 10.0, 15.0])), [True, False, False, True])


def test_a_smooth_structure_places_one_linear_column_and_its_block(quick_demo):
    comparison, dataset, _ = quick_demo
    st = comparison.structure("traits-season-smooth")
    design = build_design(st, dataset, comparison.data)
    (smooth,) = design.smooth_terms
    assert (smooth.param, smooth.covariate) == ("vcmax25", "day_of_year")
    linear = [c for c in design.coefficients if c.kind == "smooth"]
    assert [c.term for c in linear] == ["day_of_year"] and "linear trend of log vcmax25" in linear[0].meaning
    data = design.stan_data
    assert (data["Rs"], data["Ms"]) == (1, SMOOTH_BASIS - 2) and data["Zs"].shape == (dataset.n_leaves, SMOOTH_BASIS - 2)
    assert data["sm_par"] == [1] and data["sm_term"] == [1] * (SMOOTH_BASIS - 2)
    assert any("second-order difference penalty" in line for line in design.prior_lines)
    # the wiggle enters the population mean of each leaf as Zs (tau z) on its parameter only
    rng = np.random.default_rng(3)
    draws = {"b0": np.zeros((2, 5)), "tau_s": np.array([[0.3], [0.1]]), "z_s": rng.normal(size=(2, data["Ms"]))}
    got = smooth_values(design, draws)
    np.testing.assert_allclose(got[:, :, 0], (draws["tau_s"] * draws["z_s"]) @ data["Zs"].T)
    np.testing.assert_array_equal(got[:, :, 1:], 0.0)


def test_a_smooth_over_too_few_values_is_refused_with_its_code(quick_demo):
    from dataclasses import replace

    from leafcv.errors import SpecError
    from leafcv.spec import ParamSpec

    comparison, dataset, _ = quick_demo
    st = comparison.structure("traits-season-smooth")
    few = dataset.leaves.copy()
    few["day_of_year"] = np.resize([130.0, 200.0, 250.0], len(few))
    params = dict(st.params)
    params["vcmax25"] = ParamSpec(random=("leaf",), smooth=("day_of_year",))
    with pytest.raises(SpecError) as err:
        build_design(replace(st, params=params), replace(dataset, leaves=few), comparison.data)
    assert [p.code for p in err.value.problems] == ["too-few-values"]
    assert "at least 6 distinct values" in str(err.value.problems[0])


def test_the_term_needs_its_covariate():
    assert SmoothTrend("alpha", "canopy_height").needs() == {"traits": {"canopy_height"}}
