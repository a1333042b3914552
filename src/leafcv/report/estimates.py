"""What a structure estimates, read from its saved fit (``fits/<structure>.nc``), on the scales a
reader uses, with 90 % intervals (the 5 % and 95 % quantiles of the posterior draws; the point value
is the median).

The fit is read in its labelled layout (`leafcv.cv.arviz_bridge.to_datatree`), by its coordinates alone:
posterior ``b0`` over dimension ``parameter`` (intercepts on each parameter's link scale; coordinates
``parameter_link`` and ``parameter_ratio_to_vcmax25``), ``beta`` over ``coefficient`` (coordinates
``coefficient_label`` where written, ``coefficient_parameter``, ``coefficient_kind`` — trait, level,
within, between — ``coefficient_term``, ``coefficient_grouping`` and ``coefficient_scale``), ``tau`` over
``group_term`` (``group_term_parameter``), ``tau_s`` over ``smooth_term`` (``smooth_term_parameter``,
``smooth_term_low`` and ``smooth_term_high``: the covariate's observed range), ``tau_leaf`` over its one dimension (``leaf_term`` or
``parameter``), ``sigma`` (over ``sigma_group`` or none), ``leaf_corr`` where present, and ``leaf_value``
(chain, draw, leaf, parameter) on the natural scale. Nothing is read from words (labels, prior lines).
A fit without these coordinates (written by an earlier version) gives no estimates, and says so.

Reader's scales: an intercept on its natural scale (exp on a log link, the inverse logit on a logit
link; a ratio to vcmax25 as that ratio); a trait slope or a factor level on a log link as the
multiplicative change of the parameter (exp β) per the trait's scale (the "per N units" of the
comparison file), on a logit link as an odds ratio (also exp β); within/between splits also as
between − within, exp(β_between − β_within), 1 meaning the same slope; SDs on the link scale;
residual SDs in µmol m⁻² s⁻¹.

Tests: tests/report/test_report_estimates.py.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import expit

from ..spec import LINKS
from ..data.dataset import LEAF_TERM

LEVELS = (0.05, 0.95)
NATURAL_UNIT = {"vcmax25": "µmol m⁻² s⁻¹", "jmax25": "µmol m⁻² s⁻¹", "rd25": "µmol m⁻² s⁻¹",
                "tpu25": "µmol m⁻² s⁻¹", "alpha": "mol mol⁻¹", "theta": "dimensionless"}


#: The coordinates a labelled fit carries for each labelled dimension (every fit leafcv writes has them).
COORDINATES = {"parameter": ("parameter_link", "parameter_ratio_to_vcmax25"),
               "coefficient": ("coefficient_parameter", "coefficient_kind", "coefficient_term",
                               "coefficient_grouping", "coefficient_scale"),
               "group_term": ("group_term_parameter",),
               "smooth_term": ("smooth_term_parameter", "smooth_term_low", "smooth_term_high")}


def labelled(idata) -> tuple[bool, str]:
    """Whether a fit has the labelled layout, and if not, why not."""
    post = getattr(idata, "posterior", None)
    if post is None or "b0" not in post:
        return False, "it has no posterior intercepts (b0)"
    if "parameter" not in post["b0"].dims:
        return False, ("it was written in the unlabelled layout of an earlier leafcv version (b0 has no "
                       "'parameter' coordinate); re-run `leafcv compare` to write a labelled fit")
    lacking = [name for dim, names in COORDINATES.items() if dim in post.dims and post.sizes[dim]
               for name in names if not (name in post.coords and post.coords[name].dims == (dim,))]
    if lacking:
        return False, (f"it lacks the coordinate(s) {', '.join(lacking)} that leafcv writes with every fit; "
                       "re-run `leafcv compare` to write it again")
    return True, ""


def _draws(da) -> np.ndarray:
    """(samples, ...) with chain and draw stacked."""
    x = da.transpose("chain", "draw", ...).values
    return x.reshape((-1,) + x.shape[2:])


def _summary(x: np.ndarray) -> dict[str, float]:
    q = np.quantile(x, [0.5, *LEVELS])
    return {"median": float(q[0]), "q05": float(q[1]), "q95": float(q[2])}


def _coord(da, name: str) -> list[str]:
    """The values of coordinate ``name`` of ``da`` as text (`labelled` checked it is there)."""
    return [str(v) for v in da.coords[name].values]


def population_table(idata) -> pd.DataFrame:
    """Population-level estimates of a labelled fit (`labelled`), one row per quantity.

    Columns: ``quantity`` (in words), ``scale`` (what the numbers are), ``median``, ``q05``,
    ``q95``, and ``variable`` (the posterior variable and element).
    """
    post = idata.posterior
    rows = []

    def add(quantity: str, scale: str, x: np.ndarray, variable: str) -> None:
        rows.append({"quantity": quantity, "scale": scale, **_summary(x), "variable": variable})

    b0 = post["b0"]
    b0_ratio = [bool(v) for v in b0.coords["parameter_ratio_to_vcmax25"].values]
    b0_link = _coord(b0, "parameter_link")
    ratio = {str(p) for p, r in zip(b0["parameter"].values, b0_ratio) if r}
    for k, p in enumerate(str(v) for v in b0["parameter"].values):
        x = _draws(b0.isel(parameter=k))
        if b0_ratio[k]:
            add(f"{p}/vcmax25 at reference traits and levels", "ratio", np.exp(x), f"b0[{p}]")
        elif b0_link[k] == "logit":
            add(f"{p} at reference traits and levels", NATURAL_UNIT.get(p, ""), expit(x), f"b0[{p}]")
        else:
            add(f"{p} at reference traits and levels", NATURAL_UNIT.get(p, ""), np.exp(x), f"b0[{p}]")
    if "beta" in post and post["beta"].sizes.get("coefficient", 0):
        rows += _coefficient_rows(post["beta"], ratio)
    if "tau" in post and post["tau"].sizes.get("group_term", 0):
        tau = post["tau"]
        params = _coord(tau, "group_term_parameter")
        for k, label in enumerate(str(v) for v in tau["group_term"].values):
            add(f"SD of {label}", f"SD, {_link_of(params[k], ratio)} scale", _draws(tau.isel(group_term=k)),
                f"tau[{label}]")
    if "tau_s" in post and post["tau_s"].sizes.get("smooth_term", 0):
        tau_s = post["tau_s"]
        params = _coord(tau_s, "smooth_term_parameter")
        low, high = (_coord(tau_s, f"smooth_term_{end}") for end in ("low", "high"))
        for k, label in enumerate(str(v) for v in tau_s["smooth_term"].values):
            add(f"SD of the bends of the {label} (0 = a straight line; fitted over {float(low[k]):g}-{float(high[k]):g})",
                f"SD, {_link_of(params[k], ratio)} scale", _draws(tau_s.isel(smooth_term=k)), f"tau_s[{label}]")
    for name, what in (("tau_leaf", "SD of leaf effects on {}"), ("leaf_corr", "correlation of leaf effects on {}")):
        if name not in post:
            continue
        da = post[name]
        extra = [d for d in da.dims if d not in ("chain", "draw")]
        if len(extra) != 1 or not da.sizes[extra[0]]:
            continue
        for k, label in enumerate(str(v) for v in da[extra[0]].values):
            scale = f"SD, {_link_of(label, ratio)} scale" if name == "tau_leaf" else "correlation"
            add(what.format(label.replace("~", " and ")), scale, _draws(da.isel({extra[0]: k})), f"{name}[{label}]")
    if "sigma" in post:
        sigma = post["sigma"]
        extra = [d for d in sigma.dims if d not in ("chain", "draw")]
        if not extra:
            add("residual SD", "µmol m⁻² s⁻¹", _draws(sigma), "sigma")
        else:
            dim = extra[0]
            for k, label in enumerate(str(v) for v in sigma[dim].values):
                name = "residual SD" + (f" ({label})" if sigma.sizes[dim] > 1 else "")
                add(name, "µmol m⁻² s⁻¹", _draws(sigma.isel({dim: k})), f"sigma[{label}]")
    if "nu" in post:
        add("Student-t degrees of freedom", "", _draws(post["nu"]).reshape(-1), "nu")
    return pd.DataFrame(rows, columns=["quantity", "scale", "median", "q05", "q95", "variable"])


def _link_of(p: str, ratio: set[str]) -> str:
    """The link of parameter ``p``'s scale: log for a ratio to vcmax25, else the parameter's own."""
    return "log" if p in ratio else LINKS.get(p, "log")


def _coefficient_rows(beta, ratio: set[str]) -> list[dict]:
    labels = _coord(beta, "coefficient_label") if "coefficient_label" in beta.coords else _coord(beta, "coefficient")
    params = _coord(beta, "coefficient_parameter")
    kinds = _coord(beta, "coefficient_kind")
    traits = _coord(beta, "coefficient_term")
    groups = _coord(beta, "coefficient_grouping")
    scales = [float(v) for v in beta.coords["coefficient_scale"].values]
    x = _draws(beta)
    rows = []
    within: dict[tuple[str, str, str], np.ndarray] = {}
    for k, label in enumerate(labels):
        p, kind, trait, group = params[k], kinds[k], traits[k], groups[k]
        link = _link_of(p, ratio)
        target = f"{p}/vcmax25" if p in ratio else p
        scale = {"log": "×", "logit": "odds ratio"}.get(link, "link scale")
        value = np.exp(x[:, k]) if link in ("log", "logit") else x[:, k]
        if kind == "level":
            what = f"{target}: {label} against the reference level"
        else:
            per = scales[k]
            per_text = (f"per {per:g} unit{'' if per == 1 else 's'} of {trait}" if np.isfinite(per)
                        else f"per unit of {trait} as scaled in the fit")
            slope = {"within": f"within-{group} slope on", "between": f"between-{group} slope on",
                     "smooth": "straight-line part of the smooth trend over"}.get(kind, "slope on")
            what = f"{target}: {slope} {trait}, {per_text}"
        rows.append({"quantity": what, "scale": scale, **_summary(value), "variable": f"beta[{label}]"})
        if kind == "within":
            within[(p, trait, group)] = x[:, k]
        elif kind == "between" and (p, trait, group) in within:
            diff = x[:, k] - within[(p, trait, group)]
            rows.append({"quantity": f"{target} on {trait}: between-{group} slope against the within-{group} slope "
                                     f"(exp of between − within; 1 = the same slope)",
                         "scale": "ratio of ×" if link == "log" else "ratio of odds ratios",
                         **_summary(np.exp(diff)), "variable": f"beta[between − within {trait} {group}]"})
    return rows


def leaf_table(idata) -> pd.DataFrame | None:
    """Per leaf, median and 90 % interval of each parameter's natural-scale value (``leaf_value``);
    columns ``leaf`` then ``<parameter>``, ``<parameter>_q05``, ``<parameter>_q95``. None without
    ``leaf_value``."""
    post = idata.posterior
    if "leaf_value" not in post:
        return None
    lv = post["leaf_value"].transpose("chain", "draw", "leaf", "parameter")
    x = lv.values.reshape((-1,) + lv.shape[2:])
    q = np.quantile(x, [0.5, *LEVELS], axis=0)          # (3, leaf, parameter)
    out = {"leaf": [str(v) for v in lv[LEAF_TERM].values]}
    for j, p in enumerate(str(v) for v in lv["parameter"].values):
        out[p] = q[0, :, j]
        out[f"{p}_q05"] = q[1, :, j]
        out[f"{p}_q95"] = q[2, :, j]
    return pd.DataFrame(out)
