"""A comparison in words: the summary `leafcv check` prints, and one line per parameter or model."""
from __future__ import annotations

from ..data.roles import CI_UNITS_KEY, role
from ..spec import LINKS, PARAMETERS, Comparison, DataSpec, ModelOptions, ParamSpec
from .keys import LEAF_TERM, PRIOR_SCALE_FIELDS


def describe(comparison: Comparison) -> str:
    """A human-readable summary of a comparison, one line per parameter of each structure.

    Parameters
    ----------
    comparison
        A comparison from `load_comparison`.

    Returns
    -------
    str
        Several lines: data, sampler and cross-validation settings, then for each structure its
        parameters, e.g. ``vcmax25: log link; intercept + fixed leaf_n, month + random leaf``.
    """
    lines = _describe_header(comparison)
    for structure in comparison.structures:
        lines.append(f"structure {structure.name!r}" + (f"  [{structure.origin}]" if structure.origin else ""))
        for pname in PARAMETERS:
            lines.append(f"  {describe_param(pname, structure.params[pname])}")
        if structure.options.tpu:
            lines.append("  tpu25: log link; shared by all leaves (TPU limitation on)")
        if structure.leaf_correlation:
            leaf = [p for p in PARAMETERS if LEAF_TERM in structure.params[p].random]
            lines.append(f"  leaf effects on {', '.join(leaf)} correlated (LKJ({structure.lkj_eta:g}) prior)")
        lines.append(f"  model: {describe_options(structure.options)}")
        if structure.priors is not None:
            changed = _changed_priors(structure.priors)
            if changed:
                lines.append(f"  priors changed from the defaults: {', '.join(changed)}")
    return "\n".join(lines)


def describe_options(options: ModelOptions) -> str:
    """The model options in words, e.g. ``hard minimum, 4/8 electrons, Arrhenius, normal likelihood``."""
    parts = ["hard minimum" if options.transition == "min" else f"smooth co-limitation (curvature {options.smooth_curvature:g})",
             f"{options.electron.replace('-', '/')} electrons per CO2",
             "peaked Arrhenius for Vcmax and Jmax" if options.peaked else "Arrhenius",
             "Student-t likelihood" if options.student_t else "normal likelihood",
             "one residual SD per curve type" if options.sigma_by_curve else "one residual SD"]
    if options.tpu:
        parts.append("TPU limitation")
    return ", ".join(parts)


def describe_param(pname: str, spec: ParamSpec) -> str:
    """One line saying how a parameter varies, e.g. ``alpha: logit link; shared by all leaves``.

    Parameters
    ----------
    pname
        The parameter's name (one of `PARAMETERS`).
    spec
        How it varies in one structure.

    Returns
    -------
    str
        The line, without indentation.
    """
    if spec.ratio_to:
        head = f"{pname}: log({pname}/{spec.ratio_to})"
        separator = " "
    else:
        head = f"{pname}: {LINKS[pname]} link"
        separator = "; "
    if not spec.fixed and not spec.random and not spec.split and not spec.smooth:
        return f"{head}{separator}shared by all leaves"
    parts = ["intercept"]
    if spec.fixed:
        parts.append("fixed " + ", ".join(spec.fixed))
    if spec.split:
        parts.append("split " + ", ".join(f"{t} within/between {g}" for t, g in spec.split))
    if spec.random:
        parts.append("random " + ", ".join(spec.random))
    if spec.slopes:
        parts.append("random slopes " + ", ".join(f"{t} by {g}" for t, g in spec.slopes))
    if spec.smooth:
        parts.append("smooth trend over " + ", ".join(spec.smooth))
    text = f"{head}; " + " + ".join(parts)
    if spec.centring:
        chosen = ", ".join(f"{group} {choice}" for group, choice in spec.centring.items())
        text += f" (centring: {chosen})"
    return text


def _changed_priors(priors) -> list[str]:
    from ..priors import PriorSet

    default = PriorSet()
    out = [p for p in priors.intercepts if priors.intercepts[p] != default.intercepts.get(p)]
    out += [f"{p}_ratio" for p in priors.ratio_intercepts if priors.ratio_intercepts[p] != default.ratio_intercepts.get(p)]
    out += [k for k in (*PRIOR_SCALE_FIELDS.values(), "nu_shape", "nu_rate") if getattr(priors, k) != getattr(default, k)]
    return out


def _describe_header(comparison: Comparison) -> list[str]:
    """Lines on the data, traits, cross-validation and sampler settings."""
    data, cv, sampler = comparison.data, comparison.cv, comparison.sampler
    return [
        f"comparison {comparison.path} (format {comparison.format}), "
        f"{len(comparison.structures)} structure(s)",
        f"data: {data.file}",
        "  columns: " + ", ".join(f"{role(k)} = {v!r}" for k, v in data.columns.items()),
        f"  {CI_UNITS_KEY} in {data.ci_unit}" + (f", pressure {data.pressure_kpa:g} kPa" if data.pressure_kpa else ""),
        "  groups: " + (", ".join(data.groups) if data.groups else "none"),
        "  traits: " + (", ".join(_describe_trait(data, t) for t in data.traits) if data.traits else "none"),
        f"cv: by {cv.by}, method {cv.method}" + (f", {cv.folds} folds" if cv.method == "kfold" else ""),
        f"sampler: {sampler.chains} chains, {sampler.warmup} warm-up + {sampler.draws} draws each, "
        f"seed {sampler.seed}, adapt_delta {sampler.adapt_delta:g}, max_treedepth {sampler.max_treedepth}",
    ]


def _describe_trait(data: DataSpec, trait: str) -> str:
    """``leaf_n (centred at its leaf-table mean)`` or with the stated centre and scale."""
    centre = f"centred at {data.centre[trait]:g}" if trait in data.centre else "centred at its leaf-table mean"
    scale = f", divided by {data.scale[trait]:g}" if trait in data.scale else ""
    return f"{trait} ({centre}{scale})"
