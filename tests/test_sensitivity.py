"""Power-scaling sensitivity (leafcv.sensitivity) against closed forms.

Conjugate normal model: y_i ~ normal(mu, s^2) with s known, mu ~ normal(m0, t^2). Raising the prior to
the power a gives a normal prior of precision a / t^2; raising the likelihood to a multiplies the data
precision n / s^2 by a. Either way the posterior of mu is normal with
    precision = a_prior / t^2 + a_lik n / s^2,   mean = (a_prior m0 / t^2 + a_lik n ybar / s^2) / precision
(standard conjugate result, e.g. Gelman et al. 2013, Bayesian Data Analysis, 3rd ed., eq. 2.12).
The cumulative Jensen-Shannon distance between the exact base and scaled posteriors is computed by
numerical integration of their CDFs (SciPy quad), independently of leafcv's ECDF code, over the range
of the draws (Nguyen & Vreeken 2015 definition; normalised as in Kallioinen et al. 2023).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from leafcv import sensitivity as sens

S = 4000
DELTA = sens.DELTA


def posterior(m0, t, ybar, n, s, a_prior=1.0, a_lik=1.0):
    prec = a_prior / t**2 + a_lik * n / s**2
    return (a_prior * m0 / t**2 + a_lik * n * ybar / s**2) / prec, prec ** -0.5


def closed_cjs(base, scaled, lo, hi):
    """CJS distance between two normal CDFs on [lo, hi] (both directions of the axis, the larger)."""
    def one(P, Q):
        def pq(x, F, G):
            f, g = F(x), G(x)
            m = 0.5 * (f + g)
            return f * np.log2(f / m) if f > 0 else 0.0
        ip = integrate.quad(P, lo, hi, limit=200)[0]
        iq = integrate.quad(Q, lo, hi, limit=200)[0]
        a = integrate.quad(pq, lo, hi, args=(P, Q), limit=200)[0] + (iq - ip) / (2 * np.log(2))
        b = integrate.quad(pq, lo, hi, args=(Q, P), limit=200)[0] + (ip - iq) / (2 * np.log(2))
        return np.sqrt((max(a, 0) + max(b, 0)) / (ip + iq))
    return max(one(base.cdf, scaled.cdf), one(base.sf, scaled.sf))


def closed_sensitivity(m0, t, ybar, n, s, which, lo, hi):
    m, sd = posterior(m0, t, ybar, n, s)
    base = stats.norm(m, sd)
    total = 0.0
    for sign in (-1, 1):
        a = 2.0 ** (sign * DELTA)
        kw = {"a_prior": a} if which == "prior" else {"a_lik": a}
        total += closed_cjs(base, stats.norm(*posterior(m0, t, ybar, n, s, **kw)), lo, hi)
    return total / (2 * DELTA)


def conjugate_case(m0, t, n, s, true_mu, seed):
    rng = np.random.default_rng(seed)
    y = rng.normal(true_mu, s, n)
    m, sd = posterior(m0, t, y.mean(), n, s)
    mu = rng.normal(m, sd, S)                       # exact draws of the base posterior
    log_prior = stats.norm.logpdf(mu, m0, t)
    log_lik = stats.norm.logpdf(y[None, :], mu[:, None], s).sum(axis=1)
    return y, mu, log_prior, log_lik


CASES = {
    # (m0, t, n, s, true mu): what the paper's diagnosis should say
    "vague prior": (0.0, 100.0, 20, 1.0, 0.5, sens.NONE),
    "informative prior, in conflict with the data": (0.0, 0.05, 20, 1.0, 2.0, sens.CONFLICT),
    "data weak against the prior": (0.0, 0.1, 3, 5.0, 0.0, sens.WEAK),
}


@pytest.mark.parametrize("case", list(CASES))
def test_sensitivity_matches_the_closed_form_and_is_diagnosed(case):
    m0, t, n, s, true_mu, expected = CASES[case]
    y, mu, lp, ll = conjugate_case(m0, t, n, s, true_mu, seed=11)
    table = sens.sensitivity_table(mu[:, None], ["mu"], lp, ll)
    for which in ("prior", "likelihood"):
        exact = closed_sensitivity(m0, t, y.mean(), n, s, which, mu.min(), mu.max())
        got = float(table[which].iloc[0])
        # tolerance: 0.02 absolute + 15 % relative; Monte Carlo error of the ECDF-based distance with 4000
        # draws, measured over seeds 0-9 of all three cases (largest error 0.014 absolute); a stated tolerance, no source
        assert abs(got - exact) <= 0.02 + 0.15 * exact, (case, which, got, exact)
    assert table["diagnosis"].iloc[0] == expected, table


def test_cjs_distance_of_equal_weights_is_zero_and_grows_with_a_shift():
    rng = np.random.default_rng(2)
    x = rng.normal(size=2000)
    assert sens.cjs_distance(x, np.ones_like(x)) == pytest.approx(0.0, abs=1e-6)   # rounding: sqrt of a sum near 1e-16
    d = [sens.cjs_distance(x, stats.norm.pdf(x, m, 1) / stats.norm.pdf(x)) for m in (0.05, 0.2, 0.5)]
    assert 0 < d[0] < d[1] < d[2]


def test_power_scaled_weights_reproduce_the_closed_form_posterior_mean():
    # importance weights p^(a - 1) of the prior turn base draws into draws of the scaled posterior:
    # its mean is the closed-form one (within Monte Carlo error)
    m0, t, n, s = 0.0, 0.3, 10, 1.0
    y, mu, lp, _ = conjugate_case(m0, t, n, s, 1.0, seed=4)
    a = 2.0 ** 0.5
    w, khat = sens.scaled_weights(lp, a)
    exact_mean, exact_sd = posterior(m0, t, y.mean(), n, s, a_prior=a)
    assert khat < sens.KHAT_LIMIT
    assert abs(np.sum(w * mu) - exact_mean) < 4 * exact_sd / np.sqrt(S / 2)


def test_log_prior_matches_scipy_closed_forms_for_each_prior_family():
    # one design's prior parts, evaluated term by term with scipy.stats: normal and beta-on-logit
    # intercepts, normal coefficients, half-normal SDs, gamma df, LKJ(eta) on a 2 x 2 correlation whose
    # density is proportional to (1 - r^2)^(eta - 1) (Lewandowski, Kurowicka & Joe 2009), i.e. in the
    # Cholesky factor L22 = sqrt(1 - r^2), proportional to L22^(2 eta - 2) times the Jacobian L22^(K - 2)
    class D:
        stan_data = {"prior_family": [1, 2], "prior_a": np.array([1.0, 5.0]), "prior_b": np.array([0.5, 2.0]),
                     "beta_sd": np.array([0.3]), "tau_sd": np.array([0.5]), "leaf_tau_sd": np.array([0.5, 0.2]),
                     "sigma_sd": 2.0, "student_t": 1, "nu_shape": 2.0, "nu_rate": 0.1, "leaf_corr": 1,
                     "Rl": 2, "lkj_eta": 2.0}
    rng = np.random.default_rng(0)
    n = 5
    r = rng.uniform(-0.9, 0.9, n)
    chol = np.zeros((n, 2, 2))
    chol[:, 0, 0], chol[:, 1, 0], chol[:, 1, 1] = 1.0, r, np.sqrt(1 - r**2)
    draws = {"b0": rng.normal(size=(n, 2)), "beta": rng.normal(size=(n, 1)), "tau": rng.uniform(0.1, 1, (n, 1)),
             "tau_leaf": rng.uniform(0.1, 1, (n, 2)), "sigma": rng.uniform(0.1, 3, (n, 1)),
             "nu": rng.uniform(2, 30, (n, 1)), "leaf_chol": chol[:, None]}
    x = draws["b0"][:, 1]
    theta = 1 / (1 + np.exp(-x))
    expected = (stats.norm.logpdf(draws["b0"][:, 0], 1.0, 0.5)
                + stats.beta.logpdf(theta, 5.0, 2.0) + np.log(theta * (1 - theta))
                + stats.norm.logpdf(draws["beta"][:, 0], 0, 0.3)
                + stats.halfnorm.logpdf(draws["tau"][:, 0], scale=0.5)
                + stats.halfnorm.logpdf(draws["tau_leaf"], scale=[0.5, 0.2]).sum(axis=1)
                + stats.halfnorm.logpdf(draws["sigma"][:, 0], scale=2.0)
                + stats.gamma.logpdf(draws["nu"][:, 0], 2.0, scale=10.0)
                + (2 * 2.0 - 2) * np.log(np.sqrt(1 - r**2)))
    got = sens.log_prior(D(), draws)
    # the LKJ term is without its normalising constant: one constant over draws
    assert np.ptp(got - expected) < 1e-10


def test_flagged_rows_get_a_sentence_naming_the_quantity():
    row = pd.Series({"quantity": "SD of leaf effects on alpha", "prior": 0.12, "likelihood": 0.01,
                     "diagnosis": sens.WEAK})
    text = sens.sentence(row)
    assert text.startswith("SD of leaf effects on alpha") and "0.12" in text and "prior largely decides" in text


def test_log_likelihood_matches_the_fvcb_model_point_by_point_in_any_block_size(quick_demo, monkeypatch):
    # leafcv.fvcb.net_assimilation is itself checked against the worked example of REFERENCES.md
    # (tests/test_fvcb.py); the normal log density from scipy.stats
    from leafcv import fvcb
    from leafcv.design import build_design

    comparison, dataset, _ = quick_demo
    design = build_design(comparison.structure("leaf-vcmax-alpha"), dataset, comparison.data)
    rng = np.random.default_rng(6)
    S, L = 7, dataset.n_leaves
    values = np.stack([rng.uniform(30, 90, (S, L)), rng.uniform(60, 160, (S, L)), rng.uniform(0.2, 0.4, (S, L)),
                       rng.uniform(0.5, 0.9, (S, L)), rng.uniform(0.5, 1.5, (S, L))], axis=-1)
    sigma = rng.uniform(0.3, 2.0, (S, 1))
    obs = dataset.obs.iloc[design.obs_index]
    li = obs["leaf_index"].to_numpy()
    expected = [stats.norm.logpdf(obs["a_net"].to_numpy(), fvcb.net_assimilation(
        obs["ci"].to_numpy(), obs["ppfd"].to_numpy(), obs["t_leaf"].to_numpy(), *(values[s][li, i] for i in range(5)),
        o2=obs["o2"].to_numpy()), sigma[s, 0]).sum() for s in range(S)]
    whole = sens.log_likelihood(design, values, sigma)
    monkeypatch.setattr(sens, "CHUNK_CELLS", 2 * len(obs))        # blocks of two draws
    blocks = sens.log_likelihood(design, values, sigma)
    assert np.allclose(whole, expected, rtol=1e-10) and np.allclose(blocks, expected, rtol=1e-10)
