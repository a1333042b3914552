"""leafcv's Stan FvCB functions (stan/fvcb_functions.stan) against the published worked example and
against the NumPy model (src/leafcv/fvcb.py), evaluated by a small test program (fvcb_check.stan, beside
this file) with the fixed_param sampler."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from leafcv import fvcb
from leafcv.engines.program import program_text

RSET = fvcb.RUBISCO_SETS["bernacchi2001"]  # Bernacchi et al. 2001, Ci basis [S]
CHECK_PROGRAM = Path(__file__).resolve().parent / "fvcb_check.stan"


def _run(points: dict, peaked: bool = False, electron=(4.0, 8.0), curvature: float = 0.99) -> dict:
    import stan

    n = max(np.size(v_) for v_ in points.values())
    v = fvcb.VCMAX_PEAKED_LEUNING2002 if peaked else fvcb.TemperatureResponse(fvcb.VCMAX_HA)
    j = fvcb.JMAX_PEAKED_LEUNING2002 if peaked else fvcb.TemperatureResponse(fvcb.JMAX_HA)
    r = fvcb.TemperatureResponse(fvcb.RD_HA)
    data = {k: np.broadcast_to(np.asarray(v_, float), (n,)).tolist() for k, v_ in points.items()}
    data.update(N=n, e1=electron[0], e2=electron[1], smooth_curvature=curvature,
                rubisco=[RSET.kc25, RSET.ko25, RSET.gamma25, RSET.ha_kc, RSET.ha_ko, RSET.ha_gamma],
                tresp=[[t.ha, t.hd or 0.0, t.ds or 0.0] for t in (v, j, r)],
                peaked=[int(t.peaked) for t in (v, j, r)])
    model = stan.build(program_text(CHECK_PROGRAM), data=data, random_seed=1)
    fit = model.fixed_param(num_samples=1, num_chains=1)
    return {k: np.asarray(fit[k]).reshape(-1) for k in model.param_names}


def _worked(t: float, ci: list[float], electron=(4.0, 8.0)) -> dict:
    # REFERENCES.md worked example: alpha 0.3, theta 0.7, Q 1500, Vcmax25 60, Jmax25 100, Rd25 1, O 210.
    pts = {"ci": ci, "q": 1500.0, "tleaf": t, "o2": 210.0, "vcmax25": 60.0, "jmax25": 100.0,
           "alpha": 0.3, "theta": 0.7, "rd25": 1.0}
    return _run(pts, electron=electron)


def _sig4(x, ref):
    """Equal to the printed 4 significant digits (half a unit in the last printed place)."""
    np.testing.assert_allclose(x, ref, rtol=5e-4, atol=0)


def test_worked_example_25c():
    # REFERENCES.md worked example, 25 C column (normalised Arrhenius; Bernacchi et al. 2001/2003 dHa [S]).
    gstar = RSET.gamma25
    out = _worked(25.0, [200.0, 800.0, 308.2, gstar])
    _sig4(out["km"][0], 710.3)
    _sig4(out["vcmax"][0], 60.0)
    _sig4(out["jmax"][0], 100.0)
    _sig4(out["j"][0], 92.77)
    _sig4(out["wc"][0], 10.36)
    _sig4(out["wj"][0], 12.77)
    _sig4(out["a_min"][0], 9.364)
    _sig4(out["wc"][1], 30.08)
    _sig4(out["wj"][1], 19.83)
    _sig4(out["a_min"][1], 18.83)
    # crossover Ci 308.2: Wc = Wj there (to the 4 printed digits of the crossover)
    np.testing.assert_allclose(out["wc"][2], out["wj"][2], rtol=2e-3)
    # analytic fact 1: at Ci = Gamma*, A = -Rd
    np.testing.assert_allclose(out["a_min"][3], -1.0, rtol=1e-12)


def test_worked_example_30c():
    # REFERENCES.md worked example, 30 C column.
    t = 30.0
    gstar30 = float(fvcb.rubisco_constants(t)[2])
    out = _worked(t, [200.0, 800.0, 363.3, gstar30])
    _sig4(out["km"][0], 1094)
    _sig4(out["vcmax"][0], 92.67)
    _sig4(out["jmax"][0], 133.6)
    _sig4(out["rd"][0], 1.362)
    _sig4(out["j"][0], 120.4)
    _sig4(out["wc"][0], 10.39)
    _sig4(out["wj"][0], 14.08)
    _sig4(out["a_min"][0], 9.027)
    _sig4(out["wc"][1], 36.46)
    _sig4(out["wj"][1], 24.64)
    _sig4(out["a_min"][1], 23.28)
    np.testing.assert_allclose(out["wc"][2], out["wj"][2], rtol=2e-3)
    _sig4(out["a_min"][3], -1.3616)


def test_worked_example_electron_45_105():
    # REFERENCES.md worked example, Ci 800 with the 4.5/10.5 electron requirement.
    out25 = _worked(25.0, [800.0], electron=(4.5, 10.5))
    _sig4(out25["wj"][0], 17.35)
    _sig4(out25["a_min"][0], 16.35)
    out30 = _worked(30.0, [800.0], electron=(4.5, 10.5))
    _sig4(out30["wj"][0], 21.47)
    _sig4(out30["a_min"][0], 20.11)


def test_analytic_limits_of_j():
    # REFERENCES.md analytic facts 2 and 3: theta -> 0 gives aQ Jmax/(aQ + Jmax); theta = 1 gives min(aQ, Jmax).
    out = _run({"ci": 400.0, "q": [1500.0, 1500.0, 200.0], "tleaf": 25.0, "o2": 210.0, "vcmax25": 60.0,
                "jmax25": 100.0, "alpha": 0.3, "theta": [1e-12, 1.0, 1.0], "rd25": 1.0})
    np.testing.assert_allclose(out["j"][0], 450 * 100 / 550, rtol=1e-9)  # 81.818, fact 2
    np.testing.assert_allclose(out["j"][1], 100.0, rtol=1e-9)
    np.testing.assert_allclose(out["j"][2], 60.0, rtol=1e-9)


@pytest.mark.parametrize("peaked", [False, True])
def test_stan_matches_numpy_on_random_inputs(peaked):
    rng = np.random.default_rng(7)
    n = 200
    pts = {"ci": rng.uniform(20, 2000, n), "q": rng.uniform(0, 2200, n), "tleaf": rng.uniform(10, 40, n),
           "o2": rng.uniform(150, 250, n), "vcmax25": rng.uniform(10, 150, n), "jmax25": rng.uniform(20, 300, n),
           "alpha": rng.uniform(0.1, 0.5, n), "theta": rng.uniform(0.0, 1.0, n), "rd25": rng.uniform(0.2, 3, n)}
    out = _run(pts, peaked=peaked, curvature=0.95)
    kw = dict(o2=pts["o2"],
              vcmax_response=fvcb.VCMAX_PEAKED_LEUNING2002 if peaked else fvcb.TemperatureResponse(fvcb.VCMAX_HA),
              jmax_response=fvcb.JMAX_PEAKED_LEUNING2002 if peaked else fvcb.TemperatureResponse(fvcb.JMAX_HA))
    args = [pts[k] for k in ("ci", "q", "tleaf", "vcmax25", "jmax25", "alpha", "theta", "rd25")]
    np.testing.assert_allclose(out["a_min"], fvcb.net_assimilation(*args, **kw), rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(out["a_smooth"], fvcb.net_assimilation(*args, transition="smooth",
                                                                      smooth_curvature=0.95, **kw),
                               rtol=1e-8, atol=1e-9)
