"""One leaf's FvCB likelihood as a function of its own link-scale parameter values, per posterior draw.

Feeds the quadrature of `leafcv.cv.quadrature`: the leaf's effects b are the link-scale values of the
parameters that have leaf effects (e.g. log Vcmax25 and logit alpha); every other quantity is taken
from the posterior draw (population values, group effects known from training, sigma).
"""
from __future__ import annotations

import numpy as np
from scipy import stats

from .. import fvcb
from ..data.dataset import Dataset
from ..design import Design, heldout_levels, leaf_cov_chol, level_values, natural_values
from ..terms import responses
from ..data.dataset import LEAF_TERM


def flatten_draws(params: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """(chains, draws, *shape) -> (chains * draws, *shape)."""
    return {k: v.reshape((v.shape[0] * v.shape[1],) + v.shape[2:]) for k, v in params.items()}


class LeafModel:
    """Per-draw likelihood of one leaf's points and its population distribution of effects."""

    def __init__(self, design: Design, dataset: Dataset, draws: dict[str, np.ndarray],
                 link_values: tuple[np.ndarray, np.ndarray], leaf: int, integrate_heldout: bool = True):
        """``integrate_heldout``: integrate the effects of the leaf's held-out levels into its own
        effects (variances added: the leaf alone); False leaves them out of the leaf's mean and lists
        them in ``shared`` as (term r, level, parameter index, covariate x), for a caller that
        integrates one level effect shared by all the leaves of that level (`leafcv.cv.heldout`)."""
        self.design, self.leaf = design, leaf
        obs = dataset.obs[dataset.obs["leaf_index"] == leaf]
        self.points = obs
        self.y = obs["a_net"].to_numpy(float)
        self.factors = self.factors_at(*(obs[c].to_numpy(float) for c in ("ci", "ppfd", "t_leaf", "o2")))
        mu, eta = link_values
        self.mu, self.eta = mu[:, leaf, :].copy(), eta[:, leaf, :].copy()          # (S, P)
        S = len(self.mu)
        leaf_pars = design.leaf_term_params
        # a level with no training leaf (a held-out species or month) is integrated too: its effect
        # u ~ N(0, tau^2) enters the link value as u x, so the leaf's value on that parameter is
        # normal with the variances added (independent normal terms; random slopes scale by x^2)
        extra: dict[int, np.ndarray] = {}
        self.heldout = heldout_levels(design, leaf)
        self.shared: list[tuple[int, int, int, float]] = []
        if self.heldout:
            u = level_values(design, draws)
            for r, lev in self.heldout:
                gt = design.group_terms[r]
                pi = design.param_index(gt.param)
                x = float(gt.x[leaf])
                self.mu[:, pi] -= u[:, lev] * x
                if pi not in leaf_pars:
                    self.eta[:, pi] -= u[:, lev] * x    # no leaf effect: its value is the population mean
                if integrate_heldout:
                    extra[pi] = extra.get(pi, np.zeros(S)) + (draws["tau"][:, r] * x) ** 2
                else:
                    self.shared.append((r, lev, pi, x))
        self.effect_params = sorted(set(leaf_pars) | set(extra))
        pos = [self.effect_params.index(pi) for pi in leaf_pars]
        cov = np.zeros((S, self.dim, self.dim))
        if leaf_pars:
            lc = leaf_cov_chol(design, draws)               # diagonal unless leaf effects are correlated
            cov[:, np.array(pos)[:, None], np.array(pos)[None, :]] = lc @ lc.transpose(0, 2, 1)
        for pi, v in extra.items():
            k = self.effect_params.index(pi)
            cov[:, k, k] += v
        if design.leaf_correlation:
            self.sd = np.linalg.cholesky(cov)               # prior scale as a Cholesky factor (S, d, d)
        else:
            self.sd = np.sqrt(np.diagonal(cov, axis1=1, axis2=2)).copy()   # SDs (S, d)
        sig = draws["sigma"]
        self.sigma_draws = sig
        if design.sigma_kinds:
            # residual SDs are per curve type of the training points, in the design's order
            kinds = list(design.sigma_kinds)
            here = obs["curve_type"].to_numpy()
            missing = sorted(set(here) - set(kinds))
            if missing:
                from ..errors import SpecError

                leaf_id = dataset.leaves[LEAF_TERM].iloc[leaf]
                raise SpecError(design.structure.name, [
                    f"leaf {leaf_id!r} has {', '.join(missing)} curves, but the fit has no training points of that "
                    f"curve type, so their residual SD is unknown; use sigma = \"shared\" or keep such leaves in training"])
            self.sigma = sig[:, [kinds.index(k) for k in here]]
        else:
            self.sigma = np.repeat(sig[:, :1], len(self.y), axis=1)
        self.nu = draws["nu"][:, 0] if design.student_t else None

    def sigma_of(self, curve_type: str) -> np.ndarray:
        """Residual SD of a new point of ``curve_type`` per draw, (S,)."""
        kinds = list(self.design.sigma_kinds)
        return self.sigma_draws[:, kinds.index(curve_type)] if kinds else self.sigma_draws[:, 0]

    @property
    def dim(self) -> int:
        return len(self.effect_params)

    def mean_sd(self) -> tuple[np.ndarray, np.ndarray]:
        """Population mean and SD of the leaf's effects per draw, (S, d)."""
        return self.mu[:, self.effect_params], self.sd

    def own_values(self) -> np.ndarray:
        """The leaf's effect values in each draw, (S, d)."""
        return self.eta[:, self.effect_params]

    def assimilation(self, eta: np.ndarray) -> np.ndarray:
        """Predicted A at the leaf's points for link-scale values eta (..., P) -> (..., n)."""
        return self.assimilation_at(eta, self.factors)

    def assimilation_at(self, eta: np.ndarray, factors: fvcb.PointFactors) -> np.ndarray:
        """Predicted A at other points (``factors``, e.g. a Ci or PPFD grid) for link-scale values eta
        (..., P) -> (..., n)."""
        nat = {k: v[..., None] for k, v in natural_values(self.design, eta).items()}
        opts = self.design.options
        return factors.net_assimilation(nat["vcmax25"], nat["jmax25"], nat["alpha"], nat["theta"], nat["rd25"],
                                        nat.get("tpu25"), opts.transition, opts.smooth_curvature)

    def factors_at(self, ci, q, t_leaf, o2) -> fvcb.PointFactors:
        """PointFactors of this model's options at other points."""
        r = responses(self.design.options)
        return fvcb.PointFactors.at(ci, q, t_leaf, o2, electron=self.design.options.electron,
                                    vcmax_response=r["vcmax"], jmax_response=r["jmax"], rd_response=r["rd"],
                                    tpu_response=r["tpu"])

    def loglik_rows(self, rows: np.ndarray):
        """b (len(rows), Q, d) -> log-likelihood of the leaf's points (len(rows), Q)."""
        base = self.eta[rows]
        sigma = self.sigma[rows][:, None, :]
        nu = None if self.nu is None else self.nu[rows][:, None, None]
        eff = self.effect_params

        def ll(b: np.ndarray) -> np.ndarray:
            eta = np.repeat(base[:, None, :], b.shape[1], axis=1)
            eta[..., eff] = b
            a_hat = self.assimilation(eta)
            if nu is None:
                z = (self.y - a_hat) / sigma
                return np.sum(-0.5 * z**2 - np.log(sigma) - 0.5 * np.log(2 * np.pi), axis=-1)
            return np.sum(stats.t.logpdf(self.y, nu, a_hat, sigma), axis=-1)

        return ll

    def fixed_loglik(self) -> np.ndarray:
        """log p(y | theta_s) per draw, (S,), for a leaf with no integrated effects (dim 0)."""
        S = len(self.eta)
        return self.loglik_rows(np.arange(S))(np.zeros((S, 1, 0)))[:, 0]

    def pointwise_loglik(self) -> np.ndarray:
        """log p(y_i | theta_s, the leaf's own values in draw s), (S, n): the conditional likelihood."""
        a_hat = self.assimilation(self.eta)
        return stats.norm.logpdf(self.y, a_hat, self.sigma) if self.nu is None else \
            stats.t.logpdf(self.y, self.nu[:, None], a_hat, self.sigma)

    def predictive_mean(self, n_nodes: int = 5) -> np.ndarray:
        """E[A_i | theta_s] with the leaf's effects integrated over N(mu_s, sd_s), (S, n).

        A is smooth in the effects away from the kink of the minimum; 5 Gauss-Hermite nodes per
        dimension (exact for polynomials of degree 9) are ample for held-out RMSE and R^2.
        """
        from .quadrature import gh_grid, prior_chol

        if self.dim == 0:
            return self.assimilation(self.eta)
        z, lw = gh_grid(n_nodes, self.dim)
        mean, sd = self.mean_sd()
        b = mean[:, None, :] + np.einsum("sij,qj->sqi", prior_chol(sd), z)
        eta = np.repeat(self.eta[:, None, :], len(z), axis=1)
        eta[..., self.effect_params] = b
        return np.einsum("q,sqn->sn", np.exp(lw), self.assimilation(eta))
