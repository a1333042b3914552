"""Initial values from fast per-leaf least-squares fits (SciPy), dispersed across chains.

From Stan's random inits a hierarchical FvCB model can spend minutes in its first iterations
(DESIGN.md); from values near the data it samples normally. Each leaf's curves are fitted with
theta held at 0.7 (Ogren & Evans 1993, typical value), then the structure's intercepts, slopes,
group effects and SDs are set from those per-leaf values by least squares.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares
from scipy.special import logit

from . import fvcb
from .data.dataset import Dataset
from .design import Design, with_free_parameters

THETA_INIT = 0.7
#: Plausible ranges used to clip per-leaf estimates (REFERENCES.md typical magnitudes).
_BOUNDS = {"vcmax25": (3.0, 400.0), "jmax25": (5.0, 800.0), "alpha": (0.03, 0.9), "rd25": (0.01, 10.0),
           "tpu25": (0.5, 60.0)}


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
            return np.full(L, logit(THETA_INIT))
        if param not in self.values:
            return np.full(L, np.nan)
        if param == "alpha":
            return logit(self.values["alpha"])
        if ratio:
            return np.log(self.values[param] / self.values["vcmax25"])
        return np.log(self.values[param])

    def link_se(self, param: str, ratio: bool) -> np.ndarray:
        """Per-leaf standard error of a parameter on its link scale (ratio: log of the ratio to Vcmax25).

        theta is not estimated per leaf: its standard error is infinite.
        """
        k = {"vcmax25": 0, "jmax25": 1, "alpha": 2, "rd25": 3}.get(param)
        if k is None:
            return np.full(len(self.cov), np.inf)
        if ratio and k in (1, 3):
            var = self.cov[:, k, k] + self.cov[:, 0, 0] - 2 * self.cov[:, 0, k]
        else:
            var = self.cov[:, k, k]
        return np.sqrt(np.clip(var, 0, None))


def fit_leaves(dataset: Dataset) -> LeafFits:
    """Least-squares FvCB fit of each leaf's points (Vcmax25, Jmax25, alpha, Rd25; theta fixed)."""
    obs = dataset.obs
    L = dataset.n_leaves
    out = {k: np.empty(L) for k in ("vcmax25", "jmax25", "alpha", "rd25")}
    sq, n, failed = 0.0, 0, []
    cov = np.full((L, 4, 4), np.nan)
    start = np.log([60.0, 110.0]).tolist() + [logit(0.3), np.log(1.0)]
    lo = np.log([_BOUNDS["vcmax25"][0], _BOUNDS["jmax25"][0]]).tolist() + [logit(0.03), np.log(0.01)]
    hi = np.log([_BOUNDS["vcmax25"][1], _BOUNDS["jmax25"][1]]).tolist() + [logit(0.9), np.log(10.0)]
    for leaf, rows in obs.groupby("leaf_index", sort=True):
        ci, q, t, o2, a = (rows[c].to_numpy(float) for c in ("ci", "ppfd", "t_leaf", "o2", "a_net"))

        def resid(x):
            return fvcb.net_assimilation(ci, q, t, np.exp(x[0]), np.exp(x[1]), 1 / (1 + np.exp(-x[2])),
                                         THETA_INIT, np.exp(x[3]), o2=o2) - a

        try:
            res = least_squares(resid, start, bounds=(lo, hi), method="trf", max_nfev=400)
            x, r = res.x, res.fun
            s2 = float(np.sum(r**2)) / max(len(r) - 4, 1)
            cov[leaf] = s2 * np.linalg.pinv(res.jac.T @ res.jac)
        except (ValueError, FloatingPointError, np.linalg.LinAlgError):
            failed.append(int(leaf))
            x, r = np.array(start), resid(np.array(start))
            cov[leaf] = np.diag(np.full(4, np.inf))
        out["vcmax25"][leaf], out["jmax25"][leaf] = np.exp(x[0]), np.exp(x[1])
        out["alpha"][leaf], out["rd25"][leaf] = 1 / (1 + np.exp(-x[2])), np.exp(x[3])
        sq += float(np.sum(r**2))
        n += len(r)
    return LeafFits(out, float(np.sqrt(sq / max(n, 1))), tuple(failed), cov)


def structure_inits(design: Design, fits: LeafFits, dataset: Dataset, chains: int, seed: int,
                    spread: float = 0.1) -> list[dict]:
    """Initial values of the generic program for each chain, dispersed around the least-squares fit.

    ``spread`` is the SD of the jitter on link-scale quantities (and of the log of SDs).
    """
    d = design.stan_data
    L, P = d["L"], len(design.params)
    train = design.train_leaves
    values = dict(fits.values)
    values["theta"] = np.full(L, THETA_INIT)
    values.setdefault("tpu25", 0.167 * values["vcmax25"] * 1.5)  # Harley et al. 1992 ratio, kept non-limiting
    link = np.empty((L, P))
    for i, p in enumerate(design.params):
        lo, hi = _BOUNDS.get(p, (0.05, 0.99))
        v = np.clip(values[p], lo, hi)
        if p in ("alpha", "theta"):
            link[:, i] = logit(v)
        elif design.ratio.get(p):
            link[:, i] = np.log(v / np.clip(values["vcmax25"], *_BOUNDS["vcmax25"]))
        else:
            link[:, i] = np.log(v)
    base, cells = _population_inits(design, link, train)
    base["sigma"] = np.full(d["S"], max(_rmse(design, cells, dataset), 0.2))
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
    d = design.stan_data
    L, P = link.shape
    X = d["X"]
    fmap = d["fixed_map"]
    b0 = np.empty(P)
    beta = np.zeros(d["K"])
    resid = np.empty_like(link)
    for i in range(P):
        cols = np.flatnonzero(fmap[:, i] > 0) if d["K"] else np.array([], int)
        A = np.column_stack([np.ones(L)] + [X[:, c] for c in cols])[train]
        coef, *_ = np.linalg.lstsq(A, link[train, i], rcond=None)
        b0[i] = coef[0]
        beta[cols] = coef[1:]
        full = np.column_stack([np.ones(L)] + [X[:, c] for c in cols])
        resid[:, i] = link[:, i] - full @ coef
    u = np.zeros(d["Q"])
    tau = np.full(d["R"], 0.1)
    for r, gt in enumerate(design.group_terms):
        if gt.slope_of:        # random slopes start at the fixed slope (deviations 0, SD 0.1)
            continue
        lev = np.asarray(d["re_lev"][r]) - 1 - gt.start
        i = design.params.index(gt.param)
        means = np.array([resid[train & (lev == k), i].mean() if (train & (lev == k)).any() else 0.0
                          for k in range(len(gt.levels))])
        u[gt.start:gt.start + len(gt.levels)] = means
        tau[r] = max(float(np.std(means)), 0.05)
        resid[:, i] -= means[lev]
    # leaf terms: SD of what is left per parameter
    tau_leaf = np.full(d["Rl"], 0.1)
    term_par = {}
    for k, lt in enumerate(design.leaf_terms):
        i = design.params.index(lt.param)
        term_par[k + 1] = i
        tau_leaf[k] = max(float(np.std(resid[train, i])), 0.05)
    mu = link - resid  # population means per cell at the inits
    cen_lev = np.asarray(d["cen_lev"], int) - 1
    nc_lev = np.asarray(d["nc_lev"], int) - 1
    lev_term = np.asarray(d["lev_term"], int) - 1
    flat_link = link.T.reshape(-1)
    flat_mu = mu.T.reshape(-1)
    nc_terms = np.asarray(d["nc_term"], int)
    eta_z = np.array([(flat_link[c] - flat_mu[c]) / tau_leaf[t - 1] for c, t in zip(design.nc_cells, nc_terms)])
    held_out = ~train
    if held_out.any() and len(design.nc_cells):
        # held-out leaves have no data: start them at the population mean
        cell_leaf = design.nc_cells % L
        eta_z[held_out[cell_leaf]] = 0.0
    leaf_params = {lt.param for lt in design.leaf_terms}
    cells = np.column_stack([link[:, i] if p in leaf_params else mu[:, i] for i, p in enumerate(design.params)])
    return {
        "b0": b0, "beta": beta, "tau": tau,
        "u_c": u[cen_lev], "u_z": u[nc_lev] / tau[lev_term[nc_lev]] if len(nc_lev) else np.zeros(0),
        "tau_leaf": tau_leaf, "eta_c": flat_link[design.cen_cells], "eta_z": np.clip(eta_z, -3, 3),
        "nu": np.array([10.0])[: d["student_t"]],
        **({"leaf_chol": np.eye(d["Rl"])[None]} if d["leaf_corr"] else {}),
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
    own value to its least-squares standard error; a residual SD's log to 1 / sqrt(2 points);
    standard-normal effects to 1. Offsets stay 0."""
    d = design.stan_data
    L, P = d["L"], len(design.params)
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
    X = np.asarray(d["X"], float)
    fmap = np.asarray(d["fixed_map"], float)
    beta = np.ones(d["K"])
    for k in range(d["K"]):
        i = int(np.argmax(fmap[k]))
        sd_x = float(np.std(X[train, k]))
        beta[k] = np.clip(b0[i] / sd_x, 1e-4, 10.0) if sd_x > 0 else 1.0
    levels = np.array([len(g.levels) for g in design.group_terms], float)
    log_tau = 1 / np.sqrt(2 * np.maximum(levels - 1, 1))
    lev_par = np.array([design.params.index(g.param) for g in design.group_terms], int)
    lev_term = np.asarray(d["lev_term"], int) - 1
    cen_lev = np.asarray(d["cen_lev"], int) - 1
    u_c = np.clip(b0[lev_par[lev_term[cen_lev]]] * np.sqrt(levels[lev_term[cen_lev]]), 0.01, 1.0) \
        if len(cen_lev) else np.zeros(0)
    cells = design.cen_cells
    cell_leaf, cell_par = cells % L, cells // L
    eta_c = np.clip(se[cell_leaf, cell_par], 0.01, np.maximum(spread[cell_par], 0.01))
    eta_c = np.where(np.isfinite(eta_c), eta_c, np.maximum(spread[cell_par], 0.01))
    groups = np.asarray(d["sigma_group"], int)
    counts = np.bincount(groups, minlength=d["S"] + 1)[1:]
    log_sigma = 1 / np.sqrt(2 * np.maximum(counts, 1))
    mult = np.concatenate([b0, beta, log_tau, u_c, np.ones(d["Q"] - d["Qc"]),
                           np.full(d["Rl"], 1 / np.sqrt(2 * (n - 1))), eta_c, np.ones(d["Mn"]), log_sigma])
    return {"n_scale": int(mult.size), "scale_offset": np.zeros(mult.size), "scale_mult": mult.astype(float)}
