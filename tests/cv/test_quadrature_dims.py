"""Quadrature in 1 to 5 dimensions against the closed-form marginal likelihood of a Gaussian linear
model, y ~ N(X b, s^2 I), b ~ N(mu, diag(sd^2)): y ~ N(X mu, s^2 I + X diag(sd^2) X') (BDA3 ch. 14,
conjugate normal linear regression). The integrand is Gaussian, so the Laplace-adaptive rules
(Gauss-Hermite up to 3 dimensions, scrambled Sobol beyond) are exact up to rounding."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from leafcv.cv.quadrature import MAX_TENSOR_DIM, leaf_log_marginal


@pytest.mark.parametrize("d", [1, 2, 3, 4, 5])
def test_gaussian_linear_model_marginal(d):
    rng = np.random.default_rng(d)
    n, S = 15, 300
    X = rng.normal(size=(n, d))
    s = 0.6
    y = X @ rng.normal(size=d) + rng.normal(0, s, n)
    mean = rng.normal(0, 0.5, (S, d))
    sd = rng.uniform(0.3, 1.5, (S, d))

    def rows_fn(rows):
        def ll(b):
            return stats.norm.logpdf(y, np.einsum("sqd,nd->sqn", b, X), s).sum(-1)
        return ll

    lm, info = leaf_log_marginal(rows_fn, mean, sd, np.zeros((S, d)))
    exact = np.array([stats.multivariate_normal.logpdf(y, X @ mean[k], s**2 * np.eye(n) + X @ np.diag(sd[k]**2) @ X.T)
                      for k in range(S)])
    assert np.max(np.abs(lm - exact)) < 1e-6
    assert info.n_escalated == 0 and info.n_unresolved == 0
    assert (d > MAX_TENSOR_DIM) == (d >= 4)
