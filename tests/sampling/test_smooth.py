"""The smooth seasonal term with the sampler: on data simulated with a smooth seasonal trend of Vcmax25 the
smooth structure beats month as fixed levels in leave-one-leaf-out score; on data simulated with
independent month effects it does not clearly beat month as fixed levels. The data are simulated here with
leafcv's NumPy FvCB model (Farquhar, von Caemmerer & Berry 1980, checked against REFERENCES.md in
tests/test_fvcb.py)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import leafcv
from leafcv import fvcb
from leafcv.ranking import pair_verdict

MONTH_STARTS = (121, 152, 182, 213)      # four monthly campaigns, each leaf on its own day of the month
ROLES = {"net_assimilation": "a", "intercellular_co2": "ci", "photon_flux": "q", "leaf_temperature": "t",
         "leaf": "leaf", "curve": "curve"}
STRUCTURES = [
    {"name": "month-fixed", "vcmax25": {"fixed": ["month"], "random": ["leaf"]},
     "jmax25": {"ratio_to": "vcmax25"}, "rd25": {"ratio_to": "vcmax25"}},
    {"name": "season-smooth", "vcmax25": {"smooth": ["doy"], "random": ["leaf"]},
     "jmax25": {"ratio_to": "vcmax25"}, "rd25": {"ratio_to": "vcmax25"}},
]


def simulate(kind: str, n_leaves: int = 28, seed: int = 11) -> pd.DataFrame:
    """Leaves over four months; log Vcmax25 follows a smooth trend of the day of year ("smooth": a sine
    wave whose within-month change is far larger than the leaf-to-leaf SD) or one independent value per
    month ("months"). A-Ci curves at 1500 PPFD and short A-Q curves; Jmax25 = 1.8 Vcmax25."""
    rng = np.random.default_rng(seed)
    month = np.arange(n_leaves) % len(MONTH_STARTS)
    doy = np.array(MONTH_STARTS)[month] + rng.integers(0, 30, n_leaves)
    if kind == "smooth":
        trend = 0.45 * np.sin(2 * np.pi * (doy - 121) / 120)
    else:
        trend = np.array([0.0, 0.3, -0.25, 0.1])[month]
    vcmax = 60 * np.exp(trend + rng.normal(0, 0.06, n_leaves))
    rows = []
    ci_steps, q_steps = np.array([60, 100, 150, 220, 300, 450, 700, 1000, 1400.0]), np.array([50, 150, 400, 900, 1500.0])
    for i in range(n_leaves):
        for curve, ci, q in (("aci", ci_steps, np.full(9, 1500.0)), ("aq", np.full(5, 300.0), q_steps)):
            t = np.full(len(ci), 25.0)
            a = fvcb.net_assimilation(ci, q, t, vcmax[i], 1.8 * vcmax[i], 0.3, 0.7, 0.015 * vcmax[i])
            a = a + rng.normal(0, 0.4, len(a))
            rows += [{"leaf": f"L{i:02d}", "curve": f"L{i:02d}-{curve}", "month": f"m{month[i] + 1}",
                      "doy": int(doy[i]), "a": a[k], "ci": ci[k], "q": q[k], "t": t[k]} for k in range(len(a))]
    return pd.DataFrame(rows)


def _run(kind: str, folder):
    study = leafcv.from_frame(simulate(kind), roles=ROLES, structures=STRUCTURES, folder=folder,
                              groups=["month"], traits=["doy"], scale={"doy": 30},
                              sampler={"chains": 2, "warmup": 300, "draws": 300, "seed": 5, "adapt_delta": 0.95},
                              question=f"is the season a smooth trend or month levels ({kind} truth)?")
    return study.run(progress="quiet", workers=2)


def _verdict(run) -> tuple[float, bool]:
    """Δelpd of season-smooth over month-fixed and whether leafcv's one decision rule tells them apart."""
    diff, _, verdict = pair_verdict(run.ranking, "season-smooth", "month-fixed", run.pointwise)
    return diff, verdict.told_apart


@pytest.fixture(scope="module")
def smooth_run(tmp_path_factory):
    return _run("smooth", tmp_path_factory.mktemp("smooth-season"))


def test_the_smooth_trend_wins_when_the_season_is_smooth(smooth_run):
    diff, apart = _verdict(smooth_run)
    assert diff > 0 and apart, diff


def test_the_smooth_trend_does_not_clearly_win_when_months_differ_independently(tmp_path):
    diff, apart = _verdict(_run("months", tmp_path))
    assert not (diff > 0 and apart), diff


def test_new_leaves_inside_and_outside_the_observed_range(smooth_run):
    # the population mean of log Vcmax25 at a day of year is, draw by draw, b0 + slope (doy - centre) / 30
    # + the bend Z(doy) (tau_s z_s); outside the observed days the bend is held at the nearest end and only
    # the straight line goes on, and the prediction says so
    from leafcv.smooth import SplineBasis

    new = pd.DataFrame({"leaf": ["inside", "early", "late"], "doy": [170.0, 60.0, 330.0]})
    pred = smooth_run.predict("season-smooth", new)
    assert len(pred.notes) == 1 and "2 new leaf/leaves lie outside the observed range of doy" in pred.notes[0]
    post = smooth_run.fit("season-smooth").posterior
    flat = {k: post[k].values.reshape((-1,) + post[k].shape[2:]) for k in ("b0", "beta", "tau_s", "z_s")}
    days = simulate("smooth")[["leaf", "doy"]].drop_duplicates()["doy"].to_numpy(float)
    basis = SplineBasis.fit(days, float(days.mean()), 30.0)
    link = (flat["b0"][:, :1] + flat["beta"][:, :1] * (new["doy"].to_numpy() - days.mean()) / 30.0
            + (flat["tau_s"] * flat["z_s"]) @ basis.columns(new["doy"].to_numpy()).T)
    got = pred.parameters.set_index(["leaf", "parameter"])["median"]
    for i, leaf in enumerate(new["leaf"]):
        assert got[(leaf, "vcmax25")] == pytest.approx(float(np.exp(np.median(link[:, i]))), rel=1e-9)
