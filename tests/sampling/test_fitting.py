"""Real fits of the generic program (leafcv.fitting.fit_structure, PyStan).

Short fits on the quick demo scenario: the generating values are recovered, the fit report names
parameters, priors and verdict, a second structure compiles nothing, and a repeated seed gives the same
draws.

Every model option and term fitted on a small case simulated with it, checked by a property that fails
when the option is ignored. Each case is simulated by leafcv.fvcb (itself checked against the worked
example of REFERENCES.md) with the option on; where a property needs a contrast, the same data are also
fitted with the option off. The Student-t likelihood and the within/between split are fitted on the
quick demo changed to need them (outliers; taxa whose mean N runs against the within-taxon slope).
"""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from leafcv import fvcb
from leafcv.api import load
from leafcv.cv.leafmodel import flatten_draws
from leafcv.demo import GEN, N_CENTRE, write_demo
from leafcv.design import leaf_link_values, level_values
from leafcv.fitting import fit_structure, format_fit
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec
from ..helpers import pooled_structure

ROOT = Path(__file__).resolve().parents[2]


# ------------------------------------------------------------------------------------------
# short fits on the quick demo

@pytest.fixture(scope="module")
def leaf_fits(quick_demo):
    return fit_leaves(quick_demo[1])


@pytest.fixture(scope="module")
def generating_fit(quick_demo, leaf_fits):
    comparison, dataset, _ = quick_demo
    return fit_structure(comparison.structure("traits-month-fixed"), dataset, comparison.data,
                         comparison.sampler, leaf_fits=leaf_fits)


def _interval(fit, name, index, transform=lambda x: x, level=0.90):
    x = transform(fit.draws.params[name][..., index].reshape(-1))
    lo, hi = np.quantile(x, [(1 - level) / 2, (1 + level) / 2])
    return lo, hi


def test_recovers_generating_vcmax25_and_n_slope(generating_fit, quick_demo):
    # The demo simulates log Vcmax25 = log(55) + 0.35 (N - 2) + ...; traits are centred at N_CENTRE = 2
    # in the comparison file, so b0[1] estimates log(GEN['vcmax25_ref']) and beta[1] the N slope.
    comparison = quick_demo[0]
    assert comparison.data.centre["n_area"] == N_CENTRE
    fit = generating_fit
    assert fit.design.coefficients[0].term == "n_area"
    lo, hi = _interval(fit, "b0", 0, np.exp)
    assert lo < GEN["vcmax25_ref"] < hi, (lo, hi)
    lo, hi = _interval(fit, "beta", 0)
    assert lo < GEN["n_slope"] < hi, (lo, hi)
    assert fit.diagnostics.divergences == 0
    assert fit.diagnostics.max_rhat < 1.05


def test_fit_report_names_parameters_priors_and_verdict(generating_fit):
    text = format_fit(generating_fit, "traits-month-fixed")
    assert "vcmax25 at reference" in text and "slope of log vcmax25 on n_area" in text
    assert "lognormal, median 60" in text          # the stated prior of Vcmax25
    assert "verdict:" in text and "E-BFMI" in text
    assert "leaf effects on vcmax25" in text       # the centring choice is reported


def test_second_structure_compiles_nothing(generating_fit, quick_demo, leaf_fits):
    # httpstan keeps one compiled extension module per program text; a new structure is only new data.
    from httpstan.cache import list_model_names

    comparison, dataset, _ = quick_demo
    before = sorted(list_model_names())
    sampler = type(comparison.sampler)(chains=2, warmup=150, draws=100, seed=5)
    fit = fit_structure(comparison.structure("traits-month-random"), dataset, comparison.data, sampler,
                        leaf_fits=leaf_fits)
    assert sorted(list_model_names()) == before
    assert fit.draws.params["tau"].shape == (2, 100, 1)   # the campaign random term exists in this fit
    assert fit.draws.params["beta"].shape == (2, 100, 3)  # n_area, chl_ug, sla_m2kg


def test_same_seed_same_draws_after_cache_deletion(quick_demo, leaf_fits):
    # Reproducibility: same data, seed and settings give the same draws, even though every fit is
    # deleted from httpstan's fit cache after reading (so this is a real second run, not a cached one).
    comparison, dataset, _ = quick_demo
    sampler = type(comparison.sampler)(chains=2, warmup=100, draws=50, seed=11)
    s = pooled_structure(comparison)
    a = fit_structure(s, dataset, comparison.data, sampler, leaf_fits=leaf_fits)
    b = fit_structure(s, dataset, comparison.data, sampler, leaf_fits=leaf_fits)
    np.testing.assert_array_equal(a.draws.params["b0"], b.draws.params["b0"])
    assert b.draws.sampling_seconds > 0.05


# ------------------------------------------------------------------------------------------
# model options and terms on small simulated cases

OPTIONS_SAMPLER = SamplerSpec(chains=2, warmup=300, draws=250, seed=11, adapt_delta=0.95)


CI_STEPS = np.array([50, 80, 120, 180, 250, 350, 500, 700, 900, 1100, 1300, 1500], float)


Q_STEPS = np.array([0, 25, 50, 100, 200, 400, 600, 900, 1200, 1500, 1800, 2000], float)


SPECIES = ("sp1", "sp2", "sp3", "sp4")


HEADER = """format = 2
[data]
file = "obs.csv"
[data.columns]
net_assimilation = "A"
intercellular_co2 = "Ci"
photon_flux = "Q"
leaf_temperature = "T"
leaf = "leaf_id"
curve = "curve_id"
[data.leaf]
groups = ["species"]
traits = ["N"]
[data.leaf.centre]
N = 2.0
[sampler]
chains = 2
"""


BASE = """vcmax25 = {{ {vcmax} }}
alpha = {{ {alpha} }}
jmax25 = {{ ratio_to = "vcmax25" }}
rd25 = {{ ratio_to = "vcmax25" }}
"""


def simulate(folder: Path, n_leaves: int, structures: dict[str, str], *, seed: int = 1, t_leaf=25.0,
             log_v=None, logit_a=None, n_area=None, sigma=(0.3, 0.3), **fvcb_options):
    """Write obs.csv and case.toml (one [[structure]] per entry of ``structures``); return (comparison,
    dataset, truth). Leaf i: Vcmax25 = exp(log_v[i]), alpha = expit(logit_a[i]), Jmax25 = 1.8 Vcmax25,
    Rd25 = 0.015 Vcmax25, theta 0.7; one A-Ci curve (PPFD 1500) and one A-Q curve (Ci 300)."""
    rng = np.random.default_rng(seed)
    log_v = np.full(n_leaves, np.log(60.0)) if log_v is None else np.asarray(log_v)
    logit_a = np.full(n_leaves, np.log(0.3 / 0.7)) if logit_a is None else np.asarray(logit_a)
    n_area = rng.normal(2.0, 0.5, n_leaves) if n_area is None else np.asarray(n_area)
    truth = pd.DataFrame({"leaf": [f"leaf{i:02d}" for i in range(n_leaves)], "vcmax25": np.exp(log_v),
                          "alpha": 1 / (1 + np.exp(-logit_a)), "N": n_area,
                          "species": [SPECIES[i % 4] for i in range(n_leaves)]})
    rows = []
    for i, t in truth.iterrows():
        for kind, ci, q, sd in (("aci", CI_STEPS, np.full(12, 1500.0), sigma[0]), ("aq", np.full(12, 300.0), Q_STEPS, sigma[1])):
            tl = np.full(12, float(t_leaf))
            a = fvcb.net_assimilation(ci, q, tl, t["vcmax25"], 1.8 * t["vcmax25"], t["alpha"], 0.7,
                                      0.015 * t["vcmax25"], **fvcb_options) + rng.normal(0, sd, 12)
            rows += [{"leaf_id": t["leaf"], "curve_id": f"{t['leaf']}-{kind}", "species": t["species"], "N": t["N"],
                      "A": a[k], "Ci": ci[k], "Q": q[k], "T": tl[k]} for k in range(12)]
    pd.DataFrame(rows).to_csv(folder / "obs.csv", index=False)
    text = HEADER + "".join(f'\n[[structure]]\nname = "{name}"\n{body}' for name, body in structures.items())
    (folder / "case.toml").write_text(text)
    comparison, dataset = load(folder / "case.toml")
    return comparison, dataset, truth


def fit_case(comparison, dataset, name):
    return fit_structure(comparison.structure(name), dataset, comparison.data, OPTIONS_SAMPLER, leaf_fits=fit_leaves(dataset))


def draws_of(f, name):
    return f.draws.params[name].reshape(f.draws.n_chains * f.draws.n_draws, -1)


def intercept(f, param):
    """Natural-scale draws of a parameter's intercept (exp of the link; ratios stay ratios)."""
    return np.exp(draws_of(f, "b0")[:, f.design.params.index(param)])


LEAF_V = BASE.format(vcmax='random = ["leaf"]', alpha="")


def test_tpu_limitation_is_estimated_and_removes_the_misfit(tmp_path):
    # TPU limitation, Wp = 3 TPU (Sharkey 1985, from memory; Harley et al. 1992, Plant Cell Environ
    # 15:271-282, REFERENCES.md):
    # with TPU25 = 4 the high-Ci points plateau at 12 - Rd. Fitted with TPU, TPU25 is recovered
    # tightly; fitted without, the plateau is misfit and the residual SD swells.
    structures = {"tpu": 'model = { tpu = true }\n' + LEAF_V, "no-tpu": LEAF_V}
    comparison, dataset, _ = simulate(tmp_path, 6, structures, tpu25=4.0)
    with_tpu, without = fit_case(comparison, dataset, "tpu"), fit_case(comparison, dataset, "no-tpu")
    tpu = intercept(with_tpu, "tpu25")
    lo, hi = np.quantile(tpu, [0.05, 0.95])
    assert lo < 4.0 < hi and hi - lo < 0.2 * 4.0, (lo, hi)
    s_tpu, s_none = np.median(draws_of(with_tpu, "sigma")), np.median(draws_of(without, "sigma"))
    assert s_tpu < 0.45 and s_none > 2 * s_tpu, (s_tpu, s_none)


def test_smooth_transition_fits_a_smooth_curve_the_hard_minimum_misfits(tmp_path):
    # Smooth co-limitation k A^2 - (Wc + Wj) A + Wc Wj = 0 (Collatz et al. 1991, Agric For Meteorol
    # 54:107-136, from memory) with k = 0.8: A dips below min(Wc, Wj) near the transition; the hard minimum cannot.
    structures = {"smooth": 'model = { transition = "smooth", smooth_curvature = 0.8 }\n' + LEAF_V, "min": LEAF_V}
    comparison, dataset, _ = simulate(tmp_path, 6, structures, transition="smooth", smooth_curvature=0.8)
    smooth, hard = fit_case(comparison, dataset, "smooth"), fit_case(comparison, dataset, "min")
    s_smooth, s_hard = np.median(draws_of(smooth, "sigma")), np.median(draws_of(hard, "sigma"))
    assert 0.2 < s_smooth < 0.4 and s_hard > 1.5 * s_smooth, (s_smooth, s_hard)


def test_peaked_arrhenius_recovers_vcmax25_from_hot_leaves(tmp_path):
    # Peaked Arrhenius (Medlyn et al. 2002, Plant Cell Environ 25:1167-1179; Leuning 2002 Hd, dS):
    # leaves measured at 38 C sit past the Vcmax optimum (33.3 C, REFERENCES.md), where the plain
    # Arrhenius factor is larger than the peaked one; a plain fit must infer a smaller Vcmax25.
    structures = {"peaked": 'model = { temperature = "peaked" }\n' + LEAF_V, "plain": LEAF_V}
    comparison, dataset, _ = simulate(tmp_path, 6, structures, t_leaf=38.0,
                                      vcmax_response=fvcb.VCMAX_PEAKED_LEUNING2002,
                                      jmax_response=fvcb.JMAX_PEAKED_LEUNING2002)
    peaked, plain = fit_case(comparison, dataset, "peaked"), fit_case(comparison, dataset, "plain")
    v_peaked = float(np.median(intercept(peaked, "vcmax25")))
    v_plain = float(np.median(intercept(plain, "vcmax25")))
    expected = (fvcb.temperature_factor(38.0, fvcb.VCMAX_PEAKED_LEUNING2002)
                / fvcb.temperature_factor(38.0, fvcb.TemperatureResponse(fvcb.VCMAX_HA)))
    assert abs(v_peaked / 60.0 - 1) < 0.06, v_peaked
    assert abs(v_plain / 60.0 - expected) < 0.06 and expected < 0.85, (v_plain, expected)


def test_electron_requirement_4_5_10_5_recovers_the_jmax_ratio(tmp_path):
    # Wj = J (Ci - G*) / (4.5 Ci + 10.5 G*) (von Caemmerer 2000, from memory): fitting such data with
    # 4/8 needs about 4/4.5 of the J, so the Jmax25/Vcmax25 ratio comes out low.
    structures = {"e45": 'model = { electron = "4.5-10.5" }\n' + LEAF_V, "e4": LEAF_V}
    comparison, dataset, _ = simulate(tmp_path, 6, structures, electron="4.5-10.5")
    e45, e4 = fit_case(comparison, dataset, "e45"), fit_case(comparison, dataset, "e4")
    r45 = intercept(e45, "jmax25")
    lo, hi = np.quantile(r45, [0.05, 0.95])
    assert lo < 1.8 < hi, (lo, hi)
    assert np.median(intercept(e4, "jmax25")) < 0.95 * 1.8 < lo


def test_sigma_by_curve_type_separates_the_two_noise_levels(tmp_path):
    # One residual SD per curve type: A-Ci points simulated with SD 0.25, A-Q points with SD 1.0.
    comparison, dataset, _ = simulate(tmp_path, 6, {"by-curve": 'model = { sigma = "by_curve" }\n' + LEAF_V},
                                      sigma=(0.25, 1.0))
    f = fit_case(comparison, dataset, "by-curve")
    sig = draws_of(f, "sigma")
    assert sig.shape[1] == 2 and f.design.sigma_groups == ("aci curves", "aq curves")
    assert "residual SD (aq curves)" in format_fit(f, "by-curve")
    for k, true in enumerate((0.25, 1.0)):
        assert abs(np.median(sig[:, k]) / true - 1) < 0.3, (k, np.median(sig[:, k]))
    ratio = sig[:, 1] / sig[:, 0]                      # true 4; one shared SD would make it meaningless
    lo, hi = np.quantile(ratio, [0.025, 0.975])
    assert 2.0 < lo < 4.0 < hi, (lo, hi)


def test_random_slopes_recover_species_that_respond_differently(tmp_path):
    # Species-specific slopes of log Vcmax25 on leaf N: +0.6 in sp1 and sp2, -0.2 in sp3 and sp4.
    n_leaves = 24
    rng = np.random.default_rng(4)
    n_area = rng.normal(2.0, 0.6, n_leaves)
    slope = np.array([0.6, 0.6, -0.2, -0.2])[np.arange(n_leaves) % 4]
    log_v = np.log(60.0) + slope * (n_area - 2.0) + rng.normal(0, 0.05, n_leaves)
    body = BASE.format(vcmax='fixed = ["N"], slopes = { N = "species" }, random = ["leaf"]', alpha="")
    comparison, dataset, _ = simulate(tmp_path, n_leaves, {"slopes": body}, log_v=log_v, n_area=n_area)
    f = fit_case(comparison, dataset, "slopes")
    draws = flatten_draws(f.draws.params)
    (gt,) = f.design.group_terms
    k = next(k for k, c in enumerate(f.design.coefficients) if c.term == "N")
    per_species = draws["beta"][:, [k]] + level_values(f.design, draws)[:, gt.start:gt.start + len(gt.levels)]
    assert gt.levels == SPECIES
    contrast = per_species[:, :2].mean(axis=1) - per_species[:, 2:].mean(axis=1)   # true 0.8
    assert np.quantile(contrast, 0.05) > 0.3, np.quantile(contrast, [0.05, 0.5, 0.95])
    assert np.median(f.draws.params["tau"]) > 0.15


def test_correlated_leaf_effects_estimate_the_correlation(tmp_path):
    # LKJ prior on the correlation of leaf effects (Lewandowski, Kurowicka & Joe 2009, from memory): leaf effects on
    # log Vcmax25 and logit alpha simulated with SDs 0.25 and correlation 0.9.
    n_leaves = 24
    rng = np.random.default_rng(5)
    z = rng.multivariate_normal([0, 0], 0.25**2 * np.array([[1, 0.9], [0.9, 1]]), n_leaves)
    body = 'leaf_correlation = true\n' + BASE.format(vcmax='random = ["leaf"]', alpha='random = ["leaf"]')
    comparison, dataset, _ = simulate(tmp_path, n_leaves, {"lkj": body}, log_v=np.log(60.0) + z[:, 0],
                                      logit_a=np.log(0.3 / 0.7) + z[:, 1])
    f = fit_case(comparison, dataset, "lkj")
    corr = f.draws.params["leaf_corr"].reshape(-1)
    assert np.quantile(corr, 0.05) > 0.3 and np.median(corr) > 0.6, np.quantile(corr, [0.05, 0.5, 0.95])


# ------------------------------------------------------------------------------------------
# the Student-t likelihood and the within/between split on the quick demo changed to need them

DEMO_CASE_SAMPLER = SamplerSpec(chains=2, warmup=300, draws=200, seed=5, adapt_delta=0.95)


@pytest.fixture(scope="module")
def outlier_case(tmp_path_factory):
    """The quick demo with three gross outliers on the Rubisco-limited points of leaf L001."""
    folder = tmp_path_factory.mktemp("outliers")
    write_demo(folder, quick=True)
    obs = pd.read_csv(folder / "observations.csv")
    aci = obs.index[(obs["plant_leaf"] == "L001") & obs["run"].str.endswith("aci")]
    low = obs.loc[aci].sort_values("ci_ppm").index[1:4]       # three low-Ci points (Wc-limited)
    obs.loc[low, "assim"] -= 12.0
    obs.to_csv(folder / "observations.csv", index=False)
    shutil.copy(ROOT / "comparisons" / "robustness.toml", folder)
    comparison, dataset = load(folder / "robustness.toml")
    truth = pd.read_csv(folder / "truth.csv").set_index("leaf")
    return comparison, dataset, truth


def _leaf_vcmax(fit, leaf: int) -> float:
    draws = flatten_draws(fit.draws.params)
    _, eta = leaf_link_values(fit.design, draws)
    return float(np.mean(np.exp(eta[:, leaf, 0])))


def test_student_t_resists_outliers_where_the_normal_is_pulled(outlier_case):
    # Robust regression with a Student-t likelihood (Lange, Little & Taylor 1989, JASA 84:881-896):
    # three points 12 umol m-2 s-1 low on the Rubisco-limited part pull a normal fit's Vcmax25 of
    # that leaf down; the Student-t fit stays near the generating value.
    comparison, dataset, truth = outlier_case
    leaf_fits = fit_leaves(dataset)
    leaf = int(np.flatnonzero(dataset.leaves["leaf"].astype(str) == "L001")[0])
    target = float(truth.loc["L001", "vcmax25"])
    normal = fit_structure(comparison.structure("reference"), dataset, comparison.data, DEMO_CASE_SAMPLER, leaf_fits=leaf_fits)
    robust = fit_structure(comparison.structure("robust"), dataset, comparison.data, DEMO_CASE_SAMPLER, leaf_fits=leaf_fits)
    err_normal = abs(_leaf_vcmax(normal, leaf) - target) / target
    err_robust = abs(_leaf_vcmax(robust, leaf) - target) / target
    nu = float(np.median(robust.draws.params["nu"]))
    assert err_robust < 0.5 * err_normal, (err_normal, err_robust)
    assert err_robust < 0.08
    assert nu < 10                                    # the heavy tails were used (prior median ~17)
    # the outliers inflate the normal fit's residual SD above the robust scale
    assert np.median(normal.draws.params["sigma"]) > 1.2 * np.median(robust.draws.params["sigma"])


def test_split_recovers_within_and_between_slopes(tmp_path):
    # Group-mean centring separates the within-group slope from the between-group one (Enders &
    # Tofighi 2007, Psychological Methods 12:121-138, from memory). The demo's true Vcmax25 follows
    # leaf N with one slope; shifting the recorded N of each taxon by -0.8 x its index reverses the
    # order of the taxon means, so the between-taxon slope becomes about minus the within-taxon one.
    from leafcv.demo import GEN

    write_demo(tmp_path, quick=True)
    obs = pd.read_csv(tmp_path / "observations.csv")
    taxa = sorted(obs["taxon"].unique())
    obs["n_area"] = obs["n_area"] - 0.8 * obs["taxon"].map({t: i for i, t in enumerate(taxa)})
    obs.to_csv(tmp_path / "observations.csv", index=False)
    text = (tmp_path / "demo.toml").read_text()
    text = text[:text.index("[[structure]]")].replace("format = 1", "format = 2")
    text += """
[[structure]]
name = "common"
vcmax25 = { fixed = ["n_area", "campaign"], random = ["leaf"] }
alpha = { fixed = ["chl_ug", "sla_m2kg"], random = ["leaf"] }
jmax25 = { ratio_to = "vcmax25" }
rd25 = { ratio_to = "vcmax25" }

[[structure]]
name = "split"
vcmax25 = { fixed = ["campaign"], split = { n_area = "taxon" }, random = ["leaf"] }
alpha = { fixed = ["chl_ug", "sla_m2kg"], random = ["leaf"] }
jmax25 = { ratio_to = "vcmax25" }
rd25 = { ratio_to = "vcmax25" }
"""
    (tmp_path / "split.toml").write_text(text)
    comparison, dataset = load(tmp_path / "split.toml")
    leaf_fits = fit_leaves(dataset)
    fits = {n: fit_structure(comparison.structure(n), dataset, comparison.data, DEMO_CASE_SAMPLER, leaf_fits=leaf_fits)
            for n in ("common", "split")}
    coefs = fits["split"].design.coefficients
    w = next(k for k, c in enumerate(coefs) if c.kind == "within")
    b = next(k for k, c in enumerate(coefs) if c.kind == "between")
    beta = fits["split"].draws.params["beta"].reshape(-1, len(coefs))
    within, between = beta[:, w], beta[:, b]
    slope = GEN["n_slope"]
    lo, hi = np.quantile(within, [0.05, 0.95])
    assert lo < slope < hi                                        # within-taxon slope recovered
    assert np.quantile(between, 0.95) < 0 < slope                 # the between-taxon slope has the other sign
    diff = fits["split"].draws.params["split_diff"].reshape(-1)
    assert np.quantile(diff, 0.95) < 0                            # and the difference is reported as such
    k = next(k for k, c in enumerate(fits["common"].design.coefficients) if c.term == "n_area")
    common = fits["common"].draws.params["beta"].reshape(-1, len(fits["common"].design.coefficients))[:, k]
    assert abs(np.mean(common) - slope) > abs(np.mean(within) - slope)   # one common slope mixes the two
