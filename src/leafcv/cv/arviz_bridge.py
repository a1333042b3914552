"""The one module that builds and reads ArviZ result objects (arviz-base and arviz-stats, the packages
of ArviZ 1.x; on Python 3.11 their 0.8 releases, whose API ArviZ 1.x took over).

arviz-stats' ``compare`` accepts precomputed ``ELPDData`` objects (``elpd``, ``se``, ``p``, ``n_samples``,
``n_data_points``, ``scale``, ``warning``, ``elpd_i`` as an xarray DataArray, and ``pareto_k`` and
``good_k`` optional). Every method (auto, exact, kfold) is labelled ``loo``; the per-unit values are
leave-one-leaf-out (or leave-one-level-out, or grouped K-fold) elpd all the same.

Only the stacking weights are taken from ``compare``. Totals, their SE and the paired differences
are computed by :mod:`leafcv.ranking` with the sample variance (``ddof=1``).

A fit is an xarray ``DataTree`` (ArviZ 1.x's replacement of InferenceData) with the groups
``posterior``, ``sample_stats``, ``observed_data`` and ``log_likelihood``, saved as NetCDF
(`open_fit` reads one back).
"""
from __future__ import annotations

import inspect
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from .result import CVResult, check_comparable
from ..data.dataset import LEAF_TERM

LEAF_DIM = "leaf"


def accepted_keywords(func, values: dict) -> dict:
    """The entries of ``values`` that ``func`` takes as keywords (arviz-stats 0.8 and 1.x differ)."""
    names = inspect.signature(func).parameters
    return {k: v for k, v in values.items() if k in names}


def to_elpd_data(result: CVResult):
    """Convert a result to arviz-stats' ``ELPDData`` on the log scale.

    Parameters
    ----------
    result
        Cross-validation result of one structure.

    Returns
    -------
    arviz_stats.ELPDData
        ``elpd`` and ``se`` from the result (see :attr:`CVResult.se`), ``p`` NaN (no
        effective number of parameters is estimated by leave-one-leaf-out), ``n_samples`` the
        result's draws, ``n_data_points`` the number of units, ``warning`` True when a finite
        k-hat is above the threshold, ``elpd_i`` over dimension ``"leaf"`` (whatever the unit),
        and ``pareto_k``/``good_k`` when some entry was scored by PSIS with a k-hat (NaN for the
        other entries).
    """
    from arviz_stats import ELPDData

    coords = {LEAF_DIM: list(result.leaves)}
    values: dict[str, object] = {
        "kind": "loo", "elpd": result.elpd, "se": result.se, "p": float("nan"), "n_samples": int(result.n_draws),
        "n_data_points": result.n_leaves, "scale": "log", "warning": False, "good_k": None,
        "elpd_i": xr.DataArray(np.array(result.elpd_i), dims=[LEAF_DIM], coords=coords, name="elpd_i"),
    }
    if np.any(np.isfinite(result.pareto_k)):
        values["warning"] = result.n_psis_high > 0
        values["pareto_k"] = xr.DataArray(np.array(result.pareto_k), dims=[LEAF_DIM], coords=coords, name="pareto_k")
        values["good_k"] = result.khat_threshold
    return ELPDData(**accepted_keywords(ELPDData.__init__, values))


def _shift_pointwise(elpd, offset: np.ndarray):
    """A copy of ``elpd`` whose ``elpd_i`` has ``offset`` (one value per leaf) subtracted.

    ``compare``'s stacking exponentiates ``elpd_i`` without a log-sum-exp, so a leaf's joint
    density below about exp(-745) underflows to 0. Subtracting the same value from every
    structure's elpd of a leaf does not move the stacking optimum (the objective moves by a
    constant), and only the weights are read from ``compare``.
    """
    import copy

    shifted = copy.copy(elpd)
    shifted.elpd_i = elpd.elpd_i - xr.DataArray(offset, dims=[LEAF_DIM], coords=elpd.elpd_i.coords)
    return shifted


def compare_results(results: dict[str, CVResult]) -> pd.Series:
    """Stacking weights from ``arviz_stats.compare(..., method="stacking")`` (log scale).

    Parameters
    ----------
    results
        Result per structure name; all must be comparable (same unit, same ids in the same
        order, all leave-one-out or all K-fold).

    Returns
    -------
    pandas.Series
        Stacking weights (Yao, Vehtari, Simpson & Gelman 2018), named ``weight`` and indexed by
        structure in the order of ``results``. Nothing else of ``compare``'s table is returned:
        elpd, SE and differences are computed by :mod:`leafcv.ranking`.

    Raises
    ------
    ValueError
        If the results cannot be compared (see :func:`leafcv.cv.result.check_comparable`), a
        key differs from its result's structure name, or a per-unit elpd is not finite.
    """
    mismatched = [key for key, res in results.items() if key != res.structure]
    if mismatched:
        raise ValueError(f"keys differ from the structure names of their results: {', '.join(mismatched)}")
    check_comparable(list(results.values()))
    not_finite = [name for name, res in results.items() if not np.all(np.isfinite(res.elpd_i))]
    if not_finite:
        raise ValueError(f"stacking needs finite per-unit elpd; not finite in: {', '.join(not_finite)}")
    offset = np.max(np.stack([r.elpd_i for r in results.values()]), axis=0)
    elpds = {name: _shift_pointwise(to_elpd_data(res), offset) for name, res in results.items()}
    from arviz_stats import compare

    with warnings.catch_warnings():
        # arviz-stats 0.8 calls DataFrame.sort_values(inplace=True), deprecated in pandas 3.1
        warnings.filterwarnings("ignore", message="The inplace keyword")
        # its note on many models' order statistics: leafcv's ranking states its own decision rule
        warnings.filterwarnings("ignore", message="Difference in performance potentially due to chance")
        table = compare(elpds, **accepted_keywords(compare, {"method": "stacking", "round_to": "none"}))
    weights = table["weight"].astype(float).reindex(list(results)).rename("weight")
    weights.index.name = "structure"
    return weights


#: The log_likelihood variable of a saved fit: each leaf's log marginal likelihood per draw.
LOG_MARGINAL = "leaf_log_marginal"

#: Stan's sampler fields under the names ArviZ's sample_stats uses.
_SAMPLE_STATS = {"lp__": "lp", "accept_stat__": "acceptance_rate", "stepsize__": "step_size",
                 "treedepth__": "tree_depth", "n_leapfrog__": "n_steps", "divergent__": "diverging",
                 "energy__": "energy"}


def _labelled_dims(design) -> tuple[dict[str, list[str]], dict[str, list], dict[str, tuple[str, list]]]:
    """Dimension names, coordinates and per-coordinate attributes (as extra coordinates) of the posterior's
    population variables, from the design's terms."""
    params = list(design.params)
    coefs = design.coefficients
    dims = {"b0": ["parameter"], "b0_free": ["parameter"], "beta": ["coefficient"],
            "tau": ["group_term"], "log_tau": ["group_term"], "tau_leaf": ["leaf_term"],
            "log_tau_leaf": ["leaf_term"], "sigma": ["sigma_group"], "log_sigma": ["sigma_group"],
            "leaf_value": [LEAF_DIM, "parameter"], "level_value": ["level"], "split_diff": ["split"],
            "leaf_corr": ["leaf_pair"], "tau_s": ["smooth_term"], "log_tau_s": ["smooth_term"],
            "z_s": ["smooth_column"]}
    coords: dict[str, list] = {
        "parameter": params,
        "coefficient": [f"{c.param}: {c.label}" for c in coefs],      # unique: a trait may act on two parameters
        "group_term": [g.label for g in design.group_terms],
        "leaf_term": [lt.param for lt in design.leaf_terms],
        "sigma_group": list(design.sigma_groups),
        "level": [f"{g.label}: {lev}" for g in design.group_terms for lev in g.levels],
        "smooth_term": [st.label for st in design.smooth_terms],
        "smooth_column": [f"{st.label}: {k + 1}" for st in design.smooth_terms for k in range(st.size)],
    }
    extra = {
        "parameter_link": ("parameter", [p.link for p in design.parameters]),
        "parameter_ratio_to_vcmax25": ("parameter", [int(bool(design.ratio.get(p))) for p in params]),
        "coefficient_label": ("coefficient", [c.label for c in coefs]),
        "coefficient_parameter": ("coefficient", [c.param for c in coefs]),
        "coefficient_kind": ("coefficient", [c.kind for c in coefs]),
        "coefficient_term": ("coefficient", [c.term for c in coefs]),
        "coefficient_grouping": ("coefficient", [c.group for c in coefs]),
        "coefficient_centre": ("coefficient", [c.centre for c in coefs]),
        "coefficient_scale": ("coefficient", [c.scale for c in coefs]),
        "coefficient_meaning": ("coefficient", [c.meaning for c in coefs]),
        "group_term_parameter": ("group_term", [g.param for g in design.group_terms]),
        "group_term_grouping": ("group_term", [g.grouping for g in design.group_terms]),
        "group_term_slope_of": ("group_term", [g.slope_of or "" for g in design.group_terms]),
        "level_group_term": ("level", [g.label for g in design.group_terms for _ in g.levels]),
        "level_name": ("level", [lev for g in design.group_terms for lev in g.levels]),
        "smooth_term_parameter": ("smooth_term", [st.param for st in design.smooth_terms]),
        "smooth_term_covariate": ("smooth_term", [st.covariate for st in design.smooth_terms]),
        "smooth_term_low": ("smooth_term", [st.basis.lo for st in design.smooth_terms]),
        "smooth_term_high": ("smooth_term", [st.basis.hi for st in design.smooth_terms]),
    }
    from ..fitting import correlation_pairs, split_pairs

    coords["split"] = [f"{coefs[w].param}: {coefs[w].term} {coefs[w].group}" for w, _ in split_pairs(design)]
    coords["leaf_pair"] = [f"{design.leaf_terms[i].param}~{design.leaf_terms[j].param}"
                           for i, j in correlation_pairs(design)]
    return dims, coords, extra


def to_datatree(fit, dataset, log_m: np.ndarray | None = None) -> xr.DataTree:
    """One structure's fit as an ArviZ data tree (xarray DataTree; ArviZ 1.x's InferenceData).

    Parameters
    ----------
    fit
        A :class:`leafcv.fitting.StructureFit`.
    dataset
        The data set it was fitted to.
    log_m
        Optional (draws chain after chain, leaves): each leaf's log marginal likelihood per draw, its
        own effects integrated out (:mod:`leafcv.cv.quadrature`). Stored as the ``log_likelihood``
        variable ``leaf_log_marginal`` (chain, draw, leaf), so that ``arviz_stats.loo`` gives
        leave-one-leaf-out PSIS.

    Returns
    -------
    xarray.DataTree
        Groups ``posterior``: every parameter of the program on its own scale, the population ones labelled
        (``b0`` over ``parameter``, on the link scale, a log ratio to vcmax25 where
        ``parameter_ratio_to_vcmax25`` is 1; ``beta`` over ``coefficient`` ("parameter: label", e.g.
        "vcmax25: n_area") with its label, parameter, kind, trait, grouping, and the trait's centre and scale
        as coordinates; ``tau`` over ``group_term``;
        ``tau_leaf`` over ``leaf_term``; ``sigma`` over ``sigma_group``; ``level_value``, the link-scale
        effect of every level of every group term, over ``level``), plus ``leaf_value`` (leaf,
        parameter): each leaf's parameters on the natural scale (Vcmax25, Jmax25 and Rd25 in
        umol m-2 s-1 at 25 C; alpha, theta unitless), ratios resolved. ``sample_stats``,
        ``observed_data`` (net assimilation of the points in the likelihood, dimension ``point``) and,
        with ``log_m``, ``log_likelihood``. The leaf ids are the ``leaf`` coordinate.
    """
    from ..design import leaf_link_values, level_values, natural_values

    draws = fit.draws
    design = fit.design
    C, D = draws.n_chains, draws.n_draws
    posterior = {k: np.asarray(v) for k, v in draws.params.items() if np.size(v)}
    flat = {k: np.asarray(v).reshape((C * D,) + np.shape(v)[2:]) for k, v in draws.params.items()}
    _, eta = leaf_link_values(design, flat)
    nat = natural_values(design, eta)
    posterior["leaf_value"] = np.stack([nat[p] for p in design.params], axis=-1).reshape(C, D, eta.shape[1], -1)
    if len(design.lev_term):
        posterior["level_value"] = level_values(design, flat).reshape(C, D, -1)
    stats = {name: np.asarray(draws.sampler[src]) for src, name in _SAMPLE_STATS.items() if src in draws.sampler}
    if "diverging" in stats:
        stats["diverging"] = stats["diverging"].astype(bool)
    obs = dataset.obs.iloc[design.obs_index]
    leaves = [str(x) for x in dataset.leaves[LEAF_TERM]]
    point_leaf = [leaves[i] for i in obs["leaf_index"].to_numpy()]
    observed = xr.Dataset({"net_assimilation": ("point", obs["a_net"].to_numpy(float))},
                          coords={"point": np.arange(len(obs)), "point_leaf": ("point", point_leaf)})
    dims, coords, extra = _labelled_dims(design)
    coords[LEAF_DIM] = leaves
    dims = {k: v for k, v in dims.items() if k in posterior}
    from arviz_base import from_dict

    attrs = {"structure": design.structure.name, "engine": draws.engine, "seed": int(draws.seed)}
    tree = from_dict({"posterior": posterior, "sample_stats": stats}, dims=dims, coords=coords,
                     attrs={"posterior": attrs, "sample_stats": attrs})
    post = tree["posterior"].to_dataset()
    post = post.assign_coords({name: (dim, values) for name, (dim, values) in extra.items() if dim in post.dims})
    groups = {"posterior": post, "sample_stats": tree["sample_stats"].to_dataset(), "observed_data": observed}
    if log_m is not None:
        lm = np.asarray(log_m, float)
        if lm.shape != (C * D, len(leaves)):
            raise ValueError(f"log_m has shape {lm.shape}; expected ({C * D}, {len(leaves)})")
        groups["log_likelihood"] = xr.Dataset(
            {LOG_MARGINAL: (("chain", "draw", LEAF_DIM), lm.reshape(C, D, len(leaves)))},
            coords={"chain": np.arange(C), "draw": np.arange(D), LEAF_DIM: leaves})
    return xr.DataTree.from_dict(groups)


#: The earlier name of `to_datatree`.
to_inference_data = to_datatree


def open_fit(path: str | Path) -> xr.DataTree:
    """A saved fit (NetCDF) read whole into memory, the file closed again (so that a later atomic
    replacement of it never meets an open handle)."""
    with xr.open_datatree(str(path), engine="h5netcdf") as tree:
        return tree.load()
