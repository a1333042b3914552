"""Leave-one-leaf-out (or leave-one-group-out) scores of one structure: methods auto, exact, kfold.

auto: one full-data fit; per-leaf marginal likelihoods by quadrature; integrated PSIS (ArviZ's psislw);
exact refits for leaves whose Pareto k-hat is above min(1 - 1/log10 S, 0.7) (Vehtari et al. 2024) and
for a few random spot-check leaves; if more than 20 % of leaves are flagged, switch to grouped K-fold.
exact: one refit per held-out fold (a leaf, or a level of a grouping). kfold: K seeded grouped folds.
Every held-out leaf is scored jointly over its points, with its effects integrated out.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field, replace

import numpy as np

from ..data.dataset import Dataset
from ..design import leaf_link_values
from ..fitting import StructureFit, fit_structure
from ..inits import LeafFits
from ..spec import Comparison, SamplerSpec, Structure
from .leafmodel import LeafModel, flatten_draws
from .psis import integrated_loo_weights, khat_threshold, refit_elpd
from .quadrature import leaf_log_marginal, prior_var
from .result import CVResult

FLAGGED_FRACTION_MAX = 0.2
KFOLD_FALLBACK = 10
RETRY_SEED_OFFSET = 7919


@dataclass
class CVDetails:
    """What a reader of the report needs besides the scores."""

    full_fit_seconds: float = 0.0
    quadrature_seconds: float = 0.0
    refit_seconds: float = 0.0
    refit_leaves: list[str] = field(default_factory=list)
    spot_checks: list[dict] = field(default_factory=list)   # leaf, khat, elpd_auto, elpd_exact
    fallback_cells: int = 0
    notes: list[str] = field(default_factory=list)
    fits_converged: list[bool] = field(default_factory=list)
    fit_problems: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class Scored:
    """Held-out scores of the leaves of one fit."""

    log_m: np.ndarray            # (S, n leaves scored)
    pred_mean: list[np.ndarray]  # per leaf: (S, n points) predictive means with effects integrated
    fallback_cells: int


def folds_for(dataset: Dataset, by: str, method: str, k: int, seed: int) -> list[np.ndarray]:
    """Held-out leaf sets: one per leaf, per level of grouping ``by``, or K seeded grouped folds."""
    L = dataset.n_leaves
    if by == "leaf":
        units = np.arange(L)
    else:
        levels = sorted(dataset.leaves[by].astype(str).unique())
        units = np.searchsorted(levels, dataset.leaves[by].astype(str).to_numpy())
    uniq = np.unique(units)
    if method == "kfold":
        rng = np.random.default_rng(seed)
        perm = rng.permutation(uniq)
        k = min(k, len(uniq))
        return [np.flatnonzero(np.isin(units, perm[i::k])) for i in range(k)]
    return [np.flatnonzero(units == u) for u in uniq]


def score_leaves(fit: StructureFit, dataset: Dataset, leaves: np.ndarray, leaf_fits: LeafFits,
                 use_own_draws: bool) -> Scored:
    """Per-draw log marginal likelihood and predictive means of ``leaves`` under ``fit``.

    ``use_own_draws``: start the mode search at each draw's own values of the leaf (the leaf was in
    the fit); otherwise at the leaf's least-squares estimate.
    """
    draws = flatten_draws(fit.draws.params)
    lv = leaf_link_values(fit.design, draws)
    S = len(draws["b0"])
    log_m = np.empty((S, len(leaves)))
    preds, fallbacks = [], 0
    for j, g in enumerate(leaves):
        lm = LeafModel(fit.design, dataset, draws, lv, int(g))
        if lm.dim == 0:
            log_m[:, j] = lm.loglik_rows(np.arange(S))(np.zeros((S, 1, 0)))[:, 0]
        else:
            mean, sd = lm.mean_sd()
            own = lm.own_values()
            if use_own_draws:
                start = own
                c = own.mean(axis=0)
                cov = np.atleast_2d(np.cov(own.T)) * 1.5**2
            else:
                ls = _ls_link(fit, leaf_fits, int(g), [fit.design.params[i] for i in lm.effect_params])
                start = np.where(np.isnan(ls), mean, ls)     # population mean where not fitted per leaf
                c = np.where(np.isnan(ls), mean.mean(axis=0), ls)
                cov = np.diag(np.maximum(np.mean(np.sqrt(prior_var(sd)), axis=0), 0.05) ** 2) * 1.5**2
            chol = np.linalg.cholesky(cov + 1e-10 * np.eye(lm.dim))
            log_m[:, j], info = leaf_log_marginal(lm.loglik_rows, mean, sd, start, c, chol)
            fallbacks += info.n_fallback
        preds.append(lm.predictive_mean())
    return Scored(log_m, preds, fallbacks)


def _ls_link(fit: StructureFit, leaf_fits: LeafFits, g: int, params: list[str]) -> np.ndarray:
    """Least-squares estimate of the leaf's effect parameters on the link scale (NaN where not fitted)."""
    return np.array([leaf_fits.link_values(p, fit.design.ratio.get(p, False))[g] for p in params], float)


def _fit(structure, dataset, comparison, sampler, leaf_fits, train, seed, engine, details, options, priors):
    t = time.perf_counter()
    kwargs = {} if options is None else {"options": options}
    if priors is not None:
        kwargs["priors"] = priors
    fit = fit_structure(structure, dataset, comparison.data, sampler, engine=engine, train_leaves=train,
                        leaf_fits=leaf_fits, seed=seed, **kwargs)
    if not fit.diagnostics.converged:
        # one retry with a new seed, aimed at the cause: a higher adapt_delta for divergences, twice the
        # draws for R-hat or ESS; the first attempt's problems are reported
        dg = fit.diagnostics
        first = "; ".join(dg.problems)
        mixing = any(p.startswith(("R-hat", "bulk ESS", "tail ESS")) for p in dg.problems)
        retry = replace(sampler, draws=2 * sampler.draws if mixing else sampler.draws,
                        adapt_delta=max(0.99, sampler.adapt_delta) if dg.divergences else sampler.adapt_delta)
        fit = fit_structure(structure, dataset, comparison.data, retry, engine=engine, train_leaves=train,
                            leaf_fits=leaf_fits, seed=seed + RETRY_SEED_OFFSET, **kwargs)
        details.notes.append(f"a fit ({'full data' if train is None else 'refit'}) failed its diagnostics ({first}) "
                             f"and was retried with seed {seed + RETRY_SEED_OFFSET}, {retry.draws} draws per chain, "
                             f"adapt_delta {retry.adapt_delta:g}: "
                             + ("converged" if fit.diagnostics.converged else "; ".join(fit.diagnostics.problems)))
    details.fits_converged.append(fit.diagnostics.converged)
    if not fit.diagnostics.converged:
        details.fit_problems.append("; ".join(fit.diagnostics.problems))
    return fit, time.perf_counter() - t


def _refit_scores(structure, dataset, comparison, sampler, leaf_fits, folds, engine, details, options,
                  priors, base_seed):
    """Refit without each fold; returns per-leaf elpd and predictive means for the held-out leaves."""
    L = dataset.n_leaves
    elpd = np.full(L, np.nan)
    preds: dict[int, np.ndarray] = {}
    for i, held in enumerate(folds):
        train = np.ones(L, bool)
        train[held] = False
        fit, secs = _fit(structure, dataset, comparison, sampler, leaf_fits, train, base_seed + 1 + i,
                         engine, details, options, priors)
        details.refit_seconds += secs
        sc = score_leaves(fit, dataset, held, leaf_fits, use_own_draws=False)
        details.fallback_cells += sc.fallback_cells
        for j, g in enumerate(held):
            elpd[g] = refit_elpd(sc.log_m[:, j])
            preds[int(g)] = sc.pred_mean[j].mean(axis=0)
    return elpd, preds


def cross_validate(structure: Structure, dataset: Dataset, comparison: Comparison, *, method: str = "auto",
                   by: str = "leaf", folds: int = 10, spot_checks: int = 3, engine=None,
                   leaf_fits: LeafFits, sampler: SamplerSpec | None = None, options=None, priors=None
                   ) -> tuple[CVResult, CVDetails]:
    """Held-out scores of one structure by ``method`` (auto | exact | kfold)."""
    sampler = sampler or comparison.sampler
    details = CVDetails()
    L = dataset.n_leaves
    leaf_ids = tuple(dataset.leaves["leaf"].astype(str))
    preds: dict[int, np.ndarray] = {}
    khat = None
    n_refits = 0
    if method == "auto" and by != "leaf":
        details.notes.append(f"integrated PSIS integrates one leaf's effects; folds by {by!r} are refitted exactly, "
                             f"each held-out leaf scored with the effects of its held-out {by} integrated too")
        method = "exact"
    if method == "auto":
        fit, secs = _fit(structure, dataset, comparison, sampler, leaf_fits, None, sampler.seed, engine,
                         details, options, priors)
        details.full_fit_seconds = secs
        t = time.perf_counter()
        sc = score_leaves(fit, dataset, np.arange(L), leaf_fits, use_own_draws=True)
        elpd, khat, lw = integrated_loo_weights(sc.log_m)
        details.fallback_cells += sc.fallback_cells
        for g in range(L):
            w = np.exp(lw[g])
            preds[g] = w @ sc.pred_mean[g]
        details.quadrature_seconds = time.perf_counter() - t
        thr = khat_threshold(sc.log_m.shape[0])
        flagged = np.flatnonzero(khat > thr)
        if len(flagged) > FLAGGED_FRACTION_MAX * L:
            details.notes.append(f"{len(flagged)} of {L} leaves have Pareto k-hat above {thr:.2f}: switched to "
                                 f"grouped {KFOLD_FALLBACK}-fold cross-validation")
            method = "kfold"
            folds = KFOLD_FALLBACK
        else:
            rng = np.random.default_rng(sampler.seed)
            rest = np.setdiff1d(np.arange(L), flagged)
            spots = rng.choice(rest, size=min(spot_checks, len(rest)), replace=False) if len(rest) else []
            todo = [np.array([g]) for g in list(flagged) + list(spots)]
            ex, ex_preds = _refit_scores(structure, dataset, comparison, sampler, leaf_fits, todo, engine,
                                         details, options, priors, sampler.seed + 1000)
            n_refits = len(todo)
            for g in flagged:
                elpd[g] = ex[g]
                preds[int(g)] = ex_preds[int(g)]
                details.refit_leaves.append(leaf_ids[g])
            for g in spots:
                details.spot_checks.append({"leaf": leaf_ids[g], "khat": float(khat[g]),
                                            "elpd_auto": float(elpd[g]), "elpd_exact": float(ex[g])})
            if len(flagged):
                details.notes.append(f"{len(flagged)} leaf/leaves with k-hat above {thr:.2f} refitted exactly: "
                                     + ", ".join(leaf_ids[g] for g in flagged))
    if method in ("exact", "kfold"):
        fold_sets = folds_for(dataset, by, method, folds, sampler.seed)
        elpd, preds = _refit_scores(structure, dataset, comparison, sampler, leaf_fits, fold_sets, engine,
                                    details, options, priors, sampler.seed)
        n_refits = len(fold_sets)
    rmse, r2 = _prediction_scores(dataset, preds)
    warnings = []
    if details.fit_problems:
        warnings.append(f"{sum(not c for c in details.fits_converged)} of {len(details.fits_converged)} fits "
                        f"did not converge ({details.fit_problems[0]})")
    warnings += details.notes
    result = CVResult(structure.name, method, leaf_ids, np.asarray(elpd), sampler.chains * sampler.draws,
                      pareto_k=None if khat is None else np.asarray(khat), n_refits=n_refits,
                      converged=all(details.fits_converged), warnings=tuple(warnings), rmse=rmse, r2=r2)
    return result, details


def _prediction_scores(dataset: Dataset, preds: dict[int, np.ndarray]) -> tuple[dict, dict]:
    """Held-out RMSE and R^2 = 1 - SSE/SST of predicted against observed A, by curve type and overall."""
    obs = dataset.obs
    pieces = []
    for g, p in preds.items():
        rows = obs[obs["leaf_index"] == g]
        pieces.append((rows["curve_type"].to_numpy(), rows["a_net"].to_numpy(float), p))
    kinds = np.concatenate([k for k, _, _ in pieces])
    y = np.concatenate([v for _, v, _ in pieces])
    yhat = np.concatenate([p for _, _, p in pieces])
    rmse, r2 = {}, {}
    for name, mask in [("all", np.ones(len(y), bool))] + [(k, kinds == k) for k in sorted(set(kinds))]:
        e = y[mask] - yhat[mask]
        rmse[name] = float(np.sqrt(np.mean(e**2)))
        r2[name] = float(1 - np.sum(e**2) / np.sum((y[mask] - y[mask].mean()) ** 2))
    return rmse, r2
