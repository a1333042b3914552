"""Initial values from fast per-leaf least-squares fits (SciPy), dispersed across chains.

From Stan's random inits a hierarchical FvCB model can spend minutes in its first iterations
(DESIGN.md); from values near the data it samples normally. Each leaf's curves are fitted with
theta held at 0.7 (Ogren & Evans 1993, typical value), then the structure's intercepts, slopes,
group effects and SDs are set from those per-leaf values by least squares.

Tests: tests/test_fitting.py, tests/test_design.py, tests/sampling/test_fitting.py,
tests/sampling/stan/test_leafcv.py.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from . import fvcb
from .data.dataset import Dataset
from .design import Design, with_free_parameters
from .parameters import PARAMETER

THETA_INIT = 0.7
#: The parameters fitted per leaf (theta held at THETA_INIT), in the order of LeafFits.cov.
LEAF_FIT_PARAMETERS = ("vcmax25", "jmax25", "alpha", "rd25")


@dataclass(frozen=True)
class LeafFits:
    """Per-leaf least-squares estimates (natural scale), one array per parameter, and the RMSE."""

    values: dict[str, np.ndarray]
    rmse: float
    failed: tuple[int, ...]
    cov: np.ndarray        # (L, 4, 4) covariance of (log Vcmax25, log Jmax25, logit alpha, log Rd25)

    def link_values(self, param: str, ratio: bool) -> np.ndarray:
        """Per-leaf estimate of a parameter on its link scale (ratio: log of the ratio to Vcmax25).

        theta is held at THETA_INIT in these fits; parameters not fitted per leaf give NaN.
        """
        L = len(self.cov)
        if param == "theta":
            return np.full(L, PARAMETER["theta"].to_link(THETA_INIT))
        if param not in self.values:
            return np.full(L, np.nan)
        return PARAMETER[param].to_link(self.values[param], self.values["vcmax25"] if ratio else None)

    def link_se(self, param: str, ratio: bool) -> np.ndarray:
        """Per-leaf standard error of a parameter on its link scale (ratio: log of the ratio to Vcmax25).

        theta is not estimated per leaf: its standard error is infinite.
        """
        if param not in LEAF_FIT_PARAMETERS:
            return np.full(len(self.cov), np.inf)
        k = LEAF_FIT_PARAMETERS.index(param)
        if ratio and k in (1, 3):
            var = self.cov[:, k, k] + self.cov[:, 0, 0] - 2 * self.cov[:, 0, k]
        else:
            var = self.cov[:, k, k]
        return np.sqrt(np.clip(var, 0, None))


def fit_leaves(dataset: Dataset) -> LeafFits:
    """Least-squares FvCB fit of each leaf's points (Vcmax25, Jmax25, alpha, Rd25; theta fixed)."""
    obs = dataset.obs
    L = dataset.n_leaves
    pars = [PARAMETER[p] for p in LEAF_FIT_PARAMETERS]
    out = {p.name: np.empty(L) for p in pars}
    sq, n, failed = 0.0, 0, []
    cov = np.full((L, 4, 4), np.nan)
    # typical magnitudes (REFERENCES.md) as the start, each parameter's plausible bounds as the box
    start = [p.to_link(v) for p, v in zip(pars, (60.0, 110.0, 0.3, 1.0))]
    lo = [p.to_link(p.bounds[0]) for p in pars]
    hi = [p.to_link(p.bounds[1]) for p in pars]

    def natural(x):
        return [p.from_link(v) for p, v in zip(pars, x)]

    for leaf, rows in obs.groupby("leaf_index", sort=True):
        ci, q, t, o2, a = (rows[c].to_numpy(float) for c in ("ci", "ppfd", "t_leaf", "o2", "a_net"))

        def resid(x):
            v, j, al, rd = natural(x)
            return fvcb.net_assimilation(ci, q, t, v, j, al, THETA_INIT, rd, o2=o2) - a

        try:
            res = least_squares(resid, start, bounds=(lo, hi), method="trf", max_nfev=400)
            x, r = res.x, res.fun
            s2 = float(np.sum(r**2)) / max(len(r) - 4, 1)
            cov[leaf] = s2 * np.linalg.pinv(res.jac.T @ res.jac)
        except (ValueError, FloatingPointError, np.linalg.LinAlgError):
            failed.append(int(leaf))
            x, r = np.array(start), resid(np.array(start))
            cov[leaf] = np.diag(np.full(4, np.inf))
        for p, v in zip(pars, natural(x)):
            out[p.name][leaf] = v
        sq += float(np.sum(r**2))
        n += len(r)
    return LeafFits(out, float(np.sqrt(sq / max(n, 1))), tuple(failed), cov)


def structure_inits(design: Design, fits: LeafFits, dataset: Dataset, chains: int, seed: int,
                    spread: float = 0.1) -> list[dict]:
    """Initial values of the generic program for each chain, dispersed around the least-squares fit.

    ``spread`` is the SD of the jitter on link-scale quantities (and of the log of SDs).
    """
    L, P = design.n_leaves, len(design.parameters)
    train = design.train_leaves
    values = dict(fits.values)
    values["theta"] = np.full(L, THETA_INIT)
    values.setdefault("tpu25", 0.167 * values["vcmax25"] * 1.5)  # Harley et al. 1992 ratio, kept non-limiting
    link = np.empty((L, P))
    vcmax = np.clip(values["vcmax25"], *PARAMETER["vcmax25"].bounds)
    for i, par in enumerate(design.parameters):
        v = np.clip(values[par.name], *par.bounds)
        link[:, i] = par.to_link(v, vcmax if design.ratio.get(par.name) else None)
    base, cells = _population_inits(design, link, train)
    base["sigma"] = np.full(len(design.sigma_groups), max(_rmse(design, cells, dataset), 0.2))
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(chains):
        init = {k: np.array(v, float, copy=True) for k, v in base.items()}
        init["b0"] = init["b0"] + rng.normal(0, spread, P)
        init["beta"] = init["beta"] + rng.normal(0, spread, init["beta"].shape)
        for k in ("tau", "tau_leaf", "sigma"):
            init[k] = init[k] * np.exp(rng.normal(0, spread, init[k].shape))
        for k in ("u_c", "u_z", "eta_z"):
            init[k] = init[k] + rng.normal(0, spread, init[k].shape)
        init["eta_c"] = init["eta_c"] + rng.normal(0, spread, init["eta_c"].shape) * 0.5
        init = with_free_parameters(design, init)   # b0, u_z, tau, ... kept for readers
        out.append({k: (v.tolist() if np.ndim(v) else float(v)) for k, v in init.items()})
    return out


def _population_inits(design: Design, link: np.ndarray, train: np.ndarray) -> dict:
    """Least-squares decomposition of per-leaf link values into the structure's terms."""
    L, P = link.shape
    X = design.X
    b0 = np.empty(P)
    beta = np.zeros(len(design.coefficients))
    resid = np.empty_like(link)
    for i in range(P):
        cols = np.flatnonzero(design.coef_param == i)
        A = np.column_stack([np.ones(L)] + [X[:, c] for c in cols])[train]
        coef, *_ = np.linalg.lstsq(A, link[train, i], rcond=None)
        b0[i] = coef[0]
        beta[cols] = coef[1:]
        full = np.column_stack([np.ones(L)] + [X[:, c] for c in cols])
        resid[:, i] = link[:, i] - full @ coef
    u = np.zeros(len(design.lev_term))
    tau = np.full(len(design.group_terms), 0.1)
    for r, gt in enumerate(design.group_terms):
        if gt.slope_of:        # random slopes start at the fixed slope (deviations 0, SD 0.1)
            continue
        lev = gt.level_of_leaf
        i = design.params.index(gt.param)
        means = np.array([resid[train & (lev == k), i].mean() if (train & (lev == k)).any() else 0.0
                          for k in range(len(gt.levels))])
        u[gt.start:gt.start + len(gt.levels)] = means
        tau[r] = max(float(np.std(means)), 0.05)
        resid[:, i] -= means[lev]
    # leaf terms: SD of what is left per parameter
    tau_leaf = np.full(len(design.leaf_terms), 0.1)
    for k, i in enumerate(design.leaf_term_params):
        tau_leaf[k] = max(float(np.std(resid[train, i])), 0.05)
    mu = link - resid  # population means per cell at the inits
    cen_lev, nc_lev = design.lev_centred, ~design.lev_centred
    lev_term = design.lev_term
    flat_link = link.T.reshape(-1)
    flat_mu = mu.T.reshape(-1)
    eta_z = (flat_link[design.nc_cells] - flat_mu[design.nc_cells]) / tau_leaf[design.nc_term]
    held_out = ~train
    if held_out.any() and len(design.nc_cells):
        # held-out leaves have no data: start them at the population mean
        cell_leaf = design.nc_cells % L
        eta_z[held_out[cell_leaf]] = 0.0
    leaf_params = {lt.param for lt in design.leaf_terms}
    cells = np.column_stack([link[:, i] if p in leaf_params else mu[:, i] for i, p in enumerate(design.params)])
    return {
        "b0": b0, "beta": beta, "tau": tau,
        "u_c": u[cen_lev], "u_z": u[nc_lev] / tau[lev_term[nc_lev]],
        "tau_leaf": tau_leaf, "eta_c": flat_link[design.cen_cells], "eta_z": np.clip(eta_z, -3, 3),
        "nu": np.array([10.0])[: int(design.student_t)],
        **({"leaf_chol": np.eye(len(design.leaf_terms))[None]} if design.leaf_correlation else {}),
    }, cells


def _rmse(design: Design, cells: np.ndarray, dataset: Dataset) -> float:
    """RMSE of the training points at link-scale leaf values ``cells`` (L, P)."""
    from .design import natural_values

    nat = natural_values(design, cells)
    obs = dataset.obs.iloc[design.obs_index]
    li = obs["leaf_index"].to_numpy()
    pred = fvcb.net_assimilation(
        obs["ci"].to_numpy(float), obs["ppfd"].to_numpy(float), obs["t_leaf"].to_numpy(float),
        nat["vcmax25"][li], nat["jmax25"][li], nat["alpha"][li], nat["theta"][li], nat["rd25"][li],
        o2=obs["o2"].to_numpy(float))
    return float(np.sqrt(np.mean((pred - obs["a_net"].to_numpy(float)) ** 2)))


def cold_scaling(design: Design, fits: LeafFits) -> dict[str, np.ndarray]:
    """The program's scale_offset / scale_mult for a fit started afresh: every free parameter scaled by a
    rough guess of its posterior SD from the per-leaf least-squares fits, so that the sampler's first
    warm-up iterations (run with a unit metric) do not crawl along the narrowest direction. An exact
    reparameterisation: a guess that is off costs warm-up time only, never accuracy. The guesses (common
    practice, no source): a population mean to the between-leaf SD over sqrt(leaves); a trait slope to
    that over the trait's SD; the log of an SD of K levels to 1 / sqrt(2 (K - 1)); a well-measured leaf's
    own value to its least-squares standard error; a residual SD's log to 1 / sqrt(2 points); the log of a
    smooth's SD to 1 / sqrt(2 (columns - 1)), as for levels; standard-normal effects to 1. Offsets stay 0."""
    L, P = design.n_leaves, len(design.parameters)
    train = design.train_leaves
    n = max(int(train.sum()), 2)
    spread, se = np.full(P, np.nan), np.full((L, P), np.inf)
    for i, p in enumerate(design.params):
        v = fits.link_values(p, bool(design.ratio.get(p)))[train]
        if p != "theta" and np.isfinite(v).sum() > 1:
            spread[i] = float(np.nanstd(v))
            se[:, i] = fits.link_se(p, bool(design.ratio.get(p)))
    spread = np.where(np.isfinite(spread), spread, 0.3)
    b0 = np.clip(spread / np.sqrt(n), 0.01, 1.0)
    X = design.X
    beta = np.ones(len(design.coefficients))
    for k, i in enumerate(design.coef_param):
        sd_x = float(np.std(X[train, k]))
        beta[k] = np.clip(b0[i] / sd_x, 1e-4, 10.0) if sd_x > 0 else 1.0
    levels = np.array([len(g.levels) for g in design.group_terms], float)
    log_tau = 1 / np.sqrt(2 * np.maximum(levels - 1, 1))
    lev_par = np.array([design.params.index(g.param) for g in design.group_terms], int)
    cen_term = design.lev_term[design.lev_centred]
    u_c = np.clip(b0[lev_par[cen_term]] * np.sqrt(levels[cen_term]), 0.01, 1.0) if len(cen_term) else np.zeros(0)
    cells = design.cen_cells
    cell_leaf, cell_par = cells % L, cells // L
    eta_c = np.clip(se[cell_leaf, cell_par], 0.01, np.maximum(spread[cell_par], 0.01))
    eta_c = np.where(np.isfinite(eta_c), eta_c, np.maximum(spread[cell_par], 0.01))
    counts = np.bincount(design.points.sigma_group, minlength=len(design.sigma_groups))
    log_sigma = 1 / np.sqrt(2 * np.maximum(counts, 1))
    mult = np.concatenate([b0, beta, log_tau, u_c, np.ones(int((~design.lev_centred).sum())),
                           np.full(len(design.leaf_terms), 1 / np.sqrt(2 * (n - 1))), eta_c,
                           np.ones(len(design.nc_cells)),
                           1 / np.sqrt(2 * np.array([max(st.size - 1, 1) for st in design.smooth_terms], float)),
                           np.ones(design.Zs.shape[1]), log_sigma])
    return {"n_scale": int(mult.size), "scale_offset": np.zeros(mult.size), "scale_mult": mult.astype(float)}
