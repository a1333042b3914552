"""Leave-one-leaf-out (or leave-one-group-out) scores of one structure: methods auto, exact, kfold.

auto: one full-data fit; per-leaf marginal likelihoods by checked quadrature; integrated PSIS (ArviZ's
psislw) with Monte Carlo errors; exact refits for every leaf whose Pareto k-hat is above
min(1 - 1/log10 S, 0.7) (Vehtari et al. 2024), however many, so that every structure estimates the
same quantity (leave-one-leaf-out) on the same leaves; plus a few seeded spot-check leaves. A spot
check that disagrees with PSIS beyond max(SPOT_MIN_NATS, SPOT_MCSE_MULTIPLE x combined MCSE) plus both
values' quadrature bounds (`spot_tolerance`) replaces the PSIS value and raises a warning; when two or more disagree, every leaf is refitted.
exact: one refit per held-out fold (a leaf, or a level of a grouping). kfold: K seeded grouped folds.
Every held-out leaf is scored jointly over its points, with its effects integrated out.

Only the fits whose draws feed a score decide a structure's grade; a failed fit is retried with a
remedy aimed at its cause (see `remedy`), up to MAX_ATTEMPTS attempts, each recorded.

`leafcv.cv.plans` turns each method into tasks and `leafcv.cv.plan` runs them (`plan.cross_validate` in this
process); this module holds the pieces the plans and tasks call and never imports either. Tests: tests/cv/test_methods.py,
tests/sampling/cv/test_methods.py.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field, replace

import numpy as np

from ..data.dataset import LEAF_TERM, Dataset
from ..design import leaf_link_values
from ..diagnostics import DIVERGENCE_CODE, MIXING_CODES
from ..errors import SpecError
from ..fitting import StructureFit, fit_structure
from ..inits import LeafFits
from ..terms import CENTRED_SE_FRACTION
from ..spec import SamplerSpec, Structure
from .leafmodel import LeafModel, flatten_draws
from .predictions import curve_draws
from .quadrature import LEAF_TOL, QuadratureInfo, leaf_log_marginal

#: Attempts per fit: the first and up to two targeted retries.
MAX_ATTEMPTS = 3
#: A refit warm-started from the full-data fit's last draws runs this fraction of the warm-up (at least
#: WARM_WARMUP_MIN iterations): its chains start in the posterior, and only the step size and metric need
#: adapting (CROSS-VALIDATION.md, "Exact refits"; the fraction is common practice, no source). A retry
#: starts afresh with the full warm-up.
WARM_WARMUP_FRACTION = 0.5
WARM_WARMUP_MIN = 150
#: ... and this fraction of the draws (at least WARM_DRAWS_MIN): a refit scores one leaf by a log mean
#: of S likelihoods, whose Monte Carlo error (from the refit's own chains) is reported beside it.
WARM_DRAWS_FRACTION = 0.5
WARM_DRAWS_MIN = 200
#: Seed offsets: attempt a of a fit uses seed + a * RETRY_SEED_OFFSET; refits of leaf g use
#: run seed + REFIT_SEED_OFFSET + g (the same for every structure); K-fold fold i run seed + KFOLD_SEED_OFFSET + i.
RETRY_SEED_OFFSET = 7919
REFIT_SEED_OFFSET = 1000
KFOLD_SEED_OFFSET = 5000
#: Every fit's seed is taken modulo 2^32 (Stan's seeds are unsigned 32-bit), so a run seed near the top of
#: the range a comparison file accepts still gives valid refit and retry seeds.
SEED_MODULUS = 2**32
#: Stream of the run seed that orders leaves for spot checks (the same leaves for every structure).
SPOT_STREAM = 17
#: A spot check disagrees when |PSIS - exact| > max(SPOT_MIN_NATS, SPOT_MCSE_MULTIPLE sqrt(mcse_psis^2 + mcse_exact^2))
#: + bound_psis + bound_exact (`spot_tolerance`; the multiple and the floor: common practice, no source).
SPOT_MIN_NATS = 0.1
SPOT_MCSE_MULTIPLE = 3.0
#: Spot checks that must disagree before every leaf of the structure is refitted.
SPOT_DISAGREE_REFIT_ALL = 2


def spot_tolerance(mcse_psis: float, mcse_exact: float, bound_psis: float, bound_exact: float) -> float:
    """How far (nats) a leaf's PSIS and exact values may differ before a spot check disagrees:
    max(SPOT_MIN_NATS, SPOT_MCSE_MULTIPLE x sqrt(mcse_psis^2 + mcse_exact^2)) + bound_psis + bound_exact.

    Both values carry a Monte Carlo error and a quadrature error bound, and either may account for a
    difference. A NaN MCSE or bound (not computed) counts as 0.
    """
    mc = float(np.hypot(*(0.0 if np.isnan(m) else float(m) for m in (mcse_psis, mcse_exact))))
    bounds = sum(0.0 if np.isnan(b) else float(b) for b in (bound_psis, bound_exact))
    return max(SPOT_MIN_NATS, SPOT_MCSE_MULTIPLE * mc) + bounds


@dataclass
class CVDetails:
    """What a reader of the report needs besides the scores."""

    full_fit_seconds: float = 0.0
    quadrature_seconds: float = 0.0
    refit_seconds: float = 0.0
    refit_leaves: list[str] = field(default_factory=list)
    spot_checks: list[dict] = field(default_factory=list)
    escalated_cells: int = 0
    brute_force_cells: int = 0
    unresolved_cells: int = 0                              # cells whose rules never agreed (weighed in the bound)
    unresolved: list[str] = field(default_factory=list)   # leaves whose quadrature bound exceeds LEAF_TOL
    notes: list[str] = field(default_factory=list)
    fits: list[dict] = field(default_factory=list)       # every fit made: role, seeds, attempts, diagnostics
    psis_khat: list[float] = field(default_factory=list)  # PSIS k-hat of every leaf (auto), refitted ones too


@dataclass(frozen=True)
class Scored:
    """Held-out scores of the leaves of one fit."""

    log_m: np.ndarray                 # (S, n leaves scored)
    pred_mean: list[np.ndarray]       # per leaf: (S, n points) predictive means with effects integrated
    quad: list[QuadratureInfo]        # per leaf
    chains: int
    curves: list = field(default_factory=list)   # per leaf: CurveDraws (predictive curves) or None


def fold_seed_base(sampler: SamplerSpec, method: str) -> int:
    """Seed of fold 0 of methods exact and kfold; fold i adds i."""
    return sampler.seed + (KFOLD_SEED_OFFSET if method == "kfold" else REFIT_SEED_OFFSET)


def folds_for(dataset: Dataset, by: str, method: str, k: int, seed: int) -> list[np.ndarray]:
    """Held-out leaf sets: one per leaf, per level of grouping ``by``, or K seeded grouped folds."""
    L = dataset.n_leaves
    if by == LEAF_TERM:
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


def _ls_link(fit: StructureFit, leaf_fits: LeafFits, g: int, params: list[str]) -> np.ndarray:
    """Least-squares estimate of the leaf's effect parameters on the link scale (NaN where not fitted)."""
    return np.array([leaf_fits.link_values(p, fit.design.ratio.get(p, False))[g] for p in params], float)


def score_leaves(fit: StructureFit, dataset: Dataset, leaves: np.ndarray, leaf_fits: LeafFits,
                 in_fit: bool) -> Scored:
    """Per-draw log marginal likelihood and predictive means of ``leaves`` under ``fit``.

    Every cell is placed from the leaf's own conditional posterior at that draw (module
    `leafcv.cv.quadrature`). Mode searches start at the leaf's own values in each draw (``in_fit``:
    the leaf was in the fit), at its least-squares estimate and at the population mean.
    """
    draws = flatten_draws(fit.draws.params)
    lv = leaf_link_values(fit.design, draws)
    S = len(draws["b0"])
    log_m = np.empty((S, len(leaves)))
    preds, quad, curves = [], [], []
    for j, g in enumerate(leaves):
        lm = LeafModel(fit.design, dataset, draws, lv, int(g))
        if lm.dim == 0:
            log_m[:, j] = lm.fixed_loglik()
            quad.append(QuadratureInfo(S))
        else:
            mean, sd = lm.mean_sd()
            ls = _ls_link(fit, leaf_fits, int(g), [fit.design.params[i] for i in lm.effect_params])
            ls_start = np.where(np.isnan(ls), mean, ls)          # population mean where not fitted per leaf
            starts = ([lm.own_values()] if in_fit else []) + [ls_start, mean]
            log_m[:, j], info = leaf_log_marginal(lm.loglik_rows, mean, sd, starts,
                                                  weighting="importance" if in_fit else "mean")
            quad.append(info)
        preds.append(lm.predictive_mean())
        curves.append(curve_draws(lm, fit.draws.seed))
    return Scored(log_m, preds, quad, fit.draws.n_chains, curves)


def score_level(fit: StructureFit, dataset: Dataset, leaves: np.ndarray, leaf_fits: LeafFits
                ) -> tuple[np.ndarray, float, int]:
    """Per-draw joint log density of the leaves of one held-out level, their shared held-out effects
    integrated once per draw (`leafcv.cv.heldout`); returns (log p (S,), accuracy bound in nats,
    unresolved cells)."""
    from .heldout import level_log_marginal

    draws = flatten_draws(fit.draws.params)
    lv = leaf_link_values(fit.design, draws)
    models = [LeafModel(fit.design, dataset, draws, lv, int(g), integrate_heldout=False) for g in leaves]
    keys = sorted({(r, lev) for m in models for r, lev, _, _ in m.shared})
    starts = []
    for g, m in zip(leaves, models):
        mean = m.mu[:, m.effect_params]
        ls = _ls_link(fit, leaf_fits, int(g), [fit.design.params[i] for i in m.effect_params])
        starts.append([np.where(np.isnan(ls), mean, ls)])
    if not keys:      # nothing shared: the leaves are independent given the draw
        S = len(draws["b0"])
        total, bound, bad = np.zeros(S), 0.0, 0
        for m, st in zip(models, starts):
            if m.dim == 0:
                total += m.fixed_loglik()
                continue
            mean, sd = m.mean_sd()
            lm, info = leaf_log_marginal(m.loglik_rows, mean, sd, st + [mean], weighting="mean")
            total, bound, bad = total + lm, bound + info.bound, bad + info.n_unresolved
        return total, bound, bad
    tau = np.stack([draws["tau"][:, r] for r, _ in keys], axis=1)
    joint, info = level_log_marginal(models, tau, keys, starts)
    return joint, info.bound, info.n_unresolved


# ----------------------------------------------------------------------------------------------
# fitting with targeted retries

def with_centring(structure: Structure, centring: dict[str, dict[str, str]]) -> Structure:
    """``structure`` with each parameter's centring choices replaced by ``centring[param]`` (the record a
    fit task keeps of the parameterisation it ended with)."""
    params = {p: ps if ps is None or p not in centring else replace(ps, centring=dict(centring[p]))
              for p, ps in structure.params.items()}
    return replace(structure, params=params)


def centring_of(structure: Structure) -> dict[str, dict[str, str]]:
    """Every parameter's centring choices, as `with_centring` reads them back."""
    return {p: dict(ps.centring) for p, ps in structure.params.items() if ps is not None}


def noncentred_weak_leaves(structure: Structure, fit: StructureFit, leaf_fits: LeafFits | None
                           ) -> tuple[Structure, list[str]]:
    """Leaf effects that the pilot centred where the fit says it should not have, made non-centred.

    The automatic rule (`leafcv.terms.informed_leaves`) centres a leaf's effect when its least-squares SE
    is below CENTRED_SE_FRACTION x the between-leaf SD, estimated by the per-leaf pilot fits. When the
    fit's posterior median SD of those leaf effects is much smaller than the pilot's estimate, the rule
    applied with it centres fewer leaves: the centred ones then sit in a funnel (divergences that a higher
    adapt_delta does not remove; Betancourt & Girolami 2015). Such a parameter's leaf effects, chosen
    "auto", become non-centred. Returns the structure and one line per change.
    """
    if leaf_fits is None or not fit.design.leaf_terms or "tau_leaf" not in fit.draws.params:
        return structure, []
    tau = np.median(np.asarray(fit.draws.params["tau_leaf"], float).reshape(-1, len(fit.design.leaf_terms)), axis=0)
    params, notes = dict(structure.params), []
    for r, lt in enumerate(fit.design.leaf_terms):
        ps = params.get(lt.param)
        if ps is None or ps.centring.get(LEAF_TERM, "auto") != "auto" or lt.centred is None or not lt.centred.any():
            continue
        se = leaf_fits.link_se(lt.param, ps.ratio_to == "vcmax25")
        kept = lt.centred & np.isfinite(se) & (se < CENTRED_SE_FRACTION * tau[r])
        if kept.sum() < lt.centred.sum():
            params[lt.param] = replace(ps, centring={**ps.centring, LEAF_TERM: "noncentred"})
            notes.append(f"leaf effects on {lt.param} non-centred (the fit's SD of leaf effects {tau[r]:.3g} "
                         f"centres {int(kept.sum())} of the {int(lt.centred.sum())} leaves the pilot centred)")
    return replace(structure, params=params), notes


def noncentred_groups(structure: Structure) -> Structure:
    """The structure with every random term other than the leaf effects non-centred."""
    params = {}
    for p, ps in structure.params.items():
        if ps is None:
            params[p] = ps
            continue
        centring = dict(ps.centring)
        for g in ps.random:
            if g != LEAF_TERM:
                centring[g] = "noncentred"
        for trait, g in ps.slopes:
            centring[f"{trait}|{g}"] = "noncentred"
        params[p] = replace(ps, centring=centring)
    return replace(structure, params=params)


def remedy(problems: tuple[str, ...], sampler: SamplerSpec, structure: Structure, attempt: int,
           fit: StructureFit | None = None, leaf_fits: LeafFits | None = None
           ) -> tuple[SamplerSpec, Structure, str]:
    """Sampler settings and structure for the next attempt, aimed at the cause of the last failure.

    Divergences: a higher adapt_delta (0.95, then 0.99); for random terms other than the leaf
    effects, the non-centred form (few, weakly informed levels sample better so; DESIGN.md); and, given
    the failed ``fit`` and the pilot ``leaf_fits``, non-centred leaf effects where the fit's SD of leaf
    effects undoes the pilot's centring choice (`noncentred_weak_leaves`).
    R-hat, ESS, E-BFMI or tree depth: twice the warm-up and twice the draws.
    """
    codes = {getattr(p, "code", "") for p in problems}
    divergent = DIVERGENCE_CODE in codes
    mixing = bool(codes & set(MIXING_CODES))
    causes, new, st = [], sampler, structure
    if divergent:
        new = replace(new, adapt_delta=max(new.adapt_delta, 0.95 if attempt == 1 else 0.99))
        st = noncentred_groups(structure)
        causes.append(f"divergences: adapt_delta {new.adapt_delta:g}, group effects non-centred")
        if fit is not None:
            st, notes = noncentred_weak_leaves(st, fit, leaf_fits)
            causes += notes
    if mixing or not divergent:
        new = replace(new, warmup=2 * new.warmup, draws=2 * new.draws)
        causes.append(f"mixing: warm-up {new.warmup}, draws {new.draws} per chain")
    return new, st, "; ".join(causes)


def fit_with_retries(structure, dataset, comparison, sampler, leaf_fits, train, seed, engine, details,
                     role, warm_start: StructureFit | None = None,
                     retry_marginal: bool = True) -> StructureFit:
    """Fit, and refit with targeted remedies while the fit is not converged (or, with
    ``retry_marginal`` False, while it fails), up to MAX_ATTEMPTS.

    Every attempt is recorded in ``details.fits`` (role, attempt, seed, settings, cause of the retry,
    diagnostics, and whether it is the attempt kept); the best-graded attempt is returned, the later
    one on a tie.
    """
    rank = {"converged": 2, "marginal": 1, "failed": 0}
    best, best_entry = None, None
    st, smp, cause = structure, sampler, ""
    if warm_start is not None:
        # chains start in the posterior, so a shorter warm-up adapts the step size and metric; a refit
        # scores one leaf, whose log-mean-exp needs fewer draws than the full fit's PSIS over every leaf
        smp = replace(sampler, warmup=max(WARM_WARMUP_MIN, int(sampler.warmup * WARM_WARMUP_FRACTION)),
                      draws=max(WARM_DRAWS_MIN, int(sampler.draws * WARM_DRAWS_FRACTION)))
    for attempt in range(MAX_ATTEMPTS):
        s = (seed + attempt * RETRY_SEED_OFFSET) % SEED_MODULUS
        t = time.perf_counter()
        warm = warm_start if attempt == 0 else None     # a retry starts cold, but keeps the scaling
        if attempt == 1 and warm_start is not None:
            smp = replace(smp, warmup=max(smp.warmup, sampler.warmup), draws=max(smp.draws, sampler.draws))
        fit = fit_structure(st, dataset, comparison.data, smp, engine=engine, train_leaves=train,
                            leaf_fits=leaf_fits, seed=s, warm_start=warm_start, warm_inits_too=warm is not None)
        secs = time.perf_counter() - t
        dg = fit.diagnostics
        entry = {"role": role, "attempt": attempt + 1, "seed": s, "retry_cause": cause,
                 "warm_start": warm is not None, "contributes": True, "kept": False,
                 "chains": smp.chains, "warmup": smp.warmup, "draws": smp.draws,
                 "adapt_delta": smp.adapt_delta, "seconds": secs, "init_note": fit.init_note,
                 "parameterisation": [f"leaf effects on {lt.param}: {lt.centred_leaves} centred, "
                                      f"{lt.noncentred_leaves} non-centred ({lt.reason})" for lt in fit.design.leaf_terms]
                                     + [f"{g.label}: {sum(g.centred)} of {len(g.levels)} levels centred ({g.reason})"
                                        for g in fit.design.group_terms],
                 **dg.as_dict()}
        details.fits.append(entry)
        if best is None or rank[dg.grade] >= rank[best.diagnostics.grade]:
            best, best_entry = fit, entry
        done = dg.grade == "converged" or (dg.grade == "marginal" and not retry_marginal)
        if done or attempt == MAX_ATTEMPTS - 1:
            break
        smp, st, cause = remedy(dg.problems, smp, st, attempt + 1, fit, leaf_fits)
        cause = f"attempt {attempt + 1} {dg.grade} ({'; '.join(dg.problems)}); {cause}"
    best_entry["kept"] = True
    return best


# ----------------------------------------------------------------------------------------------
# cross-validation

@dataclass
class Leafwise:
    """Per-leaf values being assembled."""

    L: int
    elpd: np.ndarray = None
    mcse: np.ndarray = None
    bound: np.ndarray = None
    khat: np.ndarray = None
    how: list = None
    preds: dict = field(default_factory=dict)
    curves: dict = field(default_factory=dict)

    def __post_init__(self):
        nan = np.full(self.L, np.nan)
        self.elpd, self.mcse, self.bound, self.khat = nan.copy(), nan.copy(), nan.copy(), nan.copy()
        self.how = [""] * self.L


def check_curve_types(structure: Structure, dataset: Dataset, train: np.ndarray, held: np.ndarray) -> None:
    """With a residual SD per curve type, every held-out leaf's curve types need training points."""
    opts = structure.options
    if not opts.sigma_by_curve:
        return
    obs = dataset.obs
    trained = set(obs.loc[train[obs["leaf_index"].to_numpy()], "curve_type"])
    problems = []
    for g in held:
        kinds = set(obs.loc[obs["leaf_index"] == g, "curve_type"]) - trained
        if kinds:
            problems.append(f"held-out leaf {dataset.leaves['leaf'].iloc[g]!r} has {', '.join(sorted(kinds))} curves, "
                            f"but no training leaf does, so their residual SD is unknown; use sigma = \"shared\" "
                            f"or hold out fewer leaves")
    if problems:
        raise SpecError(structure.name, problems)


def note_quadrature(details: CVDetails, leaf_ids, leaves, quads) -> None:
    for g, q in zip(leaves, quads):
        details.escalated_cells += q.n_escalated
        details.brute_force_cells += q.n_brute
        details.unresolved_cells += q.n_unresolved
        if q.bound > LEAF_TOL:
            details.unresolved.append(f"{leaf_ids[g]} (bound {q.bound:.3g} nats > {LEAF_TOL:g}; {q.n_unresolved} of "
                                      f"{q.n_cells} draws with rules differing by up to {q.unresolved_gap:.3g} nats)")


def set_curve(acc: Leafwise, g: int, curve) -> None:
    if curve is not None:
        acc.curves[g] = curve
    else:
        acc.curves.pop(g, None)


def fit_warnings(details: CVDetails, grade: str) -> list[str]:
    """Sentences on the fits that feed the score (spot-check refits that agreed are not among them)."""
    last = {}
    for f in details.fits:
        if f.get("contributes", True) and f.get("kept", True):
            last[f["role"]] = f                   # the attempt that was kept
    kept = [f for f in last.values() if f["grade"] != "converged"]
    if not kept:
        return []
    worst = kept[0]
    word = "marginal convergence" if grade == "marginal" else "fits did not converge"
    return [f"{word}: {len(kept)} of {len(last)} fits below the convergence thresholds after retries "
            f"({worst['role']}: {'; '.join(worst['problems'])})"]


def prediction_scores(dataset: Dataset, preds: dict[int, np.ndarray]) -> tuple[dict, dict]:
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
