"""Structure + data -> the design of the generic program (stan/leafcv.stan), and its serialiser.

The Stan program is the same for every structure. `build_design` loops over the structure's terms
(`leafcv.terms`) and keeps what they produce in typed, 0-based form: the fixed-effect columns and the
parameter each acts on, the group and leaf terms with their levels and centring, the cells of leaf
effects, the training points and the priors. Inits, the held-out leaf model, labels and the posterior
reader all work from these fields. `to_stan_data` is the one place that writes them in the program's
names and 1-based indices, at the engine boundary.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import cached_property

import numpy as np

from . import fvcb
from .data.dataset import Dataset
from .errors import Problem, SpecError
from .priors import Prior, PriorSet
from .spec import DataSpec, ModelOptions, Structure
from .smooth import SmoothTerm
from .term_kinds import terms_of
from .terms import (  # noqa: F401  (Coefficient, GroupTerm, LeafTerm and the centring rules re-exported)
    CENTRED_SE_FRACTION, MIN_LEAVES_CENTRED_GROUP, MIN_POINTS_CENTRED_LEAF, Coefficient, GroupTerm, LeafTerm,
    Parameter, TermContext, parameters, responses,
)


@dataclass(frozen=True, eq=False)
class Points:
    """The training points of a fit (rows ``Design.obs_index`` of the data), leaf 0-based."""

    leaf: np.ndarray
    ci: np.ndarray
    q: np.ndarray
    t_leaf: np.ndarray
    o2: np.ndarray
    a_net: np.ndarray
    curve_type: np.ndarray
    sigma_group: np.ndarray       # 0-based index into Design.sigma_groups


@dataclass(frozen=True, eq=False)
class Design:
    """One structure placed on one data set (and one set of training leaves). Indices are 0-based.

    Cells of leaf effects are numbered l + p L (leaf l, parameter p), the program's column-major order.
    """

    structure: Structure
    parameters: tuple[Parameter, ...]       # program order
    ratio: dict[str, bool]                  # parameter written as a log ratio to vcmax25
    terms: dict[str, list]                  # parameter -> its term objects (leafcv.terms)
    coefficients: tuple[Coefficient, ...]
    X: np.ndarray                           # (L, K) fixed-effect columns
    coef_param: np.ndarray                  # (K,) parameter index of each column
    group_terms: tuple[GroupTerm, ...]
    lev_term: np.ndarray                    # (Q,) group term of each stacked level
    lev_centred: np.ndarray                 # (Q,) bool
    nc_rot: np.ndarray                      # (Q - Qc, Q - Qc) basis of the non-centred levels
    b0_shift: np.ndarray                    # (P, Q - Qc)
    leaf_terms: tuple[LeafTerm, ...]
    cen_cells: np.ndarray                   # centred leaf-effect cells
    cen_term: np.ndarray                    # their leaf term
    nc_cells: np.ndarray
    nc_term: np.ndarray
    trait_transform: dict[str, tuple[float, float]]   # trait -> (centre, scale)
    prior_lines: tuple[str, ...]
    intercept_priors: tuple[Prior, ...]
    priors: PriorSet
    train_leaves: np.ndarray                # bool per leaf
    obs_index: np.ndarray                   # rows of dataset.obs in the likelihood
    points: Points
    options: ModelOptions = ModelOptions()
    sigma_groups: tuple[str, ...] = ("all points",)   # what each residual SD covers, in program order
    sigma_kinds: tuple[str, ...] = ()       # curve type of each residual SD (sigma by curve type), program order
    smooth_terms: tuple[SmoothTerm, ...] = ()
    Zs: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))   # (L, Ms) wiggle columns of the smooths
    sm_term: np.ndarray = field(default_factory=lambda: np.zeros(0, int))   # (Ms,) smooth term of each column

    @property
    def params(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.parameters)

    @property
    def n_leaves(self) -> int:
        return len(self.train_leaves)

    @property
    def leaf_correlation(self) -> bool:
        return bool(self.structure.leaf_correlation)

    @property
    def student_t(self) -> bool:
        return bool(self.options.student_t)

    def param_index(self, name: str) -> int:
        return self.params.index(name)

    @property
    def leaf_term_params(self) -> list[int]:
        """Parameter index of each leaf term."""
        return [self.param_index(lt.param) for lt in self.leaf_terms]

    @cached_property
    def stan_data(self) -> dict:
        """The program's data (`to_stan_data`), built once."""
        return to_stan_data(self)


class DesignBuilder:
    """What the terms place while a design is built (each term's ``add_to`` calls these)."""

    def __init__(self, params: tuple[str, ...]):
        self.params = params
        self.coefs: list[Coefficient] = []
        self.columns: list[np.ndarray] = []
        self.coef_param: list[int] = []
        self.group_terms: list[GroupTerm] = []
        self.leaf_terms: list[LeafTerm] = []
        self.smooth_terms: list[SmoothTerm] = []
        self.prior_lines: list[str] = []
        self.problems: list[Problem] = []

    @property
    def n_levels(self) -> int:
        return sum(len(g.levels) for g in self.group_terms)

    @property
    def n_smooth_columns(self) -> int:
        return sum(st.size for st in self.smooth_terms)

    def has_leaf_term(self, param: str) -> bool:
        return any(lt.param == param for lt in self.leaf_terms)

    def add_column(self, coef: Coefficient, column: np.ndarray, param: str) -> None:
        self.coefs.append(coef)
        self.columns.append(column)
        self.coef_param.append(self.params.index(param))

    def add_group(self, term: GroupTerm) -> None:
        self.group_terms.append(term)

    def add_leaf(self, term: LeafTerm) -> None:
        self.leaf_terms.append(term)

    def add_smooth(self, term: SmoothTerm) -> None:
        self.smooth_terms.append(term)

    def prior(self, line: str) -> None:
        self.prior_lines.append(line)

    def problem(self, problem: Problem) -> None:
        self.problems.append(problem)


def trait_transforms(dataset: Dataset, spec: DataSpec) -> dict[str, tuple[float, float]]:
    """Centre (default: leaf-table mean) and scale (default 1) of every trait."""
    out = {}
    for t in dataset.traits:
        x = dataset.leaves[t].to_numpy(float)
        out[t] = (float(spec.centre.get(t, np.mean(x))), float(spec.scale.get(t, 1.0)))
    return out


def build_design(
    structure: Structure,
    dataset: Dataset,
    spec: DataSpec,
    options: ModelOptions | None = None,
    priors: PriorSet | None = None,
    train_leaves: np.ndarray | None = None,
    leaf_fits=None,
) -> Design:
    """Place a structure's terms on the data.

    Parameters
    ----------
    train_leaves
        Bool per leaf: leaves whose points enter the likelihood (default: all). Held-out leaves keep
        their cells, always non-centred, so their effects are drawn from the population.
    leaf_fits
        Per-leaf least-squares fits (`leafcv.inits.LeafFits`), the quick pilot of the automatic
        centring choice: a leaf's effect on a parameter is centred when the least-squares standard
        error of that parameter (link scale) is below the between-leaf SD estimated from the same
        fits (the data then inform the leaf more than the population does). Without them, leaves
        with at least MIN_POINTS_CENTRED_LEAF points are centred.
    """
    options = structure.options if options is None else options
    priors = structure.prior_set() if priors is None else priors
    leaves = dataset.leaves
    L = len(leaves)
    train = np.ones(L, bool) if train_leaves is None else np.asarray(train_leaves, bool)
    obs = dataset.obs
    obs_index = np.flatnonzero(train[obs["leaf_index"].to_numpy()])
    if obs_index.size == 0:
        raise SpecError(structure.name, [Problem("no training points left after holding out leaves",
                                                 "no-training-points", structure.name)])
    fit_obs = obs.iloc[obs_index]

    params = parameters(options.tpu)
    names = tuple(p.name for p in params)
    P = len(params)
    ratio = {p: structure.params.get(p) is not None and structure.params[p].ratio_to == "vcmax25" for p in names}
    ctx = TermContext(structure, leaves, trait_transforms(dataset, spec), priors, train,
                      np.bincount(fit_obs["leaf_index"].to_numpy(), minlength=L), leaf_fits, ratio)
    terms = terms_of(structure, set(dataset.traits), params)

    b = DesignBuilder(names)
    for par in params:
        p = par.name
        what = f"{p}/vcmax25 at reference" if ratio[p] else f"{p} at reference traits and levels"
        b.prior(priors.intercept(p, ratio[p]).describe(par.link, what))
        for term in terms[p]:
            term.add_to(ctx, b)
    if b.problems:
        raise SpecError(structure.name, b.problems)
    coefs, columns, group_terms, leaf_terms, prior_lines = b.coefs, b.columns, b.group_terms, b.leaf_terms, b.prior_lines
    coef_param = b.coef_param
    prior_lines.append(f"residual SD: half-normal(0, {priors.sigma_scale:g}) umol m-2 s-1")
    if options.student_t:
        prior_lines.append(f"Student-t degrees of freedom: gamma({priors.nu_shape:g}, {priors.nu_rate:g}), > 1")

    K = len(columns)
    X = np.column_stack(columns) if K else np.zeros((L, 0))
    coef_param_a = np.asarray(coef_param, int)
    _check_fixed_columns(structure.name, names, X, coef_param_a, coefs)
    cen_cell, cen_term, nc_cell, nc_term = _leaf_cells(structure, names, leaf_terms, L)
    if structure.leaf_correlation:
        n_cen = len(cen_cell) // len(leaf_terms)
        leaf_terms = [replace(lt, centred_leaves=n_cen, noncentred_leaves=L - n_cen) for lt in leaf_terms]
        prior_lines.append(f"correlation of leaf effects on {', '.join(lt.param for lt in leaf_terms)}: "
                           f"LKJ({structure.lkj_eta:g}) (Lewandowski, Kurowicka & Joe 2009)")
    lev_term = np.array([r for r, gt in enumerate(group_terms) for _ in gt.levels], int)
    lev_centred = np.array([c for gt in group_terms for c in gt.centred], bool)
    nc_rot, b0_shift, group_terms = _mean_split(group_terms, lev_centred, P, names)
    curve_types = fit_obs["curve_type"].to_numpy()
    if options.sigma_by_curve:
        kinds = sorted(set(curve_types))
        sigma_group = np.searchsorted(kinds, curve_types)
        sigma_names = tuple(f"{k} curves" for k in kinds)
    else:
        kinds = []
        sigma_group = np.zeros(len(fit_obs), int)
        sigma_names = ("all points",)
    points = Points(fit_obs["leaf_index"].to_numpy(), fit_obs["ci"].to_numpy(float), fit_obs["ppfd"].to_numpy(float),
                    fit_obs["t_leaf"].to_numpy(float), fit_obs["o2"].to_numpy(float), fit_obs["a_net"].to_numpy(float),
                    curve_types, sigma_group)
    smooths = tuple(b.smooth_terms)
    Zs = np.column_stack([st.Z for st in smooths]) if smooths else np.zeros((L, 0))
    sm_term = np.array([r for r, st in enumerate(smooths) for _ in range(st.size)], int)
    return Design(structure, params, ratio, terms, tuple(coefs), X, coef_param_a, tuple(group_terms), lev_term,
                  lev_centred, nc_rot, b0_shift, tuple(leaf_terms), cen_cell, cen_term, nc_cell, nc_term,
                  ctx.transforms, tuple(prior_lines), tuple(priors.intercept(p, ratio[p]) for p in names), priors,
                  train, obs_index, points, options, sigma_names, tuple(kinds), smooths, Zs, sm_term)


#: The program's temperature responses, in the order of its data tresp and peaked.
PROGRAM_RESPONSES = ("vcmax", "jmax", "rd", "tpu")


def to_stan_data(design: Design) -> dict:
    """The data of stan/leafcv.stan: the program's names, 1-based indices. The one serialiser."""
    d, pts, options, structure = design, design.points, design.options, design.structure
    L, P, K = design.n_leaves, len(design.parameters), len(design.coefficients)
    rset = fvcb.RUBISCO_SETS[fvcb.DEFAULT_RUBISCO_SET]
    resp = responses(options)
    e1, e2 = fvcb.electron_coefficients(options.electron)
    gts = design.group_terms
    R = len(gts)
    return {
        "N": len(pts.leaf), "L": L, "leaf": pts.leaf + 1,
        "ci": pts.ci, "q": pts.q, "tleaf": pts.t_leaf, "o2": pts.o2, "a": pts.a_net,
        "S": len(design.sigma_groups), "sigma_group": pts.sigma_group + 1,
        "use_tpu": int(options.tpu), "smooth": int(options.transition == "smooth"),
        "smooth_curvature": options.smooth_curvature, "student_t": int(options.student_t),
        "e1": e1, "e2": e2,
        "rubisco": np.array([rset.kc25, rset.ko25, rset.gamma25, rset.ha_kc, rset.ha_ko, rset.ha_gamma]),
        "tresp": np.array([[r.ha, r.hd or 0.0, r.ds or 0.0] for r in (resp[k] for k in PROGRAM_RESPONSES)]),
        "peaked": [int(resp[k].peaked) for k in PROGRAM_RESPONSES],
        "ratio_j": int(design.ratio["jmax25"]), "ratio_rd": int(design.ratio["rd25"]),
        "prior_family": [1 if pr.family == "normal" else 2 for pr in design.intercept_priors],
        "prior_a": np.array([pr.a for pr in design.intercept_priors]),
        "prior_b": np.array([pr.b for pr in design.intercept_priors]),
        "K": K, "X": d.X, "fixed_map": np.eye(P)[d.coef_param].reshape(K, P),
        "beta_sd": np.array([c.prior_sd for c in design.coefficients]),
        "R": R, "re_par": [design.param_index(g.param) + 1 for g in gts],
        "re_lev": np.array([g.start + g.level_of_leaf + 1 for g in gts], int).reshape(R, L),
        "re_x": np.array([g.x for g in gts], float).reshape(R, L),
        "tau_sd": np.array([g.prior_sd for g in gts], float),
        "Q": len(d.lev_term), "lev_term": list(d.lev_term + 1),
        "Qc": int(d.lev_centred.sum()), "cen_lev": list(np.flatnonzero(d.lev_centred) + 1),
        "nc_lev": list(np.flatnonzero(~d.lev_centred) + 1), "nc_rot": d.nc_rot, "b0_shift": d.b0_shift,
        "Rl": len(design.leaf_terms), "leaf_tau_sd": np.array([lt.prior_sd for lt in design.leaf_terms], float),
        "Mc": len(d.cen_cells), "cen_cell": list(d.cen_cells + 1), "cen_term": list(d.cen_term + 1),
        "Mn": len(d.nc_cells), "nc_cell": list(d.nc_cells + 1), "nc_term": list(d.nc_term + 1),
        "leaf_corr": int(structure.leaf_correlation), "lkj_eta": float(structure.lkj_eta),
        "Rs": len(design.smooth_terms), "sm_par": [design.param_index(st.param) + 1 for st in design.smooth_terms],
        "Ms": d.Zs.shape[1], "Zs": d.Zs, "sm_term": list(d.sm_term + 1),
        "sm_tau_sd": np.array([st.prior_sd for st in design.smooth_terms], float),
        "sigma_sd": design.priors.sigma_scale, "nu_shape": design.priors.nu_shape, "nu_rate": design.priors.nu_rate,
        "n_scale": 0, "scale_offset": np.zeros(0), "scale_mult": np.zeros(0),
    }


def _mean_split(group_terms: list[GroupTerm], lev_centred: np.ndarray, P: int, params
                ) -> tuple[np.ndarray, np.ndarray, list[GroupTerm]]:
    """nc_rot and b0_shift of the program (see stan/leafcv.stan), and the group terms' reasons updated.

    A random intercept whose levels are all non-centred gets an orthonormal basis whose first column is
    1/sqrt(K) (the mean of its K standard-normal z) and whose other columns are contrasts; the intercept
    is then written as the mean of the level values. Exact: an orthogonal change of variables and a
    shift of the intercept, both with Jacobian 1.
    """
    nc = np.flatnonzero(~lev_centred)
    pos = {q: i for i, q in enumerate(nc)}
    rot = np.eye(len(nc))
    shift = np.zeros((P, len(nc)))
    out = []
    for gt in group_terms:
        K = len(gt.levels)
        idx = list(range(gt.start, gt.start + K))
        if gt.slope_of is None and K >= 2 and not any(gt.centred):
            basis, _ = np.linalg.qr(np.column_stack([np.ones(K), np.eye(K)[:, :K - 1]]))
            basis *= np.sign(basis[0, 0])                 # first column +1/sqrt(K)
            cols = [pos[q] for q in idx]
            rot[np.ix_(cols, cols)] = basis
            shift[params.index(gt.param), cols[0]] = 1.0 / np.sqrt(K)
            gt = replace(gt, reason=gt.reason + "; non-centred with the intercept written as the mean of the level "
                                                "values (removes the intercept-group trade-off)")
        out.append(gt)
    return rot, shift, out


#: The program's free parameter blocks, in the order of its scale_offset / scale_mult stacking.
FREE_BLOCKS = ("b0_free", "beta", "log_tau", "u_c", "u_v", "log_tau_leaf", "eta_c", "eta_z", "log_tau_s", "z_s",
               "log_sigma")


def free_parameters(design: Design, b0: np.ndarray, tau: np.ndarray, u_z: np.ndarray) -> dict[str, np.ndarray]:
    """The program's free b0_free and u_v for given b0, tau and non-centred level z (inverse of its
    transformed parameters)."""
    u_v = design.nc_rot.T @ np.asarray(u_z, float)
    tau_nc = np.asarray(tau, float)[design.lev_term[~design.lev_centred]] if len(u_v) else np.zeros(0)
    return {"b0_free": np.asarray(b0, float) + design.b0_shift @ (tau_nc * u_v), "u_v": u_v}


def with_free_parameters(design: Design, init: dict) -> dict:
    """``init`` (b0, beta, tau, u_c, u_z, tau_leaf, eta_c, eta_z, sigma, ...; tau_s and z_s default to a
    straight line, 0.1 and 0) with every free parameter of the program added (b0_free, u_v, and the SDs on
    the log scale), ready to start a chain."""
    out = dict(init)
    out.setdefault("tau_s", np.full(len(design.smooth_terms), 0.1))
    out.setdefault("z_s", np.zeros(design.Zs.shape[1]))
    out.update(free_parameters(design, init["b0"], init["tau"], init["u_z"]))
    for name in ("tau", "tau_leaf", "sigma", "tau_s"):
        out["log_" + name] = np.log(np.asarray(out[name], float))
    return out


def stack_free(values: dict) -> np.ndarray:
    """The free parameter blocks of ``values`` (as `fitting.warm_values` returns them, each with a leading
    draw axis) stacked in FREE_BLOCKS order: (draws, free parameters)."""
    n = len(np.asarray(values[FREE_BLOCKS[0]]))
    return np.concatenate([np.asarray(values[k], float).reshape(n, -1) for k in FREE_BLOCKS], axis=1)


def _leaf_cells(structure: Structure, params, leaf_terms: list[LeafTerm], L: int):
    """Centred and non-centred cells (flattened l + p L) and their leaf-term numbers, all 0-based.

    Uncorrelated effects: per (leaf, parameter) cell, parameter by parameter. Correlated effects (LKJ):
    leaf by leaf, one cell per leaf term in term order, a leaf wholly centred only when all its cells
    would be, so that its vector of effects has one joint normal prior.
    """
    cen_cell, cen_term, nc_cell, nc_term = [], [], [], []
    pis = [params.index(lt.param) for lt in leaf_terms]
    if structure.leaf_correlation:
        if len(leaf_terms) < 2:
            have = ", ".join(lt.param for lt in leaf_terms) or "none"
            raise SpecError(structure.name, [Problem(
                f"leaf_correlation applies only with leaf effects on two or more parameters (this structure has "
                f"leaf effects on: {have}); add random = [\"leaf\"] to another parameter or drop leaf_correlation",
                "too-few-leaf-terms", f"structure {structure.name!r} leaf_correlation")])
        all_centred = np.all([lt.centred for lt in leaf_terms], axis=0)
        for l in range(L):
            for k, pi in enumerate(pis):
                (cen_cell if all_centred[l] else nc_cell).append(l + pi * L)
                (cen_term if all_centred[l] else nc_term).append(k)
    else:
        for k, (pi, lt) in enumerate(zip(pis, leaf_terms)):
            cells = np.arange(L) + pi * L
            cen_cell += list(cells[lt.centred])
            cen_term += [k] * int(lt.centred.sum())
            nc_cell += list(cells[~lt.centred])
            nc_term += [k] * int((~lt.centred).sum())
    return tuple(np.asarray(a, int) for a in (cen_cell, cen_term, nc_cell, nc_term))


def _check_fixed_columns(name: str, params, X: np.ndarray, coef_param: np.ndarray, coefs: list[Coefficient]) -> None:
    """Every parameter's fixed columns and its intercept must be linearly independent over the leaves."""
    problems = []
    for pi, p in enumerate(params):
        idx = list(np.flatnonzero(coef_param == pi))
        basis = np.ones((X.shape[0], 1))
        kept: list[int] = []
        for k in idx:
            col = X[:, k]
            if np.ptp(col) == 0:
                problems.append(Problem(f"{p}: term {coefs[k].label!r} does not vary across leaves (one value for "
                                        f"every leaf), so it cannot be told from the intercept; drop it",
                                        "constant-term", f"structure {name!r} {p}"))
                continue
            trial = np.column_stack([basis, col])
            if np.linalg.matrix_rank(trial, tol=1e-8 * max(1.0, np.abs(trial).max())) < trial.shape[1]:
                others = ", ".join(repr(coefs[j].label) for j in kept) or "nothing"
                problems.append(Problem(f"{p}: fixed term {coefs[k].label!r} is perfectly collinear with the "
                                        f"intercept and {others}; drop one of them", "collinear-term",
                                        f"structure {name!r} {p}"))
                continue
            basis, kept = trial, kept + [k]
    if problems:
        raise SpecError(name, problems)


def level_values(design: Design, draws: dict[str, np.ndarray]) -> np.ndarray:
    """Effects of every level of every group term per draw, (S, Q), in the stacked level order."""
    u = np.zeros((draws["b0"].shape[0], len(design.lev_term)))
    if len(design.lev_term):
        cen, nc = design.lev_centred, ~design.lev_centred      # an empty block may be absent (read from a file)
        if cen.any():
            u[:, cen] = draws["u_c"]
        if nc.any():
            u[:, nc] = draws["tau"][:, design.lev_term[nc]] * draws["u_z"]
    return u


def heldout_levels(design: Design, leaf: int) -> list[tuple[int, int]]:
    """(group term r, stacked level index) of every level of ``leaf`` that has no training leaf."""
    out = []
    for r, gt in enumerate(design.group_terms):
        lev = gt.level_of_leaf
        if not design.train_leaves[lev == lev[leaf]].any():
            out.append((r, int(gt.start + lev[leaf])))
    return out


def leaf_link_values(design: Design, draws: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Population mean and actual link-scale values of every (leaf, parameter) cell, per draw.

    ``draws`` holds the program's parameters flattened over chains: name -> (S, *shape).
    Returns (mu, eta), each shaped (S, L, P).
    """
    S = draws["b0"].shape[0]
    L, P = design.n_leaves, len(design.parameters)
    mu = np.repeat(draws["b0"][:, None, :], L, axis=1)
    if len(design.coefficients):
        fixed_map = np.eye(P)[design.coef_param]
        mu = mu + np.einsum("lk,sk,kp->slp", design.X, draws["beta"], fixed_map)
    u = level_values(design, draws)
    for gt in design.group_terms:
        mu[:, :, design.param_index(gt.param)] += u[:, gt.start + gt.level_of_leaf] * gt.x
    mu = mu + smooth_values(design, draws)
    mu_flat = mu.transpose(0, 2, 1).reshape(S, L * P)   # column-major cells: l + p L
    eta_flat = mu_flat.copy()
    if len(design.cen_cells):
        eta_flat[:, design.cen_cells] = draws["eta_c"]
    if len(design.nc_cells) and design.leaf_correlation:
        chol = leaf_cov_chol(design, draws)                                   # (S, Rl, Rl)
        z = draws["eta_z"].reshape(S, -1, len(design.leaf_terms))             # leaf by leaf
        eta_flat[:, design.nc_cells] = mu_flat[:, design.nc_cells] + np.einsum("sij,slj->sli", chol, z).reshape(S, -1)
    elif len(design.nc_cells):
        eta_flat[:, design.nc_cells] = (mu_flat[:, design.nc_cells]
                                        + draws["tau_leaf"][:, design.nc_term] * draws["eta_z"])
    eta = eta_flat.reshape(S, P, L).transpose(0, 2, 1)
    return mu, eta


def smooth_values(design: Design, draws: dict[str, np.ndarray], Zs: np.ndarray | None = None) -> np.ndarray:
    """The smooths' wiggles on each parameter per draw, (S, L, P), at the design's leaves or at the rows
    of ``Zs`` (the same columns evaluated for other leaves). Zero without smooth terms."""
    Zs = design.Zs if Zs is None else Zs
    S, P = draws["b0"].shape[0], len(design.parameters)
    out = np.zeros((S, Zs.shape[0], P))
    for r, st in enumerate(design.smooth_terms):
        cols = slice(st.start, st.start + st.size)
        w = draws["tau_s"][:, r, None] * draws["z_s"][:, cols]                      # (S, size)
        out[:, :, design.param_index(st.param)] += w @ Zs[:, cols].T
    return out


def leaf_cov_chol(design: Design, draws: dict[str, np.ndarray]) -> np.ndarray:
    """Cholesky factor of the covariance of one leaf's effects (leaf terms in order), per draw (S, Rl, Rl)."""
    tau = draws["tau_leaf"]
    if design.leaf_correlation:
        return tau[:, :, None] * draws["leaf_chol"][:, 0]
    return np.einsum("ij,sj->sij", np.eye(tau.shape[1]), tau)


def natural_values(design: Design, eta: np.ndarray) -> dict[str, np.ndarray]:
    """Natural-scale leaf parameters from link-scale cells (..., L, P), ratios resolved."""
    v = eta[..., 0]
    return {par.name: par.from_link(eta[..., i], v if design.ratio.get(par.name) else None)
            for i, par in enumerate(design.parameters)}
