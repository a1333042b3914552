"""bench/sbc.py's simultaneous band for rank ECDFs (Säilynoja, Bürkner & Vehtari 2022: a band of
simultaneous level 1 - alpha holds the whole ECDF of uniform ranks with probability 1 - alpha), checked by
its coverage on fresh uniform samples, and its power against the classic SBC failure shapes (Talts et
al. 2018, Fig. 4: a too-narrow posterior gives U-shaped ranks, a biased one piles ranks at one end)."""
from __future__ import annotations

import numpy as np
from scipy import stats

from bench import sbc


def test_band_holds_uniform_ranks_with_its_stated_probability():
    n, m = 100, 100
    gamma = sbc.band_gamma(n, m, level=0.99, sims=10_000, seed=1)
    rng = np.random.default_rng(99)                        # fresh samples, not those the band was set on
    inside = sbc.min_tail(rng.integers(0, m + 1, size=(4000, n)), m) >= gamma
    # expected 0.99; a binomial 99.9 % interval for 4000 samples (scipy)
    lo, hi = stats.binom.ppf([0.0005, 0.9995], 4000, 0.99) / 4000
    assert lo <= inside.mean() <= hi, inside.mean()


def test_band_rejects_a_too_narrow_and_a_biased_posterior():
    n, m = 100, 100
    gamma = sbc.band_gamma(n, m, sims=5000, seed=2)
    rng = np.random.default_rng(5)
    # the true value in the posterior's tails too often: ranks from a beta(0.6, 0.6) (U shape)
    narrow = np.floor(rng.beta(0.6, 0.6, n) * (m + 1)).astype(int)
    biased = np.floor(rng.beta(1.6, 1.0, n) * (m + 1)).astype(int)
    assert sbc.min_tail(narrow[None, :], m)[0] < gamma
    assert sbc.min_tail(biased[None, :], m)[0] < gamma


def test_band_edges_are_binomial_quantiles_at_the_rank_values():
    z, lo, hi = sbc.band(50, 9, 0.01)
    assert np.allclose(z, np.arange(1, 10) / 10)
    assert np.allclose(lo, stats.binom.ppf(0.005, 50, z) / 50) and np.allclose(hi, stats.binom.ppf(0.995, 50, z) / 50)
