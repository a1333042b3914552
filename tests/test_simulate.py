"""Replicate studies of `leafcv.simulate`, without a sampler: the replicate data against the FvCB model
and the fitted distributions they are drawn from, the resized design, and the replicate's comparison
file read back with every check. A whole `leafcv simulate` on a run: tests/sampling/test_simulate.py.
"""
from __future__ import annotations

import tomllib

import numpy as np
import pytest
from scipy import stats
from scipy.special import expit

from leafcv import fvcb
from leafcv.api import load
from leafcv.comparison import check_against_data, load_comparison
from leafcv.comparison.writing import comparison_text
from leafcv.data import load_dataset
from leafcv.demo import GEN, write_demo
from leafcv.design import build_design
from leafcv.simulate import (SimulationSettings, replicate_comparison, replicate_frame, resized_leaves,
                             truth_of)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    path = write_demo(tmp_path_factory.mktemp("sim"), quick=True)
    comparison, dataset = load(path)
    design = build_design(comparison.structure("leaf-vcmax-alpha"), dataset, comparison.data)
    return path, comparison, dataset, design


def _draws(design, S=3, tau_leaf=(0.1, 0.1), sigma=0.5):
    """Population draws by hand for the structure with leaf effects on Vcmax25 and alpha (no terms)."""
    b0 = np.array([np.log(GEN["vcmax25_ref"]), np.log(GEN["jmax_ratio"]), np.log(GEN["alpha_ref"] / (1 - GEN["alpha_ref"])),
                   np.log(GEN["theta"] / (1 - GEN["theta"])), np.log(GEN["rd_ratio"])])
    assert design.params == ("vcmax25", "jmax25", "alpha", "theta", "rd25")
    return {"b0": np.tile(b0, (S, 1)), "tau_leaf": np.tile(tau_leaf, (S, 1)), "sigma": np.full((S, 1), sigma)}


def test_without_leaf_effects_or_noise_a_replicate_is_the_fvcb_model_at_the_population_values(demo):
    """A = min(Wc, Wj) - Rd (Farquhar, von Caemmerer & Berry 1980) at the population values of the draw,
    computed point by point with `leafcv.fvcb.net_assimilation` (tested against the worked example of
    REFERENCES.md in tests/test_fvcb.py)."""
    _, _, dataset, design = demo
    draws = _draws(design, tau_leaf=(0.0, 0.0), sigma=1e-12)
    frame = replicate_frame(design, dataset, draws, 1, resized_leaves(dataset, None, None), np.random.default_rng(1))
    obs = dataset.obs
    assert len(frame) == len(obs)
    v = GEN["vcmax25_ref"]
    expected = fvcb.net_assimilation(obs["ci"].to_numpy(), obs["ppfd"].to_numpy(), obs["t_leaf"].to_numpy(), v,
                                     GEN["jmax_ratio"] * v, GEN["alpha_ref"], GEN["theta"], GEN["rd_ratio"] * v,
                                     o2=obs["o2"].to_numpy())
    np.testing.assert_allclose(frame["net_assimilation"].to_numpy(), expected, atol=1e-4)   # rounded to 4 places
    np.testing.assert_array_equal(frame["intercellular_co2"].to_numpy(), obs["ci"].to_numpy())


def test_residuals_and_leaf_effects_follow_their_fitted_distributions(demo):
    """Residuals are N(0, sigma^2): with no leaf effects, sum((A - A_model)^2) / sigma^2 is chi-square
    with n degrees of freedom (SciPy). Leaf effects on logit alpha are N(0, tau^2): the A-Q curves'
    initial slopes differ between leaves, and at sigma ~ 0 each leaf's alpha is recovered from its
    lowest-light point exactly; their logits have SD tau (chi-square test of the variance)."""
    _, _, dataset, design = demo
    rng = np.random.default_rng(3)
    source = resized_leaves(dataset, "campaign", 40)
    frame = replicate_frame(design, dataset, _draws(design, tau_leaf=(0.0, 0.0), sigma=0.5), 0, source, rng)
    v = GEN["vcmax25_ref"]
    model = fvcb.net_assimilation(frame["intercellular_co2"], frame["photon_flux"], frame["leaf_temperature"], v,
                                  GEN["jmax_ratio"] * v, GEN["alpha_ref"], GEN["theta"], GEN["rd_ratio"] * v)
    chi2 = float(np.sum((frame["net_assimilation"] - model) ** 2) / 0.5**2)
    n = len(frame)
    assert stats.chi2.sf(chi2, n) > 1e-3 and stats.chi2.cdf(chi2, n) > 1e-3, (chi2, n)

    tau = 0.3
    frame = replicate_frame(design, dataset, _draws(design, tau_leaf=(0.0, tau), sigma=1e-12), 0, source, rng)
    logits = []
    for leaf, pts in frame.groupby("leaf"):
        low = pts[(pts["photon_flux"] > 0) & (pts["photon_flux"] <= 25)].iloc[0]
        grid = np.linspace(-3, 1, 4001)
        a = fvcb.net_assimilation(low["intercellular_co2"], low["photon_flux"], low["leaf_temperature"], v,
                                  GEN["jmax_ratio"] * v, expit(grid), GEN["theta"], GEN["rd_ratio"] * v)
        logits.append(grid[np.argmin(np.abs(a - low["net_assimilation"]))])
    logits = np.asarray(logits)
    k = len(logits)
    assert k == 3 * 40
    s2 = np.sum((logits - np.log(GEN["alpha_ref"] / (1 - GEN["alpha_ref"]))) ** 2) / tau**2
    assert stats.chi2.sf(s2, k) > 1e-3 and stats.chi2.cdf(s2, k) > 1e-3, (s2, k)


def test_resized_design_has_n_leaves_per_level_copied_from_that_level(demo):
    _, _, dataset, _ = demo
    source = resized_leaves(dataset, "taxon", 7)
    levels = dataset.leaves["taxon"].astype(str).to_numpy()
    assert len(source) == 7 * len(set(levels))
    for lev in set(levels):
        own = np.flatnonzero(levels == lev)
        picked = source[levels[source] == lev]
        assert len(picked) == 7 and set(picked) == set(own)       # every own leaf used, in turn


def test_a_replicates_comparison_file_reads_back_with_every_check(demo, tmp_path):
    path, comparison, dataset, design = demo
    raw = tomllib.loads(path.read_text())
    settings = SimulationSettings("leaf-vcmax-alpha", 1, None, None, 2, 50, 50, 1, "run")
    frame = replicate_frame(design, dataset, _draws(design), 0, resized_leaves(dataset, None, None),
                            np.random.default_rng(0))
    frame.to_csv(tmp_path / "observations.csv", index=False)
    (tmp_path / "comparison.toml").write_text(comparison_text(replicate_comparison(raw, design, dataset, settings)))
    rep = load_comparison(tmp_path / "comparison.toml")
    data = load_dataset(rep.data)
    assert check_against_data(rep, data) == []
    assert [s.name for s in rep.structures] == [s.name for s in comparison.structures]
    assert (rep.sampler.chains, rep.sampler.warmup, rep.sampler.draws) == (2, 50, 50)
    # the replicate's design centres traits where the run's did, so its parameters mean the same
    rep_design = build_design(rep.structure("traits-month-fixed"), data, rep.data)
    run_design = build_design(comparison.structure("traits-month-fixed"), dataset, comparison.data)
    assert rep_design.trait_transform == pytest.approx(run_design.trait_transform)
    np.testing.assert_allclose(rep_design.X, run_design.X)


def test_truth_is_the_draws_values_by_label():
    draws = {"b0": np.array([[1.0, 2.0], [3.0, 4.0]]), "sigma": np.array([[0.5], [0.7]])}
    labels = {"b0": ["b0[a]", "b0[b]"], "sigma": ["sigma[all]"]}
    assert truth_of(draws, labels, 1) == {"b0[a]": 3.0, "b0[b]": 4.0, "sigma[all]": 0.7}
