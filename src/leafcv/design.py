"""Structure specification + data -> Stan data for the generic program (stan/leafcv.stan).

The Stan program is the same for every structure: this module only builds design matrices, index
arrays, sizes and flags. A `Design` also keeps the readable description of every coefficient, random
term, centring choice and prior, so results can be reported by meaning.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from . import fvcb
from .data.dataset import Dataset
from .errors import SpecError
from .priors import PriorSet
from .spec import LINKS, PARAMETERS, DataSpec, ModelOptions, Structure

#: Fewest training points a leaf needs for its effects to be centred (common practice, no source:
#: a leaf informed by whole curves pins its own parameters; see DESIGN.md for the measured gain).
MIN_POINTS_CENTRED_LEAF = 5
#: A leaf's effect is centred when its least-squares SE is below this fraction of the between-leaf SD
#: (the data then carry at least 80 % of the precision; common practice, no source: the centred form
#: suits data-dominated effects, the non-centred form prior-dominated ones, Betancourt & Girolami 2015).
CENTRED_SE_FRACTION = 0.5
#: Fewest leaves per level for a group effect on a parameter that also has leaf effects to be centred.
MIN_LEAVES_CENTRED_GROUP = 20


@dataclass(frozen=True)
class Coefficient:
    param: str
    term: str          # trait or group column
    label: str         # e.g. "leaf_n", "month=2026-07", "leaf_n within species"
    kind: str          # "trait", "level", "within" or "between"
    prior_sd: float
    group: str = ""    # the grouping of a within/between split


@dataclass(frozen=True)
class GroupTerm:
    param: str
    grouping: str
    levels: tuple[str, ...]
    start: int         # 0-based offset of its first level in the stacked level vector
    centred: tuple[bool, ...]
    reason: str
    slope_of: str | None = None   # a random slope of this trait (None: a random intercept)

    @property
    def label(self) -> str:
        return f"{self.grouping}-specific slopes of {self.param} on {self.slope_of}" if self.slope_of \
            else f"{self.grouping} effects on {self.param}"


@dataclass(frozen=True)
class LeafTerm:
    param: str
    centred_leaves: int
    noncentred_leaves: int
    reason: str


@dataclass(frozen=True)
class Design:
    structure: Structure
    stan_data: dict
    params: tuple[str, ...]                 # parameter order in the program
    ratio: dict[str, bool]
    coefficients: tuple[Coefficient, ...]
    group_terms: tuple[GroupTerm, ...]
    leaf_terms: tuple[LeafTerm, ...]
    trait_transform: dict[str, tuple[float, float]]   # trait -> (centre, scale)
    prior_lines: tuple[str, ...]
    train_leaves: np.ndarray                # bool per leaf
    obs_index: np.ndarray                   # rows of dataset.obs in the likelihood
    cen_cells: np.ndarray = field(repr=False, default=None)   # flat cell indices (0-based)
    nc_cells: np.ndarray = field(repr=False, default=None)
    options: ModelOptions = ModelOptions()
    sigma_groups: tuple[str, ...] = ("all points",)   # what each residual SD covers, in program order
    sigma_kinds: tuple[str, ...] = ()       # curve type of each residual SD (sigma by curve type), program order


def _levels(values) -> tuple[str, ...]:
    return tuple(sorted(set(map(str, values))))


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
    """Turn a structure and data into the Stan data of the generic program.

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
        raise SpecError(structure.name, ["no training points left after holding out leaves"])
    fit_obs = obs.iloc[obs_index]
    points_per_leaf = np.bincount(fit_obs["leaf_index"].to_numpy(), minlength=L)

    params = PARAMETERS + (("tpu25",) if options.tpu else ())
    links = dict(LINKS, tpu25="log")
    P = len(params)
    transforms = trait_transforms(dataset, spec)
    ratio = {p: structure.params.get(p) is not None and structure.params[p].ratio_to == "vcmax25"
             for p in params}

    coefs: list[Coefficient] = []
    columns: list[np.ndarray] = []
    fixed_map: list[np.ndarray] = []
    group_terms: list[GroupTerm] = []
    re_par, re_lev, re_x, tau_sd, lev_term, lev_centred = [], [], [], [], [], []
    leaf_terms: list[LeafTerm] = []
    leaf_cells: list[tuple[int, np.ndarray]] = []   # (parameter index, centred mask over leaves)
    leaf_tau_sd: list[float] = []
    prior_lines: list[str] = []

    for pi, p in enumerate(params):
        ps = structure.params.get(p)
        fixed = ps.fixed if ps else ()
        random = ps.random if ps else ()
        centring = ps.centring if ps else {}
        link = links[p]
        what = f"{p}/vcmax25 at reference" if ratio[p] else f"{p} at reference traits and levels"
        prior_lines.append(priors.intercept(p, ratio[p]).describe(link, what))
        for term in fixed:
            if term in dataset.traits:
                c, s = transforms[term]
                columns.append((leaves[term].to_numpy(float) - c) / s)
                sd = priors.slope_sd(link)
                coefs.append(Coefficient(p, term, term, "trait", sd))
                fixed_map.append(np.eye(P)[pi])
                prior_lines.append(f"{p} slope on {term} (per {s:g} units, centred at {c:.4g}): normal(0, {sd:g}) on the {link} scale")
            else:
                levels = _levels(leaves[term])
                for lev in levels[1:]:
                    columns.append((leaves[term].astype(str).to_numpy() == lev).astype(float))
                    coefs.append(Coefficient(p, term, f"{term}={lev}", "level", priors.level_sd))
                    fixed_map.append(np.eye(P)[pi])
                prior_lines.append(f"{p} {term} levels vs reference {levels[0]!r}: normal(0, {priors.level_sd:g}) on the {link} scale")
        for trait, grouping in (ps.split if ps else ()):
            # group-mean centring (e.g. Enders & Tofighi 2007, from memory): the within slope acts on
            # the leaf's deviation from its group's mean, the between slope on the group mean itself
            c, sc = transforms[trait]
            x = leaves[trait].to_numpy(float)
            gmean = leaves.groupby(leaves[grouping].astype(str))[trait].transform("mean").to_numpy(float)
            sd = priors.slope_sd(link)
            for kind, col in (("within", (x - gmean) / sc), ("between", (gmean - c) / sc)):
                columns.append(col)
                coefs.append(Coefficient(p, trait, f"{trait} {kind} {grouping}", kind, sd, grouping))
                fixed_map.append(np.eye(P)[pi])
            prior_lines.append(f"{p} slopes on {trait} within and between {grouping} (per {sc:g} units): "
                               f"normal(0, {sd:g}) each on the {link} scale")
        group_specs = [(g, None) for g in random if g != "leaf"] + [(g, t) for t, g in (ps.slopes if ps else ())]
        if "leaf" in random:
            choice = centring.get("leaf", "auto")
            leaf_tau_sd.append(priors.leaf_sd_scale)
            informed, rule = _informed_leaves(p, ratio[p], leaf_fits, points_per_leaf, train)
            centred = informed if choice == "auto" else (np.full(L, choice == "centred") & train)
            reason = f"{choice}: chosen by the user" if choice != "auto" else f"auto: {rule}"
            if (~train).any():
                reason += "; held-out leaves non-centred"
            if structure.leaf_correlation:
                reason += "; correlated effects: a leaf is centred only where all its effects are"
            leaf_cells.append((pi, centred))
            leaf_terms.append(LeafTerm(p, int(centred.sum()), int((~centred).sum()), reason))
            prior_lines.append(f"SD of leaf effects on {p}: half-normal(0, {priors.leaf_sd_scale:g}) on the {link} scale")
        for grouping, slope_of in group_specs:
            choice = centring.get(grouping if slope_of is None else f"{slope_of}|{grouping}", "auto")
            levels = _levels(leaves[grouping])
            lev_of_leaf = np.searchsorted(levels, leaves[grouping].astype(str).to_numpy())
            leaves_per_level = np.bincount(lev_of_leaf[train], minlength=len(levels))
            has_leaf_term = "leaf" in random
            if choice == "auto":
                need = MIN_LEAVES_CENTRED_GROUP if has_leaf_term else 2
                cen = leaves_per_level >= need
                reason = (f"auto: centred where a level has >= {need} training leaves"
                          + (" (the parameter also has leaf effects)" if has_leaf_term else ""))
            else:
                cen = np.full(len(levels), choice == "centred") & (leaves_per_level > 0)
                reason = f"{choice}: chosen by the user"
            if (leaves_per_level == 0).any():
                reason += "; levels without training data non-centred"
            r = len(re_par)
            start = len(lev_term)
            re_par.append(pi + 1)
            re_lev.append(start + lev_of_leaf + 1)
            if slope_of is None:
                re_x.append(np.ones(L))
            else:
                c, sc = transforms[slope_of]
                re_x.append((leaves[slope_of].to_numpy(float) - c) / sc)
            tau_sd.append(priors.group_sd_scale)
            lev_term += [r + 1] * len(levels)
            lev_centred += list(cen)
            gt = GroupTerm(p, grouping, levels, start, tuple(bool(c) for c in cen), reason, slope_of)
            group_terms.append(gt)
            prior_lines.append(f"SD of {gt.label}: half-normal(0, {priors.group_sd_scale:g}) on the {link} scale"
                               + (f" (per {transforms[slope_of][1]:g} units)" if slope_of else ""))
    prior_lines.append(f"residual SD: half-normal(0, {priors.sigma_scale:g}) umol m-2 s-1")
    if options.student_t:
        prior_lines.append(f"Student-t degrees of freedom: gamma({priors.nu_shape:g}, {priors.nu_rate:g}), > 1")

    K = len(columns)
    X = np.column_stack(columns) if K else np.zeros((L, 0))
    _check_fixed_columns(structure.name, params, X, fixed_map, coefs)
    cen_cell, cen_term, nc_cell, nc_term = _leaf_cells(structure, params, leaf_cells, L)
    if structure.leaf_correlation:
        n_cen = len(cen_cell) // len(leaf_cells)
        leaf_terms = [replace(lt, centred_leaves=n_cen, noncentred_leaves=L - n_cen) for lt in leaf_terms]
    lev_centred_a = np.asarray(lev_centred, bool)
    nc_rot, b0_shift, group_terms = _mean_split(group_terms, lev_centred_a, P, params)
    ip = [priors.intercept(p, ratio[p]) for p in params]
    curve_types = fit_obs["curve_type"].to_numpy()
    if options.sigma_by_curve:
        kinds = sorted(set(curve_types))
        sigma_group = np.searchsorted(kinds, curve_types) + 1
        sigma_names = tuple(f"{k} curves" for k in kinds)
    else:
        kinds = []
        sigma_group = np.ones(len(fit_obs), int)
        sigma_names = ("all points",)
    rset = fvcb.RUBISCO_SETS[fvcb.DEFAULT_RUBISCO_SET]
    resp = responses(options)
    e1, e2 = fvcb.electron_coefficients(options.electron)
    data = {
        "N": len(fit_obs), "L": L, "leaf": fit_obs["leaf_index"].to_numpy() + 1,
        "ci": fit_obs["ci"].to_numpy(float), "q": fit_obs["ppfd"].to_numpy(float),
        "tleaf": fit_obs["t_leaf"].to_numpy(float), "o2": fit_obs["o2"].to_numpy(float),
        "a": fit_obs["a_net"].to_numpy(float),
        "S": int(sigma_group.max()), "sigma_group": sigma_group,
        "use_tpu": int(options.tpu), "smooth": int(options.transition == "smooth"),
        "smooth_curvature": options.smooth_curvature, "student_t": int(options.student_t),
        "e1": e1, "e2": e2,
        "rubisco": np.array([rset.kc25, rset.ko25, rset.gamma25, rset.ha_kc, rset.ha_ko, rset.ha_gamma]),
        "tresp": np.array([[r.ha, r.hd or 0.0, r.ds or 0.0] for r in resp]),
        "peaked": [int(r.peaked) for r in resp],
        "ratio_j": int(ratio["jmax25"]), "ratio_rd": int(ratio["rd25"]),
        "prior_family": [1 if pr.family == "normal" else 2 for pr in ip],
        "prior_a": np.array([pr.a for pr in ip]), "prior_b": np.array([pr.b for pr in ip]),
        "K": K, "X": X, "fixed_map": np.array(fixed_map).reshape(K, P),
        "beta_sd": np.array([c.prior_sd for c in coefs]),
        "R": len(re_par), "re_par": re_par, "re_lev": np.array(re_lev, int).reshape(len(re_par), L),
        "re_x": np.array(re_x).reshape(len(re_par), L), "tau_sd": np.array(tau_sd),
        "Q": len(lev_term), "lev_term": lev_term,
        "Qc": int(lev_centred_a.sum()), "cen_lev": list(np.flatnonzero(lev_centred_a) + 1),
        "nc_lev": list(np.flatnonzero(~lev_centred_a) + 1), "nc_rot": nc_rot, "b0_shift": b0_shift,
        "Rl": len(leaf_tau_sd), "leaf_tau_sd": np.array(leaf_tau_sd),
        "Mc": len(cen_cell), "cen_cell": cen_cell, "cen_term": cen_term,
        "Mn": len(nc_cell), "nc_cell": nc_cell, "nc_term": nc_term,
        "leaf_corr": int(structure.leaf_correlation), "lkj_eta": float(structure.lkj_eta),
        "sigma_sd": priors.sigma_scale, "nu_shape": priors.nu_shape, "nu_rate": priors.nu_rate,
        "n_scale": 0, "scale_offset": np.zeros(0), "scale_mult": np.zeros(0),
    }
    if structure.leaf_correlation:
        prior_lines.append(f"correlation of leaf effects on {', '.join(lt.param for lt in leaf_terms)}: "
                           f"LKJ({structure.lkj_eta:g}) (Lewandowski, Kurowicka & Joe 2009)")
    return Design(structure, data, params, ratio, tuple(coefs), tuple(group_terms), tuple(leaf_terms),
                  transforms, tuple(prior_lines), train, obs_index,
                  np.asarray(cen_cell, int) - 1, np.asarray(nc_cell, int) - 1, options, sigma_names, tuple(kinds))


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
FREE_BLOCKS = ("b0_free", "beta", "log_tau", "u_c", "u_v", "log_tau_leaf", "eta_c", "eta_z", "log_sigma")


def free_parameters(design: Design, b0: np.ndarray, tau: np.ndarray, u_z: np.ndarray) -> dict[str, np.ndarray]:
    """The program's free b0_free and u_v for given b0, tau and non-centred level z (inverse of its
    transformed parameters)."""
    d = design.stan_data
    rot, shift = np.asarray(d["nc_rot"], float), np.asarray(d["b0_shift"], float)
    u_v = rot.T @ np.asarray(u_z, float)
    tau_nc = np.asarray(tau, float)[np.asarray(d["lev_term"], int)[np.asarray(d["nc_lev"], int) - 1] - 1] \
        if len(u_v) else np.zeros(0)
    return {"b0_free": np.asarray(b0, float) + shift @ (tau_nc * u_v), "u_v": u_v}


def with_free_parameters(design: Design, init: dict) -> dict:
    """``init`` (b0, beta, tau, u_c, u_z, tau_leaf, eta_c, eta_z, sigma, ...) with every free parameter of
    the program added (b0_free, u_v, and the SDs on the log scale), ready to start a chain."""
    out = dict(init)
    out.update(free_parameters(design, init["b0"], init["tau"], init["u_z"]))
    for name in ("tau", "tau_leaf", "sigma"):
        out["log_" + name] = np.log(np.asarray(init[name], float))
    return out


def stack_free(values: dict) -> np.ndarray:
    """The free parameter blocks of ``values`` (as `fitting.warm_values` returns them, each with a leading
    draw axis) stacked in FREE_BLOCKS order: (draws, free parameters)."""
    n = len(np.asarray(values[FREE_BLOCKS[0]]))
    return np.concatenate([np.asarray(values[k], float).reshape(n, -1) for k in FREE_BLOCKS], axis=1)


def _leaf_cells(structure: Structure, params, leaf_cells: list[tuple[int, np.ndarray]], L: int):
    """Centred and non-centred cells (1-based, flattened l + p L) and their leaf-term numbers.

    Uncorrelated effects: per (leaf, parameter) cell, parameter by parameter. Correlated effects (LKJ):
    leaf by leaf, Rl consecutive cells each in term order, a leaf wholly centred only when all its
    cells would be, so that its vector of effects has one joint normal prior.
    """
    cen_cell, cen_term, nc_cell, nc_term = [], [], [], []
    if structure.leaf_correlation:
        if len(leaf_cells) < 2:
            have = ", ".join(params[pi] for pi, _ in leaf_cells) or "none"
            raise SpecError(structure.name, [f"leaf_correlation applies only with leaf effects on two or more parameters "
                                             f"(this structure has leaf effects on: {have}); add random = [\"leaf\"] to "
                                             f"another parameter or drop leaf_correlation"])
        all_centred = np.all([c for _, c in leaf_cells], axis=0)
        for l in range(L):
            for k, (pi, _) in enumerate(leaf_cells):
                (cen_cell if all_centred[l] else nc_cell).append(l + pi * L + 1)
                (cen_term if all_centred[l] else nc_term).append(k + 1)
        return cen_cell, cen_term, nc_cell, nc_term
    for k, (pi, centred) in enumerate(leaf_cells):
        cells = np.arange(L) + pi * L
        cen_cell += list(cells[centred] + 1)
        cen_term += [k + 1] * int(centred.sum())
        nc_cell += list(cells[~centred] + 1)
        nc_term += [k + 1] * int((~centred).sum())
    return cen_cell, cen_term, nc_cell, nc_term


def _check_fixed_columns(name: str, params, X: np.ndarray, fixed_map: list, coefs: list[Coefficient]) -> None:
    """Every parameter's fixed columns and its intercept must be linearly independent over the leaves."""
    problems = []
    for pi, p in enumerate(params):
        idx = [k for k, row in enumerate(fixed_map) if row[pi] > 0]
        basis = np.ones((X.shape[0], 1))
        kept: list[int] = []
        for k in idx:
            col = X[:, k]
            if np.ptp(col) == 0:
                problems.append(f"{p}: term {coefs[k].label!r} does not vary across leaves (one value for every leaf), "
                                f"so it cannot be told from the intercept; drop it")
                continue
            trial = np.column_stack([basis, col])
            if np.linalg.matrix_rank(trial, tol=1e-8 * max(1.0, np.abs(trial).max())) < trial.shape[1]:
                others = ", ".join(repr(coefs[j].label) for j in kept) or "nothing"
                problems.append(f"{p}: fixed term {coefs[k].label!r} is perfectly collinear with the intercept and "
                                f"{others}; drop one of them")
                continue
            basis, kept = trial, kept + [k]
    if problems:
        raise SpecError(name, problems)


def _informed_leaves(param, ratio, leaf_fits, points_per_leaf, train) -> tuple[np.ndarray, str]:
    """Which leaves' effects on ``param`` to centre, and the rule used, in words."""
    enough = (points_per_leaf >= MIN_POINTS_CENTRED_LEAF) & train
    if leaf_fits is None:
        return enough, (f"centred where a leaf has >= {MIN_POINTS_CENTRED_LEAF} training points "
                        f"(median {int(np.median(points_per_leaf[train]))})")
    se = leaf_fits.link_se(param, ratio)
    est = leaf_fits.link_values(param, ratio)
    ok = train & np.isfinite(se) & np.isfinite(est)
    if ok.sum() < 2:
        return np.zeros_like(train), "non-centred: per-leaf fits do not inform this parameter"
    between = float(np.sqrt(max(np.var(est[ok], ddof=1) - np.mean(se[ok] ** 2), 0.0)))
    between = max(between, 0.02)
    centred = enough & np.isfinite(se) & (se < CENTRED_SE_FRACTION * between)
    return centred, (f"centred where the leaf's least-squares SE on the link scale is below {CENTRED_SE_FRACTION:g} x the between-leaf SD "
                     f"({between:.3g}; median SE {np.median(se[ok]):.3g})")


def responses(options: ModelOptions) -> list[fvcb.TemperatureResponse]:
    """Temperature responses of Vcmax, Jmax, Rd and TPU (Bernacchi et al. 2001, 2003)."""
    if options.peaked:
        v, j = fvcb.VCMAX_PEAKED_LEUNING2002, fvcb.JMAX_PEAKED_LEUNING2002
    else:
        v, j = fvcb.TemperatureResponse(fvcb.VCMAX_HA), fvcb.TemperatureResponse(fvcb.JMAX_HA)
    return [v, j, fvcb.TemperatureResponse(fvcb.RD_HA), fvcb.TemperatureResponse(fvcb.TPU_HA)]


def level_values(design: Design, draws: dict[str, np.ndarray]) -> np.ndarray:
    """Effects of every level of every group term per draw, (S, Q), in the stacked level order."""
    d = design.stan_data
    u = np.zeros((draws["b0"].shape[0], d["Q"]))
    if d["Q"]:
        cen = np.asarray(d["cen_lev"], int) - 1
        nc = np.asarray(d["nc_lev"], int) - 1
        u[:, cen] = draws["u_c"]
        u[:, nc] = draws["tau"][:, np.asarray(d["lev_term"])[nc] - 1] * draws["u_z"]
    return u


def heldout_levels(design: Design, leaf: int) -> list[tuple[int, int]]:
    """(group term r, stacked level index) of every level of ``leaf`` that has no training leaf."""
    d = design.stan_data
    out = []
    for r in range(d["R"]):
        lev = np.asarray(d["re_lev"][r], int) - 1
        if not design.train_leaves[lev == lev[leaf]].any():
            out.append((r, int(lev[leaf])))
    return out


def leaf_link_values(design: Design, draws: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Population mean and actual link-scale values of every (leaf, parameter) cell, per draw.

    ``draws`` holds the program's parameters flattened over chains: name -> (S, *shape).
    Returns (mu, eta), each shaped (S, L, P).
    """
    d = design.stan_data
    S = draws["b0"].shape[0]
    L, P = d["L"], len(design.params)
    mu = np.repeat(draws["b0"][:, None, :], L, axis=1)
    if d["K"]:
        mu = mu + np.einsum("lk,sk,kp->slp", d["X"], draws["beta"], d["fixed_map"])
    u = level_values(design, draws)
    for r in range(d["R"]):
        mu[:, :, d["re_par"][r] - 1] += u[:, d["re_lev"][r] - 1] * d["re_x"][r]
    mu_flat = mu.transpose(0, 2, 1).reshape(S, L * P)   # column-major cells: l + p L
    eta_flat = mu_flat.copy()
    eta_flat[:, design.cen_cells] = draws["eta_c"]
    if d["Mn"] and d.get("leaf_corr"):
        chol = leaf_cov_chol(design, draws)                                   # (S, Rl, Rl)
        z = draws["eta_z"].reshape(S, -1, d["Rl"])                            # leaf by leaf
        eta_flat[:, design.nc_cells] = mu_flat[:, design.nc_cells] + np.einsum("sij,slj->sli", chol, z).reshape(S, -1)
    elif d["Mn"]:
        eta_flat[:, design.nc_cells] = (mu_flat[:, design.nc_cells]
                                        + draws["tau_leaf"][:, np.asarray(d["nc_term"]) - 1] * draws["eta_z"])
    eta = eta_flat.reshape(S, P, L).transpose(0, 2, 1)
    return mu, eta


def leaf_cov_chol(design: Design, draws: dict[str, np.ndarray]) -> np.ndarray:
    """Cholesky factor of the covariance of one leaf's effects (leaf terms in order), per draw (S, Rl, Rl)."""
    tau = draws["tau_leaf"]
    if design.stan_data.get("leaf_corr"):
        return tau[:, :, None] * draws["leaf_chol"][:, 0]
    return np.einsum("ij,sj->sij", np.eye(tau.shape[1]), tau)


def natural_values(design: Design, eta: np.ndarray) -> dict[str, np.ndarray]:
    """Natural-scale leaf parameters from link-scale cells (..., L, P), ratios resolved."""
    out = {}
    v = eta[..., 0]
    for i, p in enumerate(design.params):
        x = eta[..., i]
        if LINKS.get(p, "log") == "logit":
            out[p] = 1.0 / (1.0 + np.exp(-x))
        else:
            out[p] = np.exp(x + v) if design.ratio.get(p) and p != "vcmax25" else np.exp(x)
    return out
