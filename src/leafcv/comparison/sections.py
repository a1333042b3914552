"""The sections of a comparison file other than its structures: ``format``, [data], [sampler], [cv],
and [model] and [priors] (comparison-wide, and per structure as overrides).

The rules of the data mapping itself ([data.columns], [data.units], [data.leaf] groups and traits) are
`leafcv.data.mapping.check_mapping`'s, the same that `load_dataset` applies to a `DataSpec` built in
Python; this module checks only what a TOML file can get wrong around them.
"""
from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

from ..data.mapping import check_mapping
from ..data.roles import CI_UNITS_KEY, OPTIONAL_ROLES, RENAMED_KEYS, REQUIRED_ROLES, VARIABLE_OF, renamed_key_problem
from ..data.units import CI_UNITS
from ..spec import (
    CV_METHODS,
    ELECTRON_CHOICES,
    LIKELIHOOD_CHOICES,
    LINKS,
    PARAMETERS,
    SIGMA_CHOICES,
    TEMPERATURE_CHOICES,
    TRANSITION_CHOICES,
    CVSpec,
    DataSpec,
    ModelOptions,
    SamplerSpec,
)
from .checker import Checker, is_int, is_number, show, suggest, unknown
from .keys import (
    CV_KEYS,
    DATA_KEYS,
    ENGINE_KEYS,
    FORMAT2_PARAM_KEYS,
    FORMAT2_STRUCTURE_KEYS,
    FORMAT2_TOP_KEYS,
    FORMAT_VERSION,
    LEAF_KEYS,
    LEAF_TERM,
    MAX_SEED,
    MAX_TREEDEPTH_LIMIT,
    MODEL_KEYS,
    PRIOR_INTERCEPT_KEYS,
    PRIOR_KEYS,
    PRIOR_SCALE_FIELDS,
    SAMPLER_KEYS,
    SUPPORTED_FORMATS,
    UNITS_KEYS,
)

# ----------------------------------------------------------------------------------------------
# format
# ----------------------------------------------------------------------------------------------


def parse_format(check: Checker, raw: dict[str, Any]) -> int | None:
    """``format`` must be present and one of SUPPORTED_FORMATS; format 1 may not use format-2 keys."""
    if "format" not in raw:
        check.problem(f"format is missing; add `format = {FORMAT_VERSION}` at the top of the file", "missing-key",
                      "format")
        return None
    value = raw["format"]
    if not is_int(value):
        check.problem(f"format: expected the integer {FORMAT_VERSION}, got {show(value)}", "wrong-type", "format")
        return None
    if value not in SUPPORTED_FORMATS:
        check.problem(
            f"format = {value} is not supported; this version of leafcv reads formats "
            f"{', '.join(map(str, SUPPORTED_FORMATS))} (set `format = {FORMAT_VERSION}`, or update leafcv)",
            "unsupported-format", "format",
        )
        return None
    if value == 1:
        used = [k for k in FORMAT2_TOP_KEYS if k in raw]
        items = raw.get("structure") if isinstance(raw.get("structure"), list) else []
        for item in items:
            if isinstance(item, dict):
                used += [f"structure {item.get('name', '?')!r}: {k}" for k in FORMAT2_STRUCTURE_KEYS if k in item]
                used += [f"structure {item.get('name', '?')!r}, {p}.{k}" for p in PARAMETERS
                         if isinstance(item.get(p), dict) for k in FORMAT2_PARAM_KEYS if k in item[p]]
        if used:
            check.problem("format 1 has no " + "; ".join(used) + "; set `format = 2` to use them", "needs-format-2",
                          "format")
            return None
    return value


# ----------------------------------------------------------------------------------------------
# [data]
# ----------------------------------------------------------------------------------------------


def parse_data(check: Checker, value: Any, base: Path, file_name: str) -> DataSpec | None:
    """Validate [data] and its sub-tables; None when it is missing or not a table.

    ``base`` is the comparison file's folder; ``file_name`` (the comparison file's name) starts the
    refusal of a renamed data-role key.
    """
    if value is None:
        check.problem("[data] is missing; add a [data] table with file = \"<your observations CSV>\" "
                      "and a [data.columns] table", "missing-key", "data")
        return None
    table = check.table(value, "data")
    check.keys(table, DATA_KEYS, "data")
    file = _parse_data_file(check, table.get("file"), base)
    columns, refused = _parse_columns(check, table.get("columns"), file_name)
    ci_unit, pressure = _parse_units(check, table.get("units", {}), file_name)
    leaf = check.table(table.get("leaf", {}), "data.leaf")
    check.keys(leaf, LEAF_KEYS, "data.leaf")
    groups = check.text_list(leaf.get("groups", []), "data.leaf.groups")
    traits = check.text_list(leaf.get("traits", []), "data.leaf.traits")
    mapping = check_mapping(columns or {}, groups, traits, ci_unit, pressure)
    # Without [data.columns] its absence is the one problem to report, not each required role; an entry
    # under a renamed key was refused as a whole already.
    check.extend(p for p in mapping.problems
                 if (columns is not None or p.code != "missing-role") and p.location not in refused)
    centre = _trait_numbers(check, leaf.get("centre", {}), "data.leaf.centre", traits, lambda x: True, "a number")
    scale = _trait_numbers(check, leaf.get("scale", {}), "data.leaf.scale", traits, lambda x: x > 0,
                           "a positive number")
    return DataSpec(
        file=file if file is not None else base,
        columns={var: name for var, name in (columns or {}).items() if isinstance(name, str) and name.strip()},
        ci_unit=ci_unit if ci_unit in CI_UNITS else "umol/mol",
        pressure_kpa=float(pressure) if is_number(pressure) and pressure > 0 else None,
        groups=tuple(groups),
        traits=tuple(traits),
        centre=centre,
        scale=scale,
    )


def _parse_data_file(check: Checker, value: Any, base: Path) -> Path | None:
    """The observation file, made absolute relative to the comparison file's folder."""
    if value is None:
        check.problem("data.file is missing; add file = \"<your observations CSV>\" (relative to this file)",
                      "missing-key", "data.file")
        return None
    name = check.text(value, "data.file")
    if name is None:
        return None
    return Path(os.path.abspath(base / Path(name).expanduser()))


def _parse_columns(check: Checker, value: Any, file_name: str) -> tuple[dict[str, Any] | None, set[str]]:
    """[data.columns]: data role -> the user's column name, returned keyed by leafcv's observation
    variable (``VARIABLE_OF``), the names `load_dataset` and the rest of leafcv use (None when the
    table is missing), and the locations of the roles given under a renamed key. The values are as
    written: `check_mapping` checks them."""
    valid = REQUIRED_ROLES + OPTIONAL_ROLES
    if value is None:
        check.problem(
            "[data.columns] is missing; map leafcv's data roles to your columns, "
            f"at least {', '.join(REQUIRED_ROLES)} (e.g. {REQUIRED_ROLES[0]} = \"<your column>\")",
            "missing-key", "data.columns",
        )
        return None, set()
    table = check.table(value, "data.columns")
    _refuse_renamed_keys(check, table, "[data.columns]", file_name)
    check.keys({k: v for k, v in table.items() if k not in RENAMED_KEYS}, valid, "data.columns")
    columns = {VARIABLE_OF[key]: column for key, column in table.items() if key in valid}
    # A refused renamed key still stands for its role, so that the one refusal says everything (no
    # "required role missing" besides it).
    refused = set()
    for key, column in table.items():
        if key in RENAMED_KEYS and VARIABLE_OF[RENAMED_KEYS[key]] not in columns:
            columns[VARIABLE_OF[RENAMED_KEYS[key]]] = column
            refused.add(f"data.columns.{RENAMED_KEYS[key]}")
    return columns, refused


def _refuse_renamed_keys(
    check: Checker, table: dict[str, Any], where: str, file_name: str, valid: Sequence[str] | None = None
) -> None:
    """Report every key of ``table`` that was renamed, with the key that replaced it (and, when the
    replacement is not one of the table's ``valid`` keys either, which keys the table takes)."""
    for key in table:
        problem = renamed_key_problem(file_name, where, key)
        if problem is None:
            continue
        if valid is not None and RENAMED_KEYS[key] not in valid:
            check.problem(problem + f"; note that {where} takes only {' and '.join(valid)}", problem.code,
                          problem.location)
        else:
            check.extend([problem])


def _parse_units(check: Checker, value: Any, file_name: str) -> tuple[Any, Any]:
    """[data.units]: the unit of intercellular CO2 and, for Pa, the air pressure in kPa, as written
    (`check_mapping` checks them)."""
    table = check.table(value, "data.units")
    _refuse_renamed_keys(check, table, "[data.units]", file_name, UNITS_KEYS)
    check.keys({k: v for k, v in table.items() if k not in RENAMED_KEYS}, UNITS_KEYS, "data.units")
    return table.get(CI_UNITS_KEY, "umol/mol"), table.get("pressure_kpa")


def _trait_numbers(
    check: Checker, value: Any, where: str, traits: list[str], ok: Callable[[float], bool], expected: str,
) -> dict[str, float]:
    """A table trait -> number (``centre`` or ``scale``), keys restricted to the listed traits."""
    table = check.table(value, where)
    numbers: dict[str, float] = {}
    for key, raw in table.items():
        if key not in traits:
            hint = suggest(key, traits)
            did = f"; did you mean {hint!r}?" if hint else ";"
            listing = ", ".join(traits) if traits else "none"
            check.problem(f"{where}: {key!r} is not a listed trait{did} listed traits: {listing}", "unknown-term",
                          f"{where}.{key}")
            continue
        number = check.number(raw, f"{where}.{key}", ok, expected)
        if number is not None:
            numbers[key] = number
    return numbers


# ----------------------------------------------------------------------------------------------
# [sampler] and [cv]
# ----------------------------------------------------------------------------------------------


def parse_sampler(check: Checker, value: Any) -> SamplerSpec:
    """[sampler]; absent keys keep `SamplerSpec`'s defaults."""
    table = check.table(value, "sampler")
    check.keys(table, SAMPLER_KEYS, "sampler")
    settings: dict[str, Any] = {}
    for key in ("chains", "warmup", "draws"):
        if key in table:
            settings[key] = check.integer(table[key], f"sampler.{key}", 1, None, "a positive integer")
    if "seed" in table:
        settings["seed"] = check.integer(table["seed"], "sampler.seed", 0, MAX_SEED,
                                         f"an integer from 0 to {MAX_SEED}")
    if "adapt_delta" in table:
        settings["adapt_delta"] = check.number(table["adapt_delta"], "sampler.adapt_delta", lambda x: 0 < x < 1,
                                               "a number strictly between 0 and 1")
    if "max_treedepth" in table:
        settings["max_treedepth"] = check.integer(table["max_treedepth"], "sampler.max_treedepth", 1,
                                                  MAX_TREEDEPTH_LIMIT, f"an integer from 1 to {MAX_TREEDEPTH_LIMIT}")
    return SamplerSpec(**{k: v for k, v in settings.items() if v is not None})


def parse_engine(check: Checker, value: Any) -> str | None:
    """[engine]: ``name = "pystan"`` (the default) or ``"cmdstan"``; None when the file names none."""
    from ..engines.choice import ENGINE_NAMES

    table = check.table(value, "engine")
    check.keys(table, ENGINE_KEYS, "engine")
    if "name" not in table:
        return None
    return check.choice(table["name"], "engine.name", ENGINE_NAMES, "engine")


def parse_cv(check: Checker, value: Any, groups: Sequence[str], traits: Sequence[str]) -> CVSpec:
    """[cv]: what is left out (leaf or a group column), how, and the number of K-fold folds."""
    table = check.table(value, "cv")
    check.keys(table, CV_KEYS, "cv")
    settings: dict[str, Any] = {}
    if "by" in table:
        settings["by"] = _parse_cv_by(check, table["by"], groups, traits)
    if "method" in table:
        settings["method"] = check.choice(table["method"], "cv.method", CV_METHODS, "method")
    if "folds" in table:
        settings["folds"] = check.integer(table["folds"], "cv.folds", 2, None, "an integer >= 2")
    return CVSpec(**{k: v for k, v in settings.items() if v is not None})


def _parse_cv_by(check: Checker, value: Any, groups: Sequence[str], traits: Sequence[str]) -> str | None:
    """``cv.by`` is ``leaf`` or a declared group column."""
    choices = (LEAF_TERM, *groups)
    name = check.text(value, "cv.by")
    if name is None:
        return None
    if name in choices:
        return name
    if name in traits:
        check.problem(f"cv.by: {name!r} is a trait; folds leave out whole levels of a grouping: {', '.join(choices)}",
                      "misplaced-term", "cv.by")
    else:
        check.problem("cv.by: " + unknown("grouping", name, choices, "choices"), "unknown-term", "cv.by")
    return None


# ----------------------------------------------------------------------------------------------
# [model] and [priors]
# ----------------------------------------------------------------------------------------------


def parse_model(check: Checker, value: Any, where: str, base: ModelOptions) -> ModelOptions:
    """[model] keys over ``base``; a structure's model table overrides the comparison's."""
    table = check.table(value, where)
    check.keys(table, MODEL_KEYS, where)
    out: dict[str, Any] = {}
    if "tpu" in table:
        tpu = check.flag(table["tpu"], f"{where}.tpu")
        if tpu is not None:
            out["tpu"] = tpu
    pairs = (("likelihood", LIKELIHOOD_CHOICES, "student_t", lambda v: v == "student_t"),
             ("sigma", SIGMA_CHOICES, "sigma_by_curve", lambda v: v == "by_curve"),
             ("transition", TRANSITION_CHOICES, "transition", lambda v: v),
             ("electron", ELECTRON_CHOICES, "electron", lambda v: v),
             ("temperature", TEMPERATURE_CHOICES, "peaked", lambda v: v == "peaked"))
    for key, choices, field_name, convert in pairs:
        if key in table:
            chosen = check.choice(table[key], f"{where}.{key}", choices, "choice")
            if chosen is not None:
                out[field_name] = convert(chosen)
    options = replace(base, **out)
    if "smooth_curvature" in table:
        if options.transition != "smooth":
            check.problem(f"{where}.smooth_curvature applies only with transition = \"smooth\"; remove it or set "
                          "the transition", "inapplicable-option", f"{where}.smooth_curvature")
        c = check.number(table["smooth_curvature"], f"{where}.smooth_curvature", lambda x: 0 < x < 1,
                         "a number strictly between 0 and 1")
        if c is not None:
            options = replace(options, smooth_curvature=float(c))
    return options


def parse_priors(check: Checker, value: Any, where: str, base):
    """[priors] over ``base`` (None: leafcv's defaults); returns a PriorSet, or ``base`` when empty."""
    from ..priors import PriorSet, prior_from_natural

    table = check.table(value, where)
    check.keys(table, PRIOR_KEYS, where)
    if not table:
        return base
    out = base if base is not None else PriorSet()
    intercepts, ratios = dict(out.intercepts), dict(out.ratio_intercepts)
    scales: dict[str, float] = {}
    for key in PRIOR_INTERCEPT_KEYS:
        if key not in table:
            continue
        pname = key.removesuffix("_ratio")
        link = "log" if key.endswith("_ratio") else LINKS.get(pname, "log")
        prior, message = prior_from_natural(table[key], link)
        if message:
            check.problem(f"{where}.{key}: {message}", "wrong-value", f"{where}.{key}")
        elif key.endswith("_ratio"):
            ratios[pname] = prior
        else:
            intercepts[pname] = prior
    for key, attr in PRIOR_SCALE_FIELDS.items():
        if key in table:
            v = check.number(table[key], f"{where}.{key}", lambda x: x > 0, "a number > 0")
            if v is not None:
                scales[attr] = float(v)
    if "nu" in table:
        nu = table["nu"]
        if isinstance(nu, list) and len(nu) == 2 and all(is_number(x) and x > 0 for x in nu):
            scales["nu_shape"], scales["nu_rate"] = float(nu[0]), float(nu[1])
        else:
            check.problem(f"{where}.nu: expected [shape, rate] of the gamma prior of the Student-t degrees of "
                          f"freedom, two numbers > 0, got {show(nu)}", "wrong-value", f"{where}.nu")
    return replace(out, intercepts=intercepts, ratio_intercepts=ratios, **scales)
