"""Fit one structure on the data: design, inits, engine, diagnostics, and a summary by meaning."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from .data.dataset import Dataset
from .design import Design, build_design, leaf_link_values
from .spec import ModelOptions
from .diagnostics import Diagnostics, chain_arrays, diagnose
from .engines.base import Draws, Engine
from .engines.program import program_text
from .inits import LeafFits, cold_scaling, fit_leaves, structure_inits
from .priors import PriorSet
from .spec import DataSpec, SamplerSpec, Structure

#: Population-level parameters of the generic program (diagnostics and summaries run over these).
POPULATION = ("b0", "beta", "tau", "tau_leaf", "tau_s", "sigma", "nu", "leaf_corr", "split_diff")


def correlation_pairs(design: Design) -> list[tuple[int, int]]:
    """(i, j), i < j, leaf-term pairs whose correlation is reported when leaf effects are correlated."""
    n = len(design.leaf_terms) if design.leaf_correlation else 0
    return [(i, j) for i in range(n) for j in range(i + 1, n)]


def split_pairs(design: Design) -> list[tuple[int, int]]:
    """(within k, between k) coefficient indices of every within/between split."""
    c = design.coefficients
    return [(k, k + 1) for k in range(len(c) - 1) if c[k].pairs_with_next]


def add_derived(design: Design, params: dict[str, np.ndarray]) -> None:
    """Add derived population quantities to ``params`` (chains, draws, n), in place.

    leaf_corr: correlations of leaf effects, Omega = L L' from the LKJ Cholesky factor;
    split_diff: between-group minus within-group slope of every within/between split.
    """
    pairs = correlation_pairs(design)
    if pairs:
        chol = params["leaf_chol"][:, :, 0]
        omega = np.einsum("cdik,cdjk->cdij", chol, chol)
        params["leaf_corr"] = np.stack([omega[..., i, j] for i, j in pairs], axis=-1)
    splits = split_pairs(design)
    if splits:
        params["split_diff"] = np.stack([params["beta"][..., b] - params["beta"][..., w] for w, b in splits], axis=-1)


@dataclass(frozen=True)
class StructureFit:
    design: Design
    draws: Draws
    diagnostics: Diagnostics
    init_note: str


def default_engine() -> Engine:
    from .engines.pystan_engine import PyStanEngine

    return PyStanEngine()


def resolve_engine(engine) -> Engine:
    """An engine object from a name ("pystan", "cmdstan"), an engine, or None (PyStan)."""
    if engine is None:
        return default_engine()
    from .engines.choice import make_engine

    return make_engine(engine)


def fit_structure(
    structure: Structure,
    dataset: Dataset,
    data_spec: DataSpec,
    sampler: SamplerSpec,
    *,
    engine: Engine | str | None = None,
    options: ModelOptions | None = None,
    priors: PriorSet | None = None,
    train_leaves: np.ndarray | None = None,
    leaf_fits: LeafFits | None = None,
    seed: int | None = None,
    progress: Callable[[int, int], None] | None = None,
    warm_start: "StructureFit | None" = None,
    warm_inits_too: bool = True,
) -> StructureFit:
    """Fit ``structure`` with chains started from per-leaf least-squares fits, dispersed; or, with
    ``warm_start`` (a fit of the same structure, e.g. on all leaves before a refit), each chain from the
    last draw of the same chain of that fit (`warm_inits`; not with ``warm_inits_too`` False) and every
    free parameter offset and scaled by that fit's posterior (`warm_scaling`)."""
    engine = resolve_engine(engine)
    leaf_fits = leaf_fits or fit_leaves(dataset)
    design = build_design(structure, dataset, data_spec, options, priors, train_leaves, leaf_fits)
    seed = sampler.seed if seed is None else seed
    inits = structure_inits(design, leaf_fits, dataset, sampler.chains, seed)
    note_start, data = None, {**design.stan_data, **cold_scaling(design, leaf_fits)}
    if warm_start is not None and not design.leaf_correlation:
        if warm_inits_too:
            inits = warm_inits(warm_start, design, sampler.chains)
        data = {**design.stan_data, **warm_scaling(warm_start, design)}
        note_start = ("chains started from the last draws of the full-data fit (held-out leaves at their population "
                      "mean); " if warm_inits_too else "") + "parameters scaled by their full-data posterior means and SDs"
    draws = engine.fit(program_text(), data, sampler, seed, inits, progress)
    add_derived(design, draws.params)
    names = [n for n in POPULATION if n in draws.params and draws.params[n].size]
    diag = diagnose(draws, names, sampler.max_treedepth)
    note = note_start or (f"chains started from per-leaf least-squares fits (SciPy; theta held at 0.7; "
            f"leaf-fit RMSE {leaf_fits.rmse:.2f} umol m-2 s-1"
            + (f"; {len(leaf_fits.failed)} leaf fits failed and used defaults" if leaf_fits.failed else "")
            + "), dispersed by normal(0, 0.1) on the link scale; parameters scaled by least-squares guesses of "
              "their posterior SDs")
    return StructureFit(design, draws, diag, note)


def warm_values(fit: StructureFit, design: Design, chain_draw: tuple[np.ndarray, np.ndarray]) -> dict[str, np.ndarray]:
    """Draws ``chain_draw`` (chain and draw indices) of ``fit`` expressed in ``design``'s parameters (same
    structure and data; the training leaves may differ), each array with a leading draw axis. Link-scale
    values of every leaf cell and of every group level carry over unchanged (the linear predictor does not
    depend on the training set), re-expressed in ``design``'s centred and non-centred cells and in the
    program's free parameters (`with_free_parameters`); held-out leaves sit at their population mean."""
    from .design import FREE_BLOCKS, free_parameters, level_values

    c, i = (np.asarray(a, int) for a in chain_draw)
    src = {k: np.asarray(v, float)[c, i] for k, v in fit.draws.params.items()}
    mu, eta = leaf_link_values(fit.design, src)
    n = len(c)
    mu_flat, eta_flat = mu.transpose(0, 2, 1).reshape(n, -1), eta.transpose(0, 2, 1).reshape(n, -1)
    held = np.tile(~design.train_leaves, len(design.params))
    eta_flat = np.where(held[None, :], mu_flat, eta_flat)
    u = level_values(fit.design, src)
    tau, tau_leaf = src["tau"], src["tau_leaf"]
    lev_term, cen_lev, nc_lev = design.lev_term, design.lev_centred, ~design.lev_centred
    out = {
        "b0": src["b0"], "beta": src["beta"], "tau": tau, "tau_leaf": tau_leaf,
        "u_c": u[:, cen_lev], "u_z": u[:, nc_lev] / tau[:, lev_term[nc_lev]],
        "eta_c": eta_flat[:, design.cen_cells],
        "eta_z": (eta_flat[:, design.nc_cells] - mu_flat[:, design.nc_cells]) / tau_leaf[:, design.nc_term],
        "sigma": src["sigma"], "nu": src["nu"],
        "tau_s": src.get("tau_s", np.zeros((n, 0))), "z_s": src.get("z_s", np.zeros((n, 0))),
    }
    S = len(design.sigma_groups)
    if out["sigma"].shape[1] != S:      # residual SDs by curve type, a type missing in training
        out["sigma"] = np.repeat(out["sigma"].mean(axis=1, keepdims=True), S, axis=1)
    free = [free_parameters(design, out["b0"][k], tau[k], out["u_z"][k]) for k in range(n)]
    out["b0_free"] = np.array([f["b0_free"] for f in free]).reshape(n, -1)
    out["u_v"] = np.array([f["u_v"] for f in free]).reshape(n, -1)
    for name in ("tau", "tau_leaf", "sigma", "tau_s"):
        out["log_" + name] = np.log(out[name])
    assert all(k in out for k in FREE_BLOCKS)
    return out


def warm_inits(fit: StructureFit, design: Design, chains: int) -> list[dict]:
    """Inits for ``design`` from the last draw of each chain of ``fit`` (see `warm_values`)."""
    n_chains, n_draws = fit.draws.params["b0"].shape[:2]
    cs = np.arange(chains) % n_chains
    vals = warm_values(fit, design, (cs, np.full(chains, n_draws - 1)))
    return [{k: (v[j].tolist() if np.ndim(v[j]) else float(v[j])) for k, v in vals.items()} for j in range(chains)]


#: Draws of the full-data fit used to set a refit's parameter scaling.
SCALING_DRAWS = 400


def warm_scaling(fit: StructureFit, design: Design) -> dict[str, np.ndarray]:
    """The program's scale_offset / scale_mult for a refit of ``design`` started from ``fit``: every free
    parameter offset by its posterior mean in ``fit`` and scaled by its posterior SD (an exact
    reparameterisation; it only spares the warm-up from learning the scales). Cells the full fit cannot
    inform (held-out leaves' standard-normal effects) keep offset 0 and scale 1."""
    from .design import stack_free

    n_chains, n_draws = fit.draws.params["b0"].shape[:2]
    flat = np.arange(n_chains * n_draws)
    pick = flat[np.linspace(0, flat.size - 1, min(SCALING_DRAWS, flat.size)).astype(int)]
    vals = warm_values(fit, design, (pick // n_draws, pick % n_draws))
    stacked = stack_free(vals)
    off, sd = stacked.mean(axis=0), stacked.std(axis=0, ddof=1)
    fixed = ~(sd > 1e-8) | ~np.isfinite(sd)
    off = np.where(fixed & ~np.isfinite(off), 0.0, off)
    return {"n_scale": int(off.size), "scale_offset": off, "scale_mult": np.where(fixed, 1.0, sd)}


def _labels(design: Design) -> dict[str, tuple[str, Callable[[np.ndarray], np.ndarray], str]]:
    """Parameter element -> (meaning, transform to the reported scale, unit)."""
    out = {}
    for i, par in enumerate(design.parameters):
        p = par.name
        if design.ratio.get(p):      # the intercept of a log ratio, back on the ratio scale
            out[f"b0[{i + 1}]"] = (f"{p}/vcmax25 ratio at reference", par.from_link, "ratio")
        else:
            out[f"b0[{i + 1}]"] = (f"{p} at reference", par.from_link, "" if par.link == "logit" else "umol m-2 s-1")
    for k, c in enumerate(design.coefficients):
        out[f"beta[{k + 1}]"] = (c.meaning, lambda x: x, "link scale")
    for k, (w, b) in enumerate(split_pairs(design)):
        c = design.coefficients[w]
        out[f"split_diff[{k + 1}]"] = (f"between minus within {c.group} slope of {c.param} on {c.term}",
                                       lambda x: x, "link scale")
    for r, g in enumerate(design.group_terms):
        out[f"tau[{r + 1}]"] = (f"SD of {g.label}", lambda x: x, "link scale")
    for r, lt in enumerate(design.leaf_terms):
        out[f"tau_leaf[{r + 1}]"] = (f"SD of leaf effects on {lt.param}", lambda x: x, "link scale")
    for r, st in enumerate(design.smooth_terms):
        out[f"tau_s[{r + 1}]"] = (f"SD of the bends of the {st.label}", lambda x: x, "link scale")
    for k, (i, j) in enumerate(correlation_pairs(design)):
        a, b = design.leaf_terms[i].param, design.leaf_terms[j].param
        out[f"leaf_corr[{k + 1}]"] = (f"correlation of leaf effects on {a} and {b}", lambda x: x, "")
    for s, covers in enumerate(design.sigma_groups):
        out[f"sigma[{s + 1}]"] = ("residual SD" + (f" ({covers})" if len(design.sigma_groups) > 1 else ""),
                                  lambda x: x, "umol m-2 s-1")
    if design.student_t:
        out["nu[1]"] = ("Student-t degrees of freedom", lambda x: x, "")
    return out


def summary_table(fit: StructureFit) -> pd.DataFrame:
    """Population-level parameters by meaning on the reported scale, with R-hat and ESS."""
    from . import arviz_arrays as az

    arrays = chain_arrays(fit.draws, [n for n in POPULATION if n in fit.draws.params])
    rows = []
    for key, (meaning, f, unit) in _labels(fit.design).items():
        if key not in arrays:
            continue
        x = f(arrays[key])
        rows.append({
            "parameter": key, "meaning": meaning, "unit": unit, "mean": float(np.mean(x)),
            "q05": float(np.quantile(x, 0.05)), "q95": float(np.quantile(x, 0.95)),
            "rhat": float(az.rhat(arrays[key])), "ess_bulk": float(az.ess(arrays[key], method="bulk")),
            "ess_tail": float(az.ess(arrays[key], method="tail")),
        })
    return pd.DataFrame(rows)


def format_fit(fit: StructureFit, title: str) -> str:
    """A plain-text report of one fit: parameters, diagnostics, centring, priors, verdict."""
    d = fit.diagnostics
    table = summary_table(fit)
    lines = [title, "=" * len(title), fit.init_note, ""]
    with pd.option_context("display.width", 160, "display.max_colwidth", 60):
        lines.append(table.to_string(index=False, float_format=lambda v: f"{v:.4g}"))
    lines += ["", f"sampling {fit.draws.sampling_seconds:.1f} s; {d.chains} chains x {d.n_draws} draws; "
              f"max R-hat {d.max_rhat:.3f}; min ESS bulk {d.min_ess_bulk:.0f}, tail {d.min_ess_tail:.0f}; "
              f"divergences {d.divergences}; tree-depth hits {d.treedepth_hits}; min E-BFMI {d.min_ebfmi:.2f}"]
    lines.append("parameterisation of random terms:")
    for lt in fit.design.leaf_terms:
        lines.append(f"  leaf effects on {lt.param}: {lt.centred_leaves} centred, {lt.noncentred_leaves} non-centred ({lt.reason})")
    for g in fit.design.group_terms:
        lines.append(f"  {g.label}: {sum(g.centred)} of {len(g.levels)} levels centred ({g.reason})")
    if not fit.design.leaf_terms and not fit.design.group_terms:
        lines.append("  none (no random terms)")
    lines.append("priors:")
    lines += [f"  {p}" for p in fit.design.prior_lines]
    if d.converged:
        lines.append("verdict: converged (all diagnostics within thresholds)")
    else:
        lines.append("verdict: NOT CONVERGED - " + "; ".join(d.problems)
                     + ". Do not use these estimates; try more warm-up, a higher adapt_delta, or a simpler structure.")
    return "\n".join(lines)
