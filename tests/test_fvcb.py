"""Tests of the NumPy FvCB model against published constants, closed forms and SciPy.

Sources (see /work/shared/REFERENCES.md):
- Bernacchi et al. 2001, Plant Cell Environ 24:253-259: Kc, Ko, Gamma* at 25 C and the
  activation energies of Kc, Ko, Gamma*, Vcmax, Rd (all [S] in REFERENCES.md).
- Bernacchi et al. 2003, Plant Cell Environ 26:1419-1430: Jmax activation energy ([S]).
- Leuning 2002, Plant Cell Environ 25:1205-1210: Hd and dS of Vcmax and Jmax ([S]).
- Kattge & Knorr 2007, Plant Cell Environ 30:1176-1190: peaked parameters ([S]).
- Medlyn et al. 2002, Plant Cell Environ 25:1167-1179: peaked Arrhenius form and T_opt.
- Bernacchi et al. 2001 "scaling constant" c values: [M] (recalled from memory in REFERENCES.md).
The worked example and the peaked-table f(30 C) and T_opt were computed in REFERENCES.md from
those [S] constants with the published equations; they are not themselves from a paper.
"""
from __future__ import annotations

from decimal import Decimal, getcontext

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from leafcv import fvcb

SEED = 20240611


def rng() -> np.random.Generator:
    return np.random.default_rng(SEED)


def assert_printed(value, printed: str) -> None:
    """Value rounds to the printed decimal string: |value - printed| <= half a unit in its last place."""
    decimals = len(printed.split(".")[1]) if "." in printed else 0
    tol = 0.5 * 10.0 ** (-decimals) * (1 + 1e-9)
    assert abs(float(value) - float(printed)) <= tol, f"{float(value)!r} does not round to {printed}"


# --------------------------------------------------------------------------------------
# Worked example, REFERENCES.md: normalised Arrhenius, Bernacchi 2001/2003 dHa, R = 8.314,
# O = 210, alpha = 0.3, theta = 0.7, Q = 1500, Vcmax25 = 60, Jmax25 = 100, Rd25 = 1, no TPU.
# Values computed in REFERENCES.md from [S] constants; each must round to the printed digits.
# --------------------------------------------------------------------------------------
EXAMPLE = dict(q=1500.0, vcmax25=60.0, jmax25=100.0, alpha=0.3, theta=0.7, rd25=1.0)

WORKED = {
    25.0: {
        "km": "710.3", "vcmax": "60", "jmax": "100", "rd": "1", "j": "92.77",
        "wc200": "10.36", "wj200": "12.77", "a200": "9.364",
        "wc800": "30.08", "wj800": "19.83", "wj800_45": "17.35", "a800": "18.83", "a800_45": "16.35",
        "cross": "308.2", "a_gamma": "-1",
    },
    30.0: {
        "km": "1094", "vcmax": "92.67", "jmax": "133.6", "rd": "1.362", "j": "120.4",
        "wc200": "10.39", "wj200": "14.08", "a200": "9.027",
        "wc800": "36.46", "wj800": "24.64", "wj800_45": "21.47", "a800": "23.28", "a800_45": "20.11",
        "cross": "363.3", "a_gamma": "-1.3616",
    },
}


def _rates(ci, t, electron="4-8"):
    return fvcb.limiting_rates(ci, EXAMPLE["q"], t, EXAMPLE["vcmax25"], EXAMPLE["jmax25"], EXAMPLE["alpha"],
                               EXAMPLE["theta"], EXAMPLE["rd25"], electron=electron)


@pytest.mark.parametrize("t", [25.0, 30.0])
def test_worked_example_scaled_parameters(t):
    # REFERENCES.md worked example rows Km and Vcmax, Jmax, Rd, J;
    # Bernacchi et al. 2001 (Kc, Ko, Vcmax, Rd dHa) and 2003 (Jmax dHa) [S].
    row = WORKED[t]
    r = _rates(200.0, t)
    assert_printed(r.km, row["km"])
    assert_printed(r.vcmax, row["vcmax"])
    assert_printed(r.jmax, row["jmax"])
    assert_printed(r.rd, row["rd"])
    assert_printed(r.j, row["j"])
    kc, ko, _ = fvcb.rubisco_constants(t)
    assert_printed(fvcb.michaelis_km(kc, ko, 210.0), row["km"])


@pytest.mark.parametrize("t", [25.0, 30.0])
def test_worked_example_ci200(t):
    # REFERENCES.md worked example, Ci 200 rows (Wc, Wj (4, 8), A); Bernacchi et al. 2001/2003 [S].
    row = WORKED[t]
    r = _rates(200.0, t)
    assert_printed(r.wc, row["wc200"])
    assert_printed(r.wj, row["wj200"])
    assert_printed(r.a, row["a200"])
    assert_printed(fvcb.net_assimilation(200.0, t_leaf_c=t, **EXAMPLE), row["a200"])


@pytest.mark.parametrize("t", [25.0, 30.0])
def test_worked_example_ci800(t):
    # REFERENCES.md worked example, Ci 800 rows, both electron requirements; Bernacchi et al. 2001/2003 [S].
    row = WORKED[t]
    r48 = _rates(800.0, t, "4-8")
    r45 = _rates(800.0, t, "4.5-10.5")
    assert_printed(r48.wc, row["wc800"])
    assert_printed(r48.wj, row["wj800"])
    assert_printed(r45.wj, row["wj800_45"])
    assert_printed(r48.a, row["a800"])
    assert_printed(r45.a, row["a800_45"])
    assert_printed(fvcb.net_assimilation(800.0, t_leaf_c=t, electron="4.5-10.5", **EXAMPLE), row["a800_45"])


@pytest.mark.parametrize("t", [25.0, 30.0])
def test_worked_example_crossover_and_gamma_star(t):
    # REFERENCES.md worked example rows "crossover Ci" and "A at Ci = Gamma*"; analytic facts 1 and 5.
    row = WORKED[t]
    r = _rates(200.0, t)
    ci_x = fvcb.crossover_ci(r.vcmax, r.j, r.km, r.gamma_star)
    assert_printed(ci_x, row["cross"])
    assert_printed(fvcb.net_assimilation(r.gamma_star, t_leaf_c=t, **EXAMPLE), row["a_gamma"])


def test_rubisco_set_values_at_25c():
    # Bernacchi et al. 2001 Ci-basis constants [S]: Kc 404.9 umol/mol, Ko 278.4 mmol/mol, Gamma* 42.75 umol/mol.
    kc, ko, gs = fvcb.rubisco_constants(25.0)
    np.testing.assert_allclose([kc, ko, gs], [404.9, 278.4, 42.75], rtol=1e-14)
    s = fvcb.RUBISCO_SETS["bernacchi2001"]
    assert (s.ha_kc, s.ha_ko, s.ha_gamma) == (79.43, 36.38, 37.83)
    assert (fvcb.VCMAX_HA, fvcb.JMAX_HA, fvcb.RD_HA) == (65.33, 43.54, 46.39)


def test_normalised_form_differs_from_scaling_constant_form_by_a_constant():
    # Bernacchi et al. 2001: exp(c - dHa / (R T_K)) with c = 38.05 (Kc), 19.02 (Gamma*) [M].
    # Both forms share dHa, so their ratio must not depend on temperature, and REFERENCES.md says
    # they differ by about 0.3-0.6 % at 25 C (the c form gives Kc 406.1, Gamma* 42.89).
    t = np.linspace(10.0, 40.0, 7)  # includes 25 C
    kc, _, gs = fvcb.rubisco_constants(t)
    tk = t + 273.15
    kc_c = np.exp(38.05 - 79.43 / (fvcb.R_GAS * tk))
    gs_c = np.exp(19.02 - 37.83 / (fvcb.R_GAS * tk))
    for ours, c_form, c_at_25 in ((kc, kc_c, "406.1"), (gs, gs_c, "42.89")):
        ratio = c_form / ours
        np.testing.assert_allclose(ratio, ratio[0], rtol=1e-12)
        assert 1.002 < ratio[0] < 1.007
        assert_printed(c_form[t == 25.0][0], c_at_25)


# --------------------------------------------------------------------------------------
# Analytic facts (REFERENCES.md "Analytic facts", exact consequences of the FvCB equations)
# --------------------------------------------------------------------------------------
def _random_leaves(g: np.random.Generator, n: int) -> dict[str, np.ndarray]:
    # Magnitudes from REFERENCES.md "Typical magnitudes" (Wullschleger 1993 [M], Collatz et al. 1991 [M]).
    vcmax25 = g.uniform(10.0, 150.0, n)
    return dict(
        q=g.uniform(0.0, 2000.0, n),
        t_leaf_c=g.uniform(10.0, 40.0, n),
        vcmax25=vcmax25,
        jmax25=vcmax25 * g.uniform(1.2, 2.5, n),
        alpha=g.uniform(0.2, 0.4, n),
        theta=g.uniform(0.0, 1.0, n),
        rd25=vcmax25 * g.uniform(0.005, 0.03, n),
    )


@pytest.mark.parametrize("transition", ["min", "smooth"])
@pytest.mark.parametrize("electron", ["4-8", "4.5-10.5"])
@pytest.mark.parametrize("tpu", [False, True])
def test_fact1_a_is_minus_rd_at_gamma_star(transition, electron, tpu):
    # REFERENCES.md analytic fact 1: at Ci = Gamma*, Wc = Wj = 0 and A = -Rd.
    g = rng()
    p = _random_leaves(g, 200)
    _, _, gs = fvcb.rubisco_constants(p["t_leaf_c"])
    tpu25 = p["vcmax25"] * 0.167 if tpu else None  # Harley et al. 1992 TPU/Vcmax ratio [S]
    r = fvcb.limiting_rates(gs, **p, tpu25=tpu25, electron=electron, transition=transition)
    np.testing.assert_allclose(r.wc, 0.0, atol=1e-12)
    np.testing.assert_allclose(r.wj, 0.0, atol=1e-12)
    np.testing.assert_allclose(r.a, -r.rd, rtol=1e-12, atol=1e-12)


def _decimal_smaller_root(b: float, c: float, theta: float) -> float:
    """Smaller root of theta x^2 - b x + c in 60-digit decimal arithmetic (textbook formula)."""
    getcontext().prec = 60
    b, c, theta = Decimal(b), Decimal(c), Decimal(theta)
    if theta == 0:
        return float(c / b)
    return float((b - (b * b - 4 * theta * c).sqrt()) / (2 * theta))


def test_fact2_theta_zero_limit_is_exact_and_stable():
    # REFERENCES.md analytic fact 2: theta -> 0 gives J = alpha Q Jmax / (alpha Q + Jmax);
    # at alpha Q = 450, Jmax = 100 the limit is 81.818... (the textbook root gives 81.798 at 1e-12).
    aq, jmax = 450.0, 100.0
    limit = aq * jmax / (aq + jmax)
    assert fvcb.electron_transport(0.3, 1500.0, jmax, 0.0) == pytest.approx(limit, rel=1e-15)
    np.testing.assert_allclose(fvcb.electron_transport(0.3, 1500.0, jmax, 1e-12), limit, rtol=1e-10)
    # Against 60-digit arithmetic near 0 and near 1 (closed form, high precision).
    for theta in (1e-12, 1e-8, 1e-4, 0.5, 0.999999, 1.0 - 1e-12):
        exact = _decimal_smaller_root(aq + jmax, aq * jmax, theta)
        np.testing.assert_allclose(fvcb.electron_transport(0.3, 1500.0, jmax, theta), exact, rtol=1e-12)


def test_fact3_theta_one_gives_minimum():
    # REFERENCES.md analytic fact 3: theta = 1 gives J = min(alpha Q, Jmax).
    g = rng()
    alpha, q, jmax = g.uniform(0.2, 0.4, 500), g.uniform(0.0, 2500.0, 500), g.uniform(20.0, 300.0, 500)
    np.testing.assert_allclose(fvcb.electron_transport(alpha, q, jmax, 1.0), np.minimum(alpha * q, jmax), rtol=1e-12)


@pytest.mark.parametrize("electron, per_co2", [("4-8", 4.0), ("4.5-10.5", 4.5)])
def test_fact4_high_ci_limits(electron, per_co2):
    # REFERENCES.md analytic fact 4: Ci -> inf gives Wc -> Vcmax and Wj -> J/4 (J/4.5 in the 4.5/10.5 variant).
    g = rng()
    vcmax, j = g.uniform(10.0, 150.0, 50), g.uniform(20.0, 300.0, 50)
    kc, ko, gs = fvcb.rubisco_constants(g.uniform(10.0, 40.0, 50))
    ci = 1e12
    np.testing.assert_allclose(fvcb.rubisco_limited(vcmax, ci, kc, ko, gs), vcmax, rtol=1e-8)
    np.testing.assert_allclose(fvcb.electron_limited(j, ci, gs, electron), j / per_co2, rtol=1e-8)


def test_fact5_crossover_formula_4_8():
    # REFERENCES.md analytic fact 5: Ci = (J Km - 8 Vcmax Gamma*) / (4 Vcmax - J), Km = Kc (1 + O/Ko).
    g = rng()
    vcmax, j = g.uniform(10.0, 150.0, 300), g.uniform(20.0, 300.0, 300)
    kc, ko, gs = fvcb.rubisco_constants(g.uniform(10.0, 40.0, 300))
    km = kc * (1.0 + 210.0 / ko)
    expected = (j * km - 8.0 * vcmax * gs) / (4.0 * vcmax - j)
    np.testing.assert_allclose(fvcb.crossover_ci(vcmax, j, km, gs), expected, rtol=1e-12)


@pytest.mark.parametrize("electron", ["4-8", "4.5-10.5"])
def test_fact5_wc_equals_wj_at_crossover(electron):
    # REFERENCES.md analytic fact 5 (generalised to 4.5/10.5 by solving Wc = Wj): check Wc == Wj there.
    g = rng()
    n = 400
    vcmax, j = g.uniform(10.0, 150.0, n), g.uniform(20.0, 300.0, n)
    kc, ko, gs = fvcb.rubisco_constants(g.uniform(10.0, 40.0, n))
    km = fvcb.michaelis_km(kc, ko, 210.0)
    ci = fvcb.crossover_ci(vcmax, j, km, gs, electron)
    ok = np.isfinite(ci) & (ci > gs + 1.0)
    assert ok.sum() > 50
    wc = fvcb.rubisco_limited(vcmax[ok], ci[ok], kc[ok], ko[ok], gs[ok])
    wj = fvcb.electron_limited(j[ok], ci[ok], gs[ok], electron)
    np.testing.assert_allclose(wc, wj, rtol=1e-10)
    # No crossover where a Vcmax = J: the two curves are proportional.
    per_co2 = 4.0 if electron == "4-8" else 4.5
    assert np.isnan(fvcb.crossover_ci(50.0, per_co2 * 50.0, 700.0, 40.0, electron))


# --------------------------------------------------------------------------------------
# Temperature responses
# --------------------------------------------------------------------------------------
PEAKED_TABLE = [
    # (response, f(30 C), T_opt C) -- REFERENCES.md peaked Arrhenius table; parameters [S],
    # f and T_opt computed there from the Medlyn et al. 2002 formula.
    (fvcb.VCMAX_PEAKED_LEUNING2002, "1.2598", "33.3"),   # Bernacchi 2001 Ha, Leuning 2002 Hd/dS
    (fvcb.JMAX_PEAKED_LEUNING2002, "1.0699", "29.4"),    # Bernacchi 2003 Ha, Leuning 2002 Hd/dS
    (fvcb.kattge_knorr2007_responses(25.0)[0], "1.4888", "36.2"),  # Kattge & Knorr 2007 Vcmax, t_g 25 C
    (fvcb.kattge_knorr2007_responses(25.0)[1], "1.2968", "34.5"),  # Kattge & Knorr 2007 Jmax, t_g 25 C
]


@pytest.mark.parametrize("response, f30, t_opt", PEAKED_TABLE)
def test_peaked_arrhenius_table(response, f30, t_opt):
    # Medlyn et al. 2002 peaked form; f(25 C) = 1, f(30 C) and T_opt as in REFERENCES.md.
    assert fvcb.peaked_arrhenius(25.0, response.ha, response.hd, response.ds) == pytest.approx(1.0, abs=1e-14)
    assert_printed(fvcb.temperature_factor(30.0, response), f30)
    # T_opt as the maximiser of the peaked function itself (SciPy bounded scalar optimiser).
    res = minimize_scalar(lambda t: -fvcb.peaked_arrhenius(t, response.ha, response.hd, response.ds),
                          bounds=(0.0, 60.0), method="bounded", options={"xatol": 1e-7})
    assert res.success
    assert_printed(res.x, t_opt)
    # Medlyn et al. 2002 closed form: T_opt = Hd / (dS - R ln(Ha / (Hd - Ha))), in kelvin.
    t_opt_k = response.hd / (response.ds - fvcb.R_GAS * np.log(response.ha / (response.hd - response.ha)))
    assert res.x == pytest.approx(t_opt_k - 273.15, abs=1e-4)


def test_leuning_constants():
    # Leuning 2002 Hd (kJ mol-1) and dS (J mol-1 K-1, stored as kJ mol-1 K-1) [S].
    v, j = fvcb.VCMAX_PEAKED_LEUNING2002, fvcb.JMAX_PEAKED_LEUNING2002
    assert (v.ha, v.hd, v.ds * 1000.0) == pytest.approx((65.33, 149.25, 485.0))
    assert (j.ha, j.hd, j.ds * 1000.0) == pytest.approx((43.54, 152.04, 495.0))


def test_arrhenius_is_one_at_25c_and_matches_unnormalised_ratio():
    # Normalised Arrhenius (REFERENCES.md): k(T)/k(25) = exp(-Ha/(R T_K)) / exp(-Ha/(R 298.15)).
    t = np.linspace(0.0, 45.0, 10)
    for ha in (fvcb.VCMAX_HA, fvcb.JMAX_HA, fvcb.RD_HA):
        assert fvcb.arrhenius(25.0, ha) == 1.0
        ratio = np.exp(-ha / (fvcb.R_GAS * (t + 273.15))) / np.exp(-ha / (fvcb.R_GAS * 298.15))
        np.testing.assert_allclose(fvcb.arrhenius(t, ha), ratio, rtol=1e-12)


def test_peaked_tends_to_plain_when_deactivation_vanishes():
    # Medlyn et al. 2002 form: as Hd grows the deactivation terms go to 1, leaving the plain factor.
    t = np.linspace(5.0, 40.0, 8)
    np.testing.assert_allclose(fvcb.peaked_arrhenius(t, 65.33, 1e4, 0.485), fvcb.arrhenius(t, 65.33), rtol=1e-12)
    # Peaked is below plain above 25 C and above it below 25 C (the deactivation term falls with T).
    peaked = fvcb.temperature_factor(t, fvcb.VCMAX_PEAKED_LEUNING2002)
    plain = fvcb.temperature_factor(t, fvcb.TemperatureResponse(fvcb.VCMAX_HA))
    assert np.all(peaked[t > 25.0] < plain[t > 25.0]) and np.all(peaked[t < 25.0] > plain[t < 25.0])


def test_peaked_response_reaches_net_assimilation():
    # limiting_rates scales Vcmax and Jmax by the chosen responses (Medlyn et al. 2002 / Leuning 2002).
    r = fvcb.limiting_rates(400.0, 1500.0, 35.0, 60.0, 100.0, 0.3, 0.7, 1.0,
                            vcmax_response=fvcb.VCMAX_PEAKED_LEUNING2002,
                            jmax_response=fvcb.JMAX_PEAKED_LEUNING2002)
    np.testing.assert_allclose(r.vcmax, 60.0 * fvcb.peaked_arrhenius(35.0, 65.33, 149.25, 0.485), rtol=1e-14)
    np.testing.assert_allclose(r.jmax, 100.0 * fvcb.peaked_arrhenius(35.0, 43.54, 152.04, 0.495), rtol=1e-14)


def test_half_specified_peaked_response_is_refused():
    with pytest.raises(ValueError, match="hd and ds"):
        fvcb.TemperatureResponse(65.33, hd=149.25)


# --------------------------------------------------------------------------------------
# Co-limitation, TPU, options, broadcasting, properties on random inputs
# --------------------------------------------------------------------------------------
def test_colimit_is_the_smaller_root():
    # Closed form: roots of curvature A^2 - (w1 + w2) A + w1 w2 = 0, compared with numpy.roots
    # (companion-matrix eigenvalues), for rates of both signs.
    g = rng()
    w1, w2 = g.uniform(-20.0, 60.0, 40), g.uniform(-20.0, 60.0, 40)
    curv = g.uniform(0.5, 1.0, 40)
    got = fvcb.colimit(w1, w2, curv)
    for a, b, c, x in zip(w1, w2, curv, got):
        assert x == pytest.approx(min(np.roots([c, -(a + b), a * b]).real), rel=1e-9, abs=1e-9)
    np.testing.assert_allclose(fvcb.colimit(w1, w2, 1.0), np.minimum(w1, w2), rtol=1e-12, atol=1e-12)
    with pytest.raises(ValueError, match="curvature"):
        fvcb.colimit(1.0, 2.0, 0.0)


def test_tpu_limitation():
    # DESIGN.md "The model": Wp = 3 TPU; at high Ci with a small TPU, A = 3 TPU - Rd.
    r = fvcb.limiting_rates(1500.0, 1500.0, 30.0, 60.0, 100.0, 0.3, 0.7, 1.0, tpu25=5.0)
    np.testing.assert_allclose(r.tpu, 5.0 * fvcb.arrhenius(30.0, fvcb.TPU_HA), rtol=1e-14)
    np.testing.assert_allclose(r.wp, 3.0 * r.tpu, rtol=1e-14)
    assert r.wp < min(r.wc, r.wj)
    np.testing.assert_allclose(r.a, r.wp - r.rd, rtol=1e-14)
    off = fvcb.limiting_rates(1500.0, 1500.0, 30.0, 60.0, 100.0, 0.3, 0.7, 1.0)
    assert off.wp is None and off.tpu is None
    assert fvcb.tpu_limited(2.0) == 6.0


@pytest.mark.parametrize("kwargs, choices", [
    ({"electron": "4/8"}, ["4-8", "4.5-10.5"]),
    ({"transition": "hard"}, ["min", "smooth"]),
])
def test_invalid_options_list_the_choices(kwargs, choices):
    with pytest.raises(ValueError) as err:
        fvcb.net_assimilation(300.0, t_leaf_c=25.0, **EXAMPLE, **kwargs)
    for choice in choices:
        assert repr(choice) in str(err.value)
    with pytest.raises(ValueError, match="4.5-10.5"):
        fvcb.crossover_ci(60.0, 90.0, 700.0, 42.0, electron="5-10")


def test_zero_light_gives_zero_j_without_nan():
    j = fvcb.electron_transport(0.3, np.array([0.0, 0.0, 100.0]), np.array([100.0, 0.0, 0.0]), 0.7)
    np.testing.assert_array_equal(j, [0.0, 0.0, 0.0])
    a = fvcb.net_assimilation(np.array([100.0, 400.0]), t_leaf_c=25.0, **{**EXAMPLE, "q": 0.0})
    assert np.all(np.isfinite(a))
    # In the dark Wj = 0 above Gamma*, so A = -Rd (DESIGN.md FvCB equations).
    np.testing.assert_allclose(a, -1.0)


def test_broadcasting_matches_elementwise():
    ci = np.array([100.0, 300.0, 900.0])
    q = np.array([[200.0], [1500.0]])
    grid = fvcb.net_assimilation(ci, q, 28.0, 60.0, 100.0, 0.3, 0.7, 1.0, transition="smooth")
    assert grid.shape == (2, 3)
    for i in range(2):
        for k in range(3):
            single = fvcb.net_assimilation(ci[k], q[i, 0], 28.0, 60.0, 100.0, 0.3, 0.7, 1.0, transition="smooth")
            assert grid[i, k] == pytest.approx(float(single), rel=1e-14)


@pytest.mark.parametrize("tpu", [False, True])
def test_properties_on_random_leaves(tpu):
    # Consequences of the FvCB equations (no external number): A rises with Ci; the smooth transition
    # never exceeds the hard minimum; 0 <= J <= min(alpha Q, Jmax) and J rises with Q and theta.
    g = rng()
    n = 300
    p = _random_leaves(g, n)
    tpu25 = p["vcmax25"] * g.uniform(0.1, 0.2, n) if tpu else None
    _, _, gs = fvcb.rubisco_constants(p["t_leaf_c"])
    ci = gs[:, None] + np.linspace(0.0, 2000.0, 41)[None, :]
    cols = {k: v[:, None] for k, v in p.items()}
    tpu_col = None if tpu25 is None else tpu25[:, None]
    a_min = fvcb.net_assimilation(ci, **cols, tpu25=tpu_col)
    a_smooth = fvcb.net_assimilation(ci, **cols, tpu25=tpu_col, transition="smooth")
    assert np.all(np.diff(a_min, axis=1) >= -1e-12)
    assert np.all(np.diff(a_smooth, axis=1) >= -1e-12)
    assert np.all(a_smooth <= a_min + 1e-12)
    # Smooth with curvature 1 is the hard minimum.
    np.testing.assert_allclose(fvcb.net_assimilation(ci, **cols, tpu25=tpu_col, transition="smooth",
                                                     smooth_curvature=1.0), a_min, rtol=1e-12, atol=1e-12)

    jmax = p["jmax25"]
    j = fvcb.electron_transport(p["alpha"], p["q"], jmax, p["theta"])
    assert np.all(j >= 0.0)
    assert np.all(j <= np.minimum(p["alpha"] * p["q"], jmax) * (1 + 1e-12))
    assert np.all(fvcb.electron_transport(p["alpha"], p["q"] * 1.1, jmax, p["theta"]) >= j)
    assert np.all(fvcb.electron_transport(p["alpha"], p["q"], jmax, np.minimum(p["theta"] + 0.05, 1.0)) >= j)


def test_theta_out_of_range_is_refused():
    with pytest.raises(ValueError, match="theta"):
        fvcb.electron_transport(0.3, 1500.0, 100.0, 1.2)


@pytest.mark.parametrize("t", [25.0, 30.0])
def test_point_factors_reproduce_the_worked_example(t):
    # REFERENCES.md worked example, A at Ci 200 and 800 (both electron requirements); Bernacchi et al.
    # 2001/2003 [S]. PointFactors is the factored form the held-out leaf model evaluates.
    row = WORKED[t]
    p = dict(EXAMPLE)
    q = p.pop("q")
    for electron, key in (("4-8", "a800"), ("4.5-10.5", "a800_45")):
        f = fvcb.PointFactors.at([200.0, 800.0], q, t, electron=electron)
        a = f.net_assimilation(**p)
        if electron == "4-8":
            assert_printed(a[0], row["a200"])
        assert_printed(a[1], row[key])


@pytest.mark.parametrize("transition", ["min", "smooth"])
@pytest.mark.parametrize("tpu", [False, True])
def test_point_factors_equal_limiting_rates_on_random_leaves(transition, tpu):
    # the factored form and limiting_rates compute the same equations (Farquhar et al. 1980; Sharkey 1985
    # for TPU), so they agree to rounding at random points and parameters
    rng = np.random.default_rng(11)
    n = 200
    ci, q, t = rng.uniform(50, 1500, n), rng.uniform(0, 2000, n), rng.uniform(12, 38, n)
    o2 = rng.uniform(190, 220, n)
    pars = dict(vcmax25=rng.uniform(20, 150, n), jmax25=rng.uniform(40, 250, n), alpha=rng.uniform(0.1, 0.5, n),
                theta=rng.uniform(0.3, 0.95, n), rd25=rng.uniform(0.3, 3, n))
    tpu25 = rng.uniform(5, 15, n) if tpu else None
    f = fvcb.PointFactors.at(ci, q, t, o2, electron="4.5-10.5", vcmax_response=fvcb.VCMAX_PEAKED_LEUNING2002)
    a = f.net_assimilation(**pars, tpu25=tpu25, transition=transition, smooth_curvature=0.98)
    ref = fvcb.net_assimilation(ci, q, t, **pars, o2=o2, tpu25=tpu25, electron="4.5-10.5", transition=transition,
                                smooth_curvature=0.98, vcmax_response=fvcb.VCMAX_PEAKED_LEUNING2002)
    np.testing.assert_allclose(a, ref, rtol=1e-12, atol=1e-12)
