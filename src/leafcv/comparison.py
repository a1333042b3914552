"""Reading and validating a comparison file (TOML, format 1).

`load_comparison` turns the file into a `Comparison`, collecting every problem it finds into one
`SpecError`. `check_against_data` adds the problems that can only be seen once the data are loaded
(a grouping with a single level, a trait that never varies). `describe` writes the summary printed
by ``leafcv check``.
"""
from __future__ import annotations

import difflib
import itertools
import math
import os
import re
import tomllib
from dataclasses import replace
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .data.dataset import Dataset
from .data.roles import (
    CI_UNITS_KEY,
    OPTIONAL_ROLES,
    RENAMED_KEYS,
    REQUIRED_ROLES,
    VARIABLE_OF,
    renamed_key_problem,
    role,
)
from .errors import SpecError
from .spec import (
    CENTRING_CHOICES,
    CV_METHODS,
    ELECTRON_CHOICES,
    LIKELIHOOD_CHOICES,
    LINKS,
    SIGMA_CHOICES,
    TEMPERATURE_CHOICES,
    TRANSITION_CHOICES,
    ModelOptions,
    PARAMETERS,
    RATIO_PARAMETERS,
    Comparison,
    CVSpec,
    DataSpec,
    ParamSpec,
    SamplerSpec,
    Structure,
)

__all__ = ["FORMAT_VERSION", "load_comparison", "check_against_data", "describe"]

#: The newest comparison-file format this module reads; format 1 files are read too.
FORMAT_VERSION = 2
SUPPORTED_FORMATS: tuple[int, ...] = (1, 2)

TOP_KEYS: tuple[str, ...] = ("format", "data", "sampler", "cv", "model", "priors", "structure", "grid")
#: Keys that format 2 added (a format-1 file using them is told to say format = 2).
FORMAT2_TOP_KEYS: tuple[str, ...] = ("model", "priors", "grid")
FORMAT2_PARAM_KEYS: tuple[str, ...] = ("slopes", "split")
FORMAT2_STRUCTURE_KEYS: tuple[str, ...] = ("model", "priors", "leaf_correlation", "lkj_eta")
STRUCTURE_KEYS: tuple[str, ...] = ("name", *FORMAT2_STRUCTURE_KEYS)
MODEL_KEYS: tuple[str, ...] = ("tpu", "likelihood", "sigma", "transition", "smooth_curvature", "electron",
                               "temperature")
#: [priors] keys: intercepts on the natural scale, then the scales of the other priors.
PRIOR_INTERCEPT_KEYS: tuple[str, ...] = (*PARAMETERS, "tpu25", "jmax25_ratio", "rd25_ratio")
#: [priors] scale key -> the PriorSet field it sets
PRIOR_SCALE_FIELDS: dict[str, str] = {"slope_sd_log": "slope_sd_log", "slope_sd_logit": "slope_sd_logit",
                                      "level_sd": "level_sd", "group_sd": "group_sd_scale",
                                      "leaf_sd": "leaf_sd_scale", "sigma_sd": "sigma_scale"}
PRIOR_KEYS: tuple[str, ...] = (*PRIOR_INTERCEPT_KEYS, *PRIOR_SCALE_FIELDS, "nu")
GRID_KEYS: tuple[str, ...] = ("name", "base", "leaf_effects", "choices")
DATA_KEYS: tuple[str, ...] = ("file", "columns", "units", "leaf")
UNITS_KEYS: tuple[str, ...] = (CI_UNITS_KEY, "pressure_kpa")
CI_UNITS: tuple[str, ...] = ("umol/mol", "Pa")
LEAF_KEYS: tuple[str, ...] = ("groups", "traits", "centre", "scale")
SAMPLER_KEYS: tuple[str, ...] = ("chains", "warmup", "draws", "seed", "adapt_delta", "max_treedepth")
CV_KEYS: tuple[str, ...] = ("by", "method", "folds")
PARAM_KEYS: tuple[str, ...] = ("fixed", "random", "ratio_to", "centring", "slopes", "split")
#: The term naming the leaf id in ``random`` (and the default ``cv.by``).
LEAF_TERM = "leaf"
#: The only parameter jmax25 and rd25 can be tied to.
RATIO_TARGET = "vcmax25"
#: Stan's seeds are unsigned 32-bit integers.
MAX_SEED = 2**32 - 1
MAX_TREEDEPTH_LIMIT = 20

_NAME_RE = re.compile(r"[A-Za-z0-9._-]+")
_TOML_POSITION_RE = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")
_TOML_END_RE = re.compile(r"\s*\(at end of document\)\s*$")

Problems = list[str]


# ----------------------------------------------------------------------------------------------
# Public functions
# ----------------------------------------------------------------------------------------------


def load_comparison(path: str | os.PathLike[str]) -> Comparison:
    """Read and validate a comparison file.

    Parameters
    ----------
    path
        The comparison file (TOML, format 1).

    Returns
    -------
    Comparison
        The validated comparison, structures in file order, every parameter of every structure
        present (a parameter not named in the file is ``ParamSpec()``, shared by all leaves), and
        the data file resolved against the comparison file's folder.

    Raises
    ------
    SpecError
        With every problem found, when the file cannot be read, is not valid TOML or breaks a
        rule of format 1. The data file's existence is not checked here.
    """
    path = Path(path)
    raw = _read_toml(path)
    problems: Problems = []
    comparison = _parse_comparison(raw, path, problems)
    if problems or comparison is None:
        raise SpecError(str(path), problems or ["the comparison file could not be read"])
    return comparison


def check_against_data(comparison: Comparison, dataset: Dataset) -> list[str]:
    """Problems of a comparison that only show once the data are loaded.

    Parameters
    ----------
    comparison
        A comparison from `load_comparison`.
    dataset
        The data it will be fitted to; ``dataset.leaves`` has one row per leaf.

    Returns
    -------
    list of str
        One sentence per problem (empty when there is none): a grouping (fixed or random, other
        than ``leaf``) with fewer than 2 levels, a fixed trait with the same value for every
        leaf, a ``cv.by`` grouping with fewer than 2 levels, more K-fold folds than levels.
    """
    leaves = dataset.leaves
    traits = set(comparison.data.traits)
    problems: Problems = []
    for structure in comparison.structures:
        before = len(problems)
        for pname in PARAMETERS:
            spec = structure.params[pname]
            for kind, terms in (("fixed", spec.fixed), ("random", spec.random)):
                for term in terms:
                    message = _term_data_problem(term, kind, term in traits, leaves)
                    if message:
                        problems.append(f"structure {structure.name!r}, {pname}.{kind}: {message}")
            for kind, pairs in (("slopes", spec.slopes), ("split", spec.split)):
                for trait, group in pairs:
                    where = f"structure {structure.name!r}, {pname}.{kind}.{trait}"
                    message = _term_data_problem(group, "random", False, leaves) or _trait_data_problem(trait, leaves)
                    if message:
                        problems.append(f"{where}: {message}")
                    elif kind == "split":
                        problems += [f"{where}: {m}" for m in _split_data_problems(trait, group, leaves)]
        if len(problems) == before:
            # what only the design shows: perfectly collinear fixed terms, a term constant over leaves
            from .design import build_design

            try:
                build_design(structure, dataset, comparison.data)
            except SpecError as exc:
                problems += [f"structure {structure.name!r}: {m}" for m in exc.problems]
        if structure.options.sigma_by_curve and dataset.obs["curve_type"].nunique() < 2:
            problems.append(f"structure {structure.name!r}: model.sigma = \"by_curve\" does not apply: the data have "
                            f"one curve type only ({dataset.obs['curve_type'].iloc[0]}); use sigma = \"shared\"")
    problems.extend(_cv_data_problems(comparison.cv, leaves))
    return problems


def _split_data_problems(trait: str, group: str, leaves: pd.DataFrame) -> list[str]:
    """A within/between split needs groups of 2+ leaves whose trait varies, and 2+ group means."""
    x = pd.to_numeric(leaves[trait], errors="coerce")
    by = leaves[group].astype(str)
    sizes = by.value_counts()
    out = []
    if (sizes < 2).all():
        out.append(f"every level of {group!r} has one leaf, so there is no within-{group} variation of {trait!r}; "
                   f"split by a grouping with several leaves per level, or use {trait!r} in fixed")
    elif float((x - x.groupby(by).transform("mean")).abs().max()) == 0:
        out.append(f"{trait!r} does not vary within any level of {group!r}; its within-{group} slope cannot be "
                   f"estimated — use {trait!r} in fixed")
    elif x.groupby(by).mean().nunique() < 2:
        out.append(f"the {group} means of {trait!r} are all equal; its between-{group} slope cannot be estimated")
    return out


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


def _changed_priors(priors) -> list[str]:
    from .priors import PriorSet

    default = PriorSet()
    out = [p for p in priors.intercepts if priors.intercepts[p] != default.intercepts.get(p)]
    out += [f"{p}_ratio" for p in priors.ratio_intercepts if priors.ratio_intercepts[p] != default.ratio_intercepts.get(p)]
    out += [k for k in (*PRIOR_SCALE_FIELDS.values(), "nu_shape", "nu_rate") if getattr(priors, k) != getattr(default, k)]
    return out


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
    if not spec.fixed and not spec.random and not spec.split:
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
    text = f"{head}; " + " + ".join(parts)
    if spec.centring:
        chosen = ", ".join(f"{group} {choice}" for group, choice in spec.centring.items())
        text += f" (centring: {chosen})"
    return text


# ----------------------------------------------------------------------------------------------
# Reading the file
# ----------------------------------------------------------------------------------------------


def _read_toml(path: Path) -> dict[str, Any]:
    """Read the file as TOML; any failure becomes a `SpecError` naming the file (and line)."""
    try:
        blob = path.read_bytes()
    except OSError as exc:
        reason = exc.strerror or str(exc)
        raise SpecError(str(path), [f"cannot read the comparison file: {reason}"]) from None
    try:
        text = blob.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise SpecError(
            str(path), [f"the comparison file is not UTF-8 text (byte {exc.start}); save it as UTF-8"]
        ) from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(str(path), [_toml_error_message(exc)]) from None


def _toml_error_message(exc: tomllib.TOMLDecodeError) -> str:
    """Say where tomllib found a syntax error: line and column, or the end of the file."""
    text = str(exc)
    lineno = getattr(exc, "lineno", None)
    colno = getattr(exc, "colno", None)
    if lineno is None:
        match = _TOML_POSITION_RE.search(text)
        if match:
            lineno, colno = int(match.group(1)), int(match.group(2))
    reason = _TOML_END_RE.sub("", _TOML_POSITION_RE.sub("", getattr(exc, "msg", text)))
    if lineno is not None:
        return f"TOML syntax error at line {lineno}, column {colno}: {reason}"
    if _TOML_END_RE.search(text):
        return f"TOML syntax error at the end of the file: {reason} (is a bracket or quote left open?)"
    return f"TOML syntax error: {text}"


# ----------------------------------------------------------------------------------------------
# Small helpers: messages and type checks
# ----------------------------------------------------------------------------------------------


def _suggest(word: str, valid: Sequence[str]) -> str | None:
    """The closest valid name to ``word`` (ignoring letter case), or None."""
    lowered = {v.lower(): v for v in valid}
    match = difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=0.6)
    return lowered[match[0]] if match else None


def _unknown(kind: str, word: str, valid: Sequence[str], valid_label: str) -> str:
    """``unknown key 'samplr'; did you mean 'sampler'? valid keys: ...``."""
    hint = _suggest(word, valid)
    did = f"; did you mean {hint!r}?" if hint else ";"
    listing = ", ".join(valid) if valid else "none"
    return f"unknown {kind} {word!r}{did} valid {valid_label}: {listing}"


def _at(where: str, message: str) -> str:
    """Prefix a message with its location, if any."""
    return f"{where}: {message}" if where else message


def _show(value: Any) -> str:
    """Name a TOML value's type, with the value when it is short."""
    if isinstance(value, bool):
        return f"true/false ({str(value).lower()})"
    if isinstance(value, int):
        return f"an integer ({value})"
    if isinstance(value, float):
        return f"a number ({value:g})"
    if isinstance(value, str):
        return f"a string ({value!r})"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    return f"a date/time ({value})"


def _check_keys(table: dict[str, Any], valid: Sequence[str], where: str, problems: Problems) -> None:
    """Report every key of ``table`` that is not in ``valid``."""
    for key in table:
        if key not in valid:
            problems.append(_at(where, _unknown("key", key, valid, "keys")))


def _table(value: Any, where: str, problems: Problems) -> dict[str, Any]:
    """``value`` if it is a table, else {} after reporting the wrong type."""
    if isinstance(value, dict):
        return value
    problems.append(_at(where, f"expected a table, got {_show(value)}"))
    return {}


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _int_value(
    value: Any, where: str, problems: Problems, low: int, high: int | None, expected: str
) -> int | None:
    """An integer within [low, high], or None after reporting why not."""
    if not _is_int(value):
        problems.append(f"{where}: expected {expected}, got {_show(value)}")
        return None
    if value < low or (high is not None and value > high):
        problems.append(f"{where}: expected {expected}, got {value}")
        return None
    return value


def _number_value(
    value: Any, where: str, problems: Problems, ok: Callable[[float], bool], expected: str
) -> float | None:
    """A finite number accepted by ``ok``, or None after reporting why not."""
    if not _is_number(value):
        problems.append(f"{where}: expected {expected}, got {_show(value)}")
        return None
    if not math.isfinite(value) or not ok(value):
        problems.append(f"{where}: expected {expected}, got {value:g}")
        return None
    return float(value)


def _str_value(value: Any, where: str, problems: Problems) -> str | None:
    """A non-empty string, or None after reporting why not."""
    if not isinstance(value, str):
        problems.append(f"{where}: expected a string, got {_show(value)}")
        return None
    if not value.strip():
        problems.append(f"{where}: is empty")
        return None
    return value


def _choice(value: Any, where: str, choices: Sequence[str], kind: str, problems: Problems) -> str | None:
    """One of ``choices``, or None after reporting the unknown value (with a suggestion)."""
    if value in choices:
        return value
    if isinstance(value, str):
        problems.append(f"{where}: " + _unknown(kind, value, choices, f"{kind}s"))
    else:
        problems.append(f"{where}: expected one of {', '.join(choices)}, got {_show(value)}")
    return None


def _str_list(value: Any, where: str, problems: Problems) -> list[str]:
    """The distinct non-empty strings of a list, in order, reporting every bad or repeated entry.

    A lone string is reported and then treated as a one-entry list, so that later checks do not
    repeat the same mistake as many problems.
    """
    if isinstance(value, str):
        problems.append(f'{where}: expected a list of strings, e.g. ["{value}"], got {_show(value)}')
        value = [value]
    elif not isinstance(value, list):
        problems.append(f"{where}: expected a list of strings, got {_show(value)}")
        return []
    items: list[str] = []
    for item in value:
        if not isinstance(item, str):
            problems.append(f"{where}: entries must be strings, got {_show(item)}")
        elif not item.strip():
            problems.append(f"{where}: has an empty entry")
        elif item in items:
            problems.append(f"{where}: repeated entry {item!r}; list each term once")
        else:
            items.append(item)
    return items


# ----------------------------------------------------------------------------------------------
# The whole file
# ----------------------------------------------------------------------------------------------


def _parse_comparison(raw: dict[str, Any], path: Path, problems: Problems) -> Comparison | None:
    """Validate every section; return the Comparison when nothing was wrong."""
    _check_keys(raw, TOP_KEYS, "", problems)
    fmt = _parse_format(raw, problems)
    base = Path(os.path.abspath(path)).parent
    data = _parse_data(raw.get("data"), base, path.name, problems)
    sampler = _parse_sampler(raw.get("sampler", {}), problems)
    groups = data.groups if data else ()
    traits = data.traits if data else ()
    cv = _parse_cv(raw.get("cv", {}), groups, traits, problems)
    model = _parse_model(raw.get("model", {}), "model", ModelOptions(), problems)
    priors = _parse_priors(raw.get("priors", {}), "priors", None, problems)
    items = raw.get("structure")
    if items is None and "grid" not in raw:
        problems.append("no [[structure]] or [[grid]] found; add at least one [[structure]] with a name")
        items = []
    items = [] if items is None else items
    structures = _parse_structures(items, groups, traits, problems, model, priors)
    if "grid" in raw:
        taken = {s.name.lower() for s in structures}
        structures += _parse_grids(raw["grid"], groups, traits, problems, model, priors, taken)
    if problems or data is None or fmt is None:
        return None
    return Comparison(
        path=Path(os.path.abspath(path)),
        data=data,
        sampler=sampler,
        cv=cv,
        structures=tuple(structures),
        format=fmt,
    )


def _parse_format(raw: dict[str, Any], problems: Problems) -> int | None:
    """``format`` must be present and one of SUPPORTED_FORMATS; format 1 may not use format-2 keys."""
    if "format" not in raw:
        problems.append(f"format is missing; add `format = {FORMAT_VERSION}` at the top of the file")
        return None
    value = raw["format"]
    if not _is_int(value):
        problems.append(f"format: expected the integer {FORMAT_VERSION}, got {_show(value)}")
        return None
    if value not in SUPPORTED_FORMATS:
        problems.append(
            f"format = {value} is not supported; this version of leafcv reads formats "
            f"{', '.join(map(str, SUPPORTED_FORMATS))} (set `format = {FORMAT_VERSION}`, or update leafcv)"
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
            problems.append("format 1 has no " + "; ".join(used) + "; set `format = 2` to use them")
            return None
    return value


# ----------------------------------------------------------------------------------------------
# [data]
# ----------------------------------------------------------------------------------------------


def _parse_data(value: Any, base: Path, file_name: str, problems: Problems) -> DataSpec | None:
    """Validate [data] and its sub-tables; None when it is missing or not a table.

    ``file_name`` (the comparison file's name) starts the refusal of a renamed data-role key.
    """
    if value is None:
        problems.append(
            "[data] is missing; add a [data] table with file = \"<your observations CSV>\" "
            "and a [data.columns] table"
        )
        return None
    table = _table(value, "data", problems)
    _check_keys(table, DATA_KEYS, "data", problems)
    file = _parse_data_file(table.get("file"), base, problems)
    columns = _parse_columns(table.get("columns"), file_name, problems)
    ci_unit, pressure = _parse_units(table.get("units", {}), file_name, problems)
    groups, traits, centre, scale = _parse_leaf(table.get("leaf", {}), columns, problems)
    return DataSpec(
        file=file if file is not None else base,
        columns=columns,
        ci_unit=ci_unit,
        pressure_kpa=pressure,
        groups=groups,
        traits=traits,
        centre=centre,
        scale=scale,
    )


def _parse_data_file(value: Any, base: Path, problems: Problems) -> Path | None:
    """The observation file, made absolute relative to the comparison file's folder."""
    if value is None:
        problems.append("data.file is missing; add file = \"<your observations CSV>\" (relative to this file)")
        return None
    name = _str_value(value, "data.file", problems)
    if name is None:
        return None
    return Path(os.path.abspath(base / Path(name).expanduser()))


def _parse_columns(value: Any, file_name: str, problems: Problems) -> dict[str, str]:
    """[data.columns]: data role -> the user's column name, returned keyed by leafcv's observation
    variable (``VARIABLE_OF``), the names `load_dataset` and the rest of leafcv use."""
    valid = REQUIRED_ROLES + OPTIONAL_ROLES
    if value is None:
        problems.append(
            "[data.columns] is missing; map leafcv's data roles to your columns, "
            f"at least {', '.join(REQUIRED_ROLES)} (e.g. {REQUIRED_ROLES[0]} = \"<your column>\")"
        )
        return {}
    table = _table(value, "data.columns", problems)
    _refuse_renamed_keys(table, "[data.columns]", file_name, problems)
    _check_keys({k: v for k, v in table.items() if k not in RENAMED_KEYS}, valid, "data.columns", problems)
    columns: dict[str, str] = {}
    for key, column in table.items():
        if key in valid:
            name = _str_value(column, f"data.columns.{key}", problems)
            if name is not None:
                columns[VARIABLE_OF[key]] = name
    renamed = {RENAMED_KEYS[k] for k in table if k in RENAMED_KEYS}
    for key in REQUIRED_ROLES:
        if key not in table and key not in renamed:     # a renamed key was reported already
            problems.append(f"data.columns: required data role {key!r} is missing; add {key} = \"<your column>\"")
    _check_shared_columns(columns, problems)
    return columns


def _refuse_renamed_keys(
    table: dict[str, Any], where: str, file_name: str, problems: Problems, valid: Sequence[str] | None = None
) -> None:
    """Report every key of ``table`` that was renamed, with the key that replaced it (and, when the
    replacement is not one of the table's ``valid`` keys either, which keys the table takes)."""
    for key in table:
        problem = renamed_key_problem(file_name, where, key)
        if problem is None:
            continue
        if valid is not None and RENAMED_KEYS[key] not in valid:
            problem += f"; note that {where} takes only {' and '.join(valid)}"
        problems.append(problem)


def _check_shared_columns(columns: dict[str, str], problems: Problems) -> None:
    """Two data roles may not read the same column of the user's file."""
    seen: dict[str, str] = {}
    for variable, column in columns.items():
        if column in seen:
            problems.append(
                f"data.columns: {role(seen[column])} and {role(variable)} both name the column {column!r}; "
                "each data role needs its own column"
            )
        else:
            seen[column] = variable


def _parse_units(value: Any, file_name: str, problems: Problems) -> tuple[str, float | None]:
    """[data.units]: the unit of intercellular CO2 and, for Pa, the air pressure in kPa."""
    table = _table(value, "data.units", problems)
    _refuse_renamed_keys(table, "[data.units]", file_name, problems, UNITS_KEYS)
    _check_keys({k: v for k, v in table.items() if k not in RENAMED_KEYS}, UNITS_KEYS, "data.units", problems)
    ci_unit = "umol/mol"
    if CI_UNITS_KEY in table:
        raw = table[CI_UNITS_KEY]
        if raw in CI_UNITS:
            ci_unit = raw
        else:
            shown = repr(raw) if isinstance(raw, str) else _show(raw)
            problems.append(f"data.units.{CI_UNITS_KEY}: must be 'umol/mol' or 'Pa', got {shown}")
    pressure = None
    if "pressure_kpa" in table:
        pressure = _number_value(
            table["pressure_kpa"], "data.units.pressure_kpa", problems, lambda x: x > 0,
            "a positive number (air pressure in kPa)",
        )
    if ci_unit == "Pa" and "pressure_kpa" not in table:
        problems.append(
            f"data.units: {CI_UNITS_KEY} = 'Pa' needs pressure_kpa, the air pressure in kPa "
            "(e.g. pressure_kpa = 101.3), to convert intercellular CO2 to umol/mol"
        )
    return ci_unit, pressure


def _parse_leaf(
    value: Any, columns: dict[str, str], problems: Problems
) -> tuple[tuple[str, ...], tuple[str, ...], dict[str, float], dict[str, float]]:
    """[data.leaf]: leaf-level groups and traits, and optional centring and scaling of traits."""
    table = _table(value, "data.leaf", problems)
    _check_keys(table, LEAF_KEYS, "data.leaf", problems)
    groups = _str_list(table.get("groups", []), "data.leaf.groups", problems)
    traits = _str_list(table.get("traits", []), "data.leaf.traits", problems)
    for name in groups:
        if name in traits:
            problems.append(
                f"data.leaf: {name!r} is listed in both groups and traits; a column is either a "
                "grouping (groups) or a numeric trait (traits)"
            )
    _check_reserved(groups, "data.leaf.groups", columns, problems)
    _check_reserved(traits, "data.leaf.traits", columns, problems)
    centre = _trait_numbers(
        table.get("centre", {}), "data.leaf.centre", traits, problems, lambda x: True, "a number"
    )
    scale = _trait_numbers(
        table.get("scale", {}), "data.leaf.scale", traits, problems, lambda x: x > 0, "a positive number"
    )
    return tuple(groups), tuple(traits), centre, scale


def _check_reserved(names: list[str], where: str, columns: dict[str, str], problems: Problems) -> None:
    """A leaf-level column may not be called ``leaf`` nor be the leaf id column itself."""
    for name in names:
        if name == LEAF_TERM:
            problems.append(
                f"{where}: 'leaf' is reserved for the leaf id (random = [\"leaf\"]); "
                "rename that column in your file and here"
            )
        elif name == columns.get("leaf"):
            problems.append(
                f"{where}: {name!r} is the leaf id column (data.columns.leaf); "
                "use random = [\"leaf\"] for leaf effects"
            )


def _trait_numbers(
    value: Any, where: str, traits: list[str], problems: Problems,
    ok: Callable[[float], bool], expected: str,
) -> dict[str, float]:
    """A table trait -> number (``centre`` or ``scale``), keys restricted to the listed traits."""
    table = _table(value, where, problems)
    numbers: dict[str, float] = {}
    for key, raw in table.items():
        if key not in traits:
            hint = _suggest(key, traits)
            did = f"; did you mean {hint!r}?" if hint else ";"
            listing = ", ".join(traits) if traits else "none"
            problems.append(f"{where}: {key!r} is not a listed trait{did} listed traits: {listing}")
            continue
        number = _number_value(raw, f"{where}.{key}", problems, ok, expected)
        if number is not None:
            numbers[key] = number
    return numbers


# ----------------------------------------------------------------------------------------------
# [sampler] and [cv]
# ----------------------------------------------------------------------------------------------


def _parse_sampler(value: Any, problems: Problems) -> SamplerSpec:
    """[sampler]; absent keys keep `SamplerSpec`'s defaults."""
    table = _table(value, "sampler", problems)
    _check_keys(table, SAMPLER_KEYS, "sampler", problems)
    settings: dict[str, Any] = {}
    for key in ("chains", "warmup", "draws"):
        if key in table:
            settings[key] = _int_value(table[key], f"sampler.{key}", problems, 1, None, "a positive integer")
    if "seed" in table:
        settings["seed"] = _int_value(
            table["seed"], "sampler.seed", problems, 0, MAX_SEED, f"an integer from 0 to {MAX_SEED}"
        )
    if "adapt_delta" in table:
        settings["adapt_delta"] = _number_value(
            table["adapt_delta"], "sampler.adapt_delta", problems, lambda x: 0 < x < 1,
            "a number strictly between 0 and 1",
        )
    if "max_treedepth" in table:
        settings["max_treedepth"] = _int_value(
            table["max_treedepth"], "sampler.max_treedepth", problems, 1, MAX_TREEDEPTH_LIMIT,
            f"an integer from 1 to {MAX_TREEDEPTH_LIMIT}",
        )
    return SamplerSpec(**{k: v for k, v in settings.items() if v is not None})


def _parse_cv(value: Any, groups: Sequence[str], traits: Sequence[str], problems: Problems) -> CVSpec:
    """[cv]: what is left out (leaf or a group column), how, and the number of K-fold folds."""
    table = _table(value, "cv", problems)
    _check_keys(table, CV_KEYS, "cv", problems)
    settings: dict[str, Any] = {}
    if "by" in table:
        settings["by"] = _parse_cv_by(table["by"], groups, traits, problems)
    if "method" in table:
        settings["method"] = _choice(table["method"], "cv.method", CV_METHODS, "method", problems)
    if "folds" in table:
        settings["folds"] = _int_value(table["folds"], "cv.folds", problems, 2, None, "an integer >= 2")
    return CVSpec(**{k: v for k, v in settings.items() if v is not None})


def _parse_cv_by(value: Any, groups: Sequence[str], traits: Sequence[str], problems: Problems) -> str | None:
    """``cv.by`` is ``leaf`` or a declared group column."""
    choices = (LEAF_TERM, *groups)
    name = _str_value(value, "cv.by", problems)
    if name is None:
        return None
    if name in choices:
        return name
    if name in traits:
        problems.append(
            f"cv.by: {name!r} is a trait; folds leave out whole levels of a grouping: {', '.join(choices)}"
        )
    else:
        problems.append("cv.by: " + _unknown("grouping", name, choices, "choices"))
    return None


# ----------------------------------------------------------------------------------------------
# [[structure]]
# ----------------------------------------------------------------------------------------------


def _parse_structures(
    value: Any, groups: Sequence[str], traits: Sequence[str], problems: Problems,
    model: ModelOptions = ModelOptions(), priors=None,
) -> list[Structure]:
    """Every [[structure]], in file order, with unique file-safe names."""
    if value is None:
        problems.append("no [[structure]] found; add at least one [[structure]] with a name")
        return []
    if isinstance(value, dict):
        problems.append("structure: write each structure as [[structure]] (double brackets), not [structure]")
        value = [value]
    if not isinstance(value, list):
        problems.append(f"structure: expected [[structure]] tables, got {_show(value)}")
        return []
    structures: list[Structure] = []
    names: dict[str, int] = {}
    for number, item in enumerate(value, start=1):
        if not isinstance(item, dict):
            problems.append(f"structure #{number}: expected a table, got {_show(item)}")
            continue
        name = _parse_structure_name(item, number, names, problems)
        label = f"structure {name!r}" if name is not None else f"structure #{number}"
        structure = _parse_structure_body(item, name, label, groups, traits, problems, model, priors)
        if structure is not None:
            structures.append(structure)
    return structures


def _parse_structure_body(item: dict[str, Any], name: str | None, label: str, groups, traits,
                          problems: Problems, model: ModelOptions, priors, origin: str = "") -> Structure | None:
    """Parameters, model options, priors and leaf correlation of one structure (written or expanded)."""
    params = _parse_structure_params(item, label, groups, traits, problems)
    options = _parse_model(item.get("model", {}), f"{label}: model", model, problems)
    structure_priors = _parse_priors(item.get("priors", {}), f"{label}: priors", priors, problems)
    own_priors = item.get("priors") if isinstance(item.get("priors"), dict) else {}
    if "tpu25" in own_priors and not options.tpu:
        problems.append(f"{label}: priors.tpu25 applies only with TPU limitation on; add model = {{ tpu = true }} "
                        "or remove the tpu25 prior")
    corr = item.get("leaf_correlation", False)
    if not isinstance(corr, bool):
        problems.append(f"{label}: leaf_correlation: expected true or false, got {_show(corr)}")
        corr = False
    leaf_params = [p for p in PARAMETERS if LEAF_TERM in params[p].random]
    if corr and len(leaf_params) < 2:
        problems.append(f"{label}: leaf_correlation applies only with leaf effects on two or more parameters "
                        f"(leaf effects here: {', '.join(leaf_params) or 'none'}); add random = [\"leaf\"] to "
                        "another parameter or remove leaf_correlation")
    lkj = 2.0
    if "lkj_eta" in item:
        if not corr:
            problems.append(f"{label}: lkj_eta applies only with leaf_correlation = true; remove it or switch the "
                            "correlation on")
        value = _number_value(item["lkj_eta"], f"{label}: lkj_eta", problems, lambda x: x > 0, "a number > 0")
        lkj = float(value) if value is not None else lkj
    if name is None:
        return None
    return Structure(name=name, params=params, options=options, priors=structure_priors,
                     leaf_correlation=corr, lkj_eta=lkj, origin=origin)


def _parse_structure_name(
    item: dict[str, Any], number: int, names: dict[str, int], problems: Problems
) -> str | None:
    """The structure's name: present, file-safe and unique (also ignoring letter case).

    Returns the name when it is a non-empty string (even if it breaks a rule, so that later
    messages can name the structure), else None.
    """
    where = f"structure #{number}"
    if "name" not in item:
        problems.append(f"{where}: name is missing; add name = \"...\" (letters, digits, '-', '_', '.')")
        return None
    name = item["name"]
    if not isinstance(name, str):
        problems.append(f"{where}: name: expected a string, got {_show(name)}")
        return None
    if not name:
        problems.append(f"{where}: name is empty; give it a name of letters, digits, '-', '_', '.'")
        return None
    _check_name_characters(name, problems)
    _check_name_unique(name, number, names, problems)
    names.setdefault(name, number)
    return name


def _check_name_characters(name: str, problems: Problems) -> None:
    """A name becomes a file name: only ASCII letters, digits, '-', '_' and '.', and not only dots."""
    bad = sorted({c for c in name if not _NAME_RE.fullmatch(c)})
    if bad:
        shown = ", ".join(repr(c) for c in bad)
        problems.append(
            f"structure {name!r}: name may only contain letters, digits, '-', '_' and '.' "
            f"(it becomes a file name); found {shown}"
        )
    elif set(name) == {"."}:
        problems.append(f"structure {name!r}: name cannot be only dots (it becomes a file name)")


def _check_name_unique(name: str, number: int, names: dict[str, int], problems: Problems) -> None:
    """Names must differ, and differ by more than letter case (some file systems ignore case)."""
    if name in names:
        problems.append(
            f"structure {name!r} (#{number}): duplicate name, also used by structure #{names[name]}; "
            "names must be unique"
        )
        return
    for other, other_number in names.items():
        if other.lower() == name.lower():
            problems.append(
                f"structure {name!r} (#{number}): name differs from structure {other!r} "
                f"(#{other_number}) only in letter case; names become file names, which some "
                "file systems do not tell apart"
            )
            return


def _parse_structure_params(
    item: dict[str, Any], label: str, groups: Sequence[str], traits: Sequence[str], problems: Problems
) -> dict[str, ParamSpec]:
    """Every parameter of one structure; an unnamed parameter is shared by all leaves."""
    for key in item:
        if key not in STRUCTURE_KEYS and key not in PARAMETERS:
            if key == "tpu25":
                problems.append(f"{label}: tpu25 cannot vary by structure terms in this version; it is one value "
                                "shared by all leaves when [model] tpu = true")
                continue
            message = _unknown("parameter", key, PARAMETERS, "parameters")
            problems.append(f"{label}: {message} (and {', '.join(repr(k) for k in STRUCTURE_KEYS)})")
    return {
        pname: _parse_param(item[pname], label, pname, groups, traits, problems)
        if pname in item else ParamSpec()
        for pname in PARAMETERS
    }


def _parse_param(
    value: Any, label: str, pname: str, groups: Sequence[str], traits: Sequence[str], problems: Problems
) -> ParamSpec:
    """One parameter's table: fixed and random terms, ratio_to, centring."""
    where = f"{label}, {pname}"
    if not isinstance(value, dict):
        problems.append(f"{where}: expected a table such as {{ random = [\"leaf\"] }}, got {_show(value)}")
        return ParamSpec()
    _check_keys(value, PARAM_KEYS, where, problems)
    fixed = _parse_fixed(value.get("fixed", []), f"{where}.fixed", groups, traits, problems)
    random_as_written = _str_list(value.get("random", []), f"{where}.random", problems)
    random = _filter_random(random_as_written, f"{where}.random", groups, traits, problems)
    for term in fixed:
        if term in random:
            problems.append(f"{where}: {term!r} is both fixed and random; choose one")
    ratio_to = _parse_ratio_to(value, where, pname, problems)
    slopes = _parse_trait_by_group(value.get("slopes", {}), f"{where}.slopes", groups, traits, problems)
    split = _parse_trait_by_group(value.get("split", {}), f"{where}.split", groups, traits, problems)
    for trait, group in slopes:
        if trait not in fixed:
            problems.append(f"{where}.slopes: the {group}-specific slopes on {trait!r} vary around a mean slope; "
                            f"add {trait!r} to {pname}.fixed too")
    split_traits = [t for t, _ in split]
    for trait in dict.fromkeys(split_traits):
        if trait in fixed:
            problems.append(f"{where}: {trait!r} is both in fixed and in split; split already estimates its "
                            "within- and between-group slopes — remove it from fixed")
        if split_traits.count(trait) > 1:
            problems.append(f"{where}.split: {trait!r} is split by more than one grouping; choose one")
    for trait, group in slopes:
        if trait in split_traits:
            problems.append(f"{where}: {trait!r} is in both slopes and split; choose one")
    random_terms = list(random_as_written) + [f"{t}|{g}" for t, g in slopes]
    centring = _parse_centring(value.get("centring", {}), f"{where}.centring", pname, random_terms, problems)
    return ParamSpec(fixed=tuple(fixed), random=tuple(random), ratio_to=ratio_to, centring=centring,
                     slopes=tuple(slopes), split=tuple(split))


def _parse_trait_by_group(value: Any, where: str, groups: Sequence[str], traits: Sequence[str],
                          problems: Problems) -> list[tuple[str, str]]:
    """``{ trait = "grouping" }`` or ``{ trait = ["grouping", ...] }`` -> [(trait, grouping), ...]."""
    table = _table(value, where, problems)
    out: list[tuple[str, str]] = []
    for trait, target in table.items():
        if trait not in traits:
            if trait in groups or trait == LEAF_TERM:
                problems.append(f"{where}: {trait!r} is a grouping; the keys here are traits ({', '.join(traits) or 'none declared'})")
            else:
                problems.append(f"{where}: " + _unknown("trait", trait, traits, "traits"))
            continue
        for group in ([target] if isinstance(target, str) else _str_list(target, f"{where}.{trait}", problems)):
            if group == LEAF_TERM:
                problems.append(f"{where}.{trait}: a trait is one value per leaf, so a leaf-specific slope on it cannot be "
                                f"estimated; use a grouping of leaves ({', '.join(groups) or 'none declared'})")
            elif group not in groups:
                problems.append(f"{where}.{trait}: " + _unknown("grouping", group, groups, "groupings"))
            elif (trait, group) in out:
                problems.append(f"{where}.{trait}: {group!r} is listed twice")
            else:
                out.append((trait, group))
    return out


# ----------------------------------------------------------------------------------------------
# [model] and [priors] (comparison-wide, and per structure as overrides)
# ----------------------------------------------------------------------------------------------


def _parse_model(value: Any, where: str, base: ModelOptions, problems: Problems) -> ModelOptions:
    """[model] keys over ``base``; a structure's model table overrides the comparison's."""
    table = _table(value, where, problems)
    _check_keys(table, MODEL_KEYS, where, problems)
    out: dict[str, Any] = {}
    if "tpu" in table:
        if isinstance(table["tpu"], bool):
            out["tpu"] = table["tpu"]
        else:
            problems.append(f"{where}.tpu: expected true or false, got {_show(table['tpu'])}")
    pairs = (("likelihood", LIKELIHOOD_CHOICES, "student_t", lambda v: v == "student_t"),
             ("sigma", SIGMA_CHOICES, "sigma_by_curve", lambda v: v == "by_curve"),
             ("transition", TRANSITION_CHOICES, "transition", lambda v: v),
             ("electron", ELECTRON_CHOICES, "electron", lambda v: v),
             ("temperature", TEMPERATURE_CHOICES, "peaked", lambda v: v == "peaked"))
    for key, choices, field_name, convert in pairs:
        if key in table:
            chosen = _choice(table[key], f"{where}.{key}", choices, "choice", problems)
            if chosen is not None:
                out[field_name] = convert(chosen)
    options = replace(base, **out)
    if "smooth_curvature" in table:
        if options.transition != "smooth":
            problems.append(f"{where}.smooth_curvature applies only with transition = \"smooth\"; remove it or set "
                            "the transition")
        c = _number_value(table["smooth_curvature"], f"{where}.smooth_curvature", problems,
                          lambda x: 0 < x < 1, "a number strictly between 0 and 1")
        if c is not None:
            options = replace(options, smooth_curvature=float(c))
    return options


def _parse_priors(value: Any, where: str, base, problems: Problems):
    """[priors] over ``base`` (None: leafcv's defaults); returns a PriorSet, or ``base`` when empty."""
    from .priors import PriorSet, prior_from_natural

    table = _table(value, where, problems)
    _check_keys(table, PRIOR_KEYS, where, problems)
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
            problems.append(f"{where}.{key}: {message}")
        elif key.endswith("_ratio"):
            ratios[pname] = prior
        else:
            intercepts[pname] = prior
    for key, attr in PRIOR_SCALE_FIELDS.items():
        if key in table:
            v = _number_value(table[key], f"{where}.{key}", problems, lambda x: x > 0, "a number > 0")
            if v is not None:
                scales[attr] = float(v)
    if "nu" in table:
        nu = table["nu"]
        if (isinstance(nu, list) and len(nu) == 2 and all(_is_number(x) and x > 0 for x in nu)):
            scales["nu_shape"], scales["nu_rate"] = float(nu[0]), float(nu[1])
        else:
            problems.append(f"{where}.nu: expected [shape, rate] of the gamma prior of the Student-t degrees of "
                            f"freedom, two numbers > 0, got {_show(nu)}")
    return replace(out, intercepts=intercepts, ratio_intercepts=ratios, **scales)


# ----------------------------------------------------------------------------------------------
# [[grid]]: combinations expanded into named structures
# ----------------------------------------------------------------------------------------------


def _parse_grids(value: Any, groups, traits, problems: Problems, model: ModelOptions, priors,
                 taken: set[str]) -> list[Structure]:
    """Every [[grid]] expanded, in file order, into structures named
    ``<grid name>.leaf-<params joined by _ or none>.<axis>-<choice>...`` (leaf_effects first, then the
    choice axes in file order)."""
    if isinstance(value, dict):
        value = [value]
    if not isinstance(value, list):
        problems.append(f"grid: expected [[grid]] tables, got {_show(value)}")
        return []
    out: list[Structure] = []
    for number, grid in enumerate(value, start=1):
        where = f"grid #{number}"
        if not isinstance(grid, dict):
            problems.append(f"{where}: expected a table, got {_show(grid)}")
            continue
        _check_keys(grid, GRID_KEYS, where, problems)
        gname = grid.get("name")
        if not isinstance(gname, str) or not gname or not _NAME_RE.fullmatch(gname):
            problems.append(f"{where}: name: expected a short name of letters, digits, '-', '_', '.' "
                            f"(it starts every expanded structure's name), got {_show(gname)}")
            continue
        where = f"grid {gname!r}"
        base = _table(grid.get("base", {}), f"{where}.base", problems)
        if "name" in base:
            problems.append(f"{where}.base: name is not allowed here; the names are made by the grid")
        axes: list[tuple[str, list[tuple[str, dict]]]] = []
        if "leaf_effects" in grid:
            lp = _str_list(grid["leaf_effects"], f"{where}.leaf_effects", problems)
            bad = [p for p in lp if p not in PARAMETERS]
            for p in bad:
                problems.append(f"{where}.leaf_effects: " + _unknown("parameter", p, PARAMETERS, "parameters"))
            lp = [p for p in PARAMETERS if p in lp]
            subsets = [c for n in range(len(lp) + 1) for c in itertools.combinations(lp, n)]
            axes.append(("leaf", [("_".join(c) or "none", {p: {"random": [LEAF_TERM]} for p in c}) for c in subsets]))
        for axis, choices in _table(grid.get("choices", {}), f"{where}.choices", problems).items():
            if not _NAME_RE.fullmatch(axis):
                problems.append(f"{where}.choices: axis name {axis!r} may only contain letters, digits, '-', '_', '.'")
                continue
            table = _table(choices, f"{where}.choices.{axis}", problems)
            if not table:
                problems.append(f"{where}.choices.{axis}: no choices; give at least one, e.g. none = {{}}")
                continue
            opts = []
            for cname, body in table.items():
                if not _NAME_RE.fullmatch(cname):
                    problems.append(f"{where}.choices.{axis}: choice name {cname!r} may only contain letters, digits, "
                                    "'-', '_', '.'")
                elif isinstance(body, dict):
                    opts.append((cname, body))
                else:
                    problems.append(f"{where}.choices.{axis}.{cname}: expected a table of structure keys, got {_show(body)}")
            axes.append((axis, opts))
        if not axes:
            problems.append(f"{where}: nothing to expand; add leaf_effects = [...] or [grid.choices.<axis>]")
            continue
        for combo in itertools.product(*[opts for _, opts in axes]):
            name = ".".join([gname] + [f"{axis}-{cname}" for (axis, _), (cname, _) in zip(axes, combo)])
            origin = f"grid {gname!r}: " + ", ".join(f"{axis}={cname}" for (axis, _), (cname, _) in zip(axes, combo))
            label = f"structure {name!r} ({origin})"
            item = base
            for (axis, _), (cname, body) in zip(axes, combo):
                item = _merge_structure(item, body, f"{where}, {axis}={cname}", problems)
            if name.lower() in taken:
                problems.append(f"{label}: the name is already used by another structure; rename the grid or that structure")
                continue
            taken.add(name.lower())
            st = _parse_structure_body(item, name, label, groups, traits, problems, model, priors, origin)
            if st is not None:
                out.append(st)
    return out


def _merge_structure(a: dict, b: dict, where: str, problems: Problems) -> dict:
    """Merge partial structures: lists are joined (no repeats), tables merged key by key, and a scalar
    given twice with different values is a conflict."""
    out = dict(a)
    for key, value in b.items():
        if key not in out:
            out[key] = value
        elif isinstance(out[key], dict) and isinstance(value, dict):
            out[key] = _merge_structure(out[key], value, f"{where}, {key}", problems)
        elif isinstance(out[key], list) and isinstance(value, list):
            out[key] = out[key] + [v for v in value if v not in out[key]]
        elif out[key] != value:
            problems.append(f"{where}: {key} is set to {_show(out[key])} and to {_show(value)}; a grid may "
                            "add to a structure but not change what the base or another axis set")
    return out


def _parse_fixed(
    value: Any, where: str, groups: Sequence[str], traits: Sequence[str], problems: Problems
) -> list[str]:
    """Fixed terms: declared traits (slopes) or group columns (treatment-coded factors)."""
    valid = (*traits, *groups)
    kept: list[str] = []
    for term in _str_list(value, where, problems):
        if term in valid:
            kept.append(term)
        elif term == LEAF_TERM:
            problems.append(
                f"{where}: 'leaf' cannot be a fixed term (it would be one coefficient per leaf); "
                "use random = [\"leaf\"]"
            )
        else:
            problems.append(f"{where}: " + _unknown("term", term, valid, "terms"))
    return kept


def _filter_random(
    terms: list[str], where: str, groups: Sequence[str], traits: Sequence[str], problems: Problems
) -> list[str]:
    """Random intercepts: ``leaf`` or a declared group column; a trait is a random slope."""
    valid = (LEAF_TERM, *groups)
    kept: list[str] = []
    for term in terms:
        if term in valid:
            kept.append(term)
        elif term in traits:
            problems.append(
                f"{where}: {term!r} is a trait; random lists groupings. For one slope shared by all leaves put it "
                f"in fixed; for slopes that differ by a grouping add slopes = {{ {term} = \"<grouping>\" }} (format 2)"
            )
        else:
            problems.append(f"{where}: " + _unknown("grouping", term, valid, "groupings"))
    return kept


def _parse_ratio_to(value: dict[str, Any], where: str, pname: str, problems: Problems) -> str | None:
    """``ratio_to = "vcmax25"``, allowed for jmax25 and rd25 only."""
    if "ratio_to" not in value:
        return None
    target = value["ratio_to"]
    if pname not in RATIO_PARAMETERS:
        allowed = " and ".join(RATIO_PARAMETERS)
        problems.append(
            f"{where}.ratio_to: only {allowed} can be tied to {RATIO_TARGET} as a ratio; remove ratio_to"
        )
        return None
    if target != RATIO_TARGET:
        shown = repr(target) if isinstance(target, str) else _show(target)
        problems.append(f"{where}.ratio_to: must be {RATIO_TARGET!r}, got {shown}")
        return None
    return RATIO_TARGET


def _parse_centring(
    value: Any, where: str, pname: str, random: list[str], problems: Problems
) -> dict[str, str]:
    """``centring``: random grouping -> auto | centred | noncentred."""
    table = _table(value, where, problems)
    centring: dict[str, str] = {}
    for group, choice in table.items():
        if group not in random:
            written = ", ".join(f'"{t}"' for t in random)
            problems.append(
                f"{where}: {group!r} is not in {pname}.random (random = [{written}]); "
                "centring applies to random terms only"
            )
        else:
            chosen = _choice(choice, f"{where}.{group}", CENTRING_CHOICES, "choice", problems)
            if chosen is not None:
                centring[group] = chosen
    return centring


# ----------------------------------------------------------------------------------------------
# Checks against the data
# ----------------------------------------------------------------------------------------------


def _levels(leaves: pd.DataFrame, column: str) -> list[str]:
    """The distinct non-missing values of a leaf-table column, in order of appearance."""
    return [str(v) for v in pd.unique(leaves[column].dropna())]


def _term_data_problem(term: str, kind: str, is_trait: bool, leaves: pd.DataFrame) -> str | None:
    """Why a fixed or random term cannot be estimated from these leaves, or None."""
    if term == LEAF_TERM:
        return None
    if term not in leaves.columns:
        return f"column {term!r} is not in the leaf table"
    if is_trait:
        return _trait_data_problem(term, leaves)
    levels = _levels(leaves, term)
    need = "a random effect" if kind == "random" else "a fixed factor"
    if not levels:
        return f"grouping {term!r} has no values in the data; remove it from the structure"
    if len(levels) < 2:
        return (
            f"grouping {term!r} has a single level ({levels[0]!r}) in the data; "
            f"{need} needs at least 2 levels — remove it from the structure"
        )
    return None


def _trait_data_problem(term: str, leaves: pd.DataFrame) -> str | None:
    """A trait used as a slope must vary across leaves."""
    values = pd.to_numeric(leaves[term], errors="coerce").to_numpy(dtype=float)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return f"trait {term!r} has no values in the data; remove it from the structure"
    if values.min() == values.max():
        return (
            f"trait {term!r} has the same value ({values[0]:g}) for every leaf; "
            "its slope cannot be estimated — remove it from the structure"
        )
    return None


def _cv_data_problems(cv: CVSpec, leaves: pd.DataFrame) -> list[str]:
    """``cv.by`` needs 2 levels or more; K-fold needs at least as many levels as folds."""
    if cv.by not in leaves.columns:
        return [f"cv.by: column {cv.by!r} is not in the leaf table"]
    levels = _levels(leaves, cv.by)
    if len(levels) < 2:
        found = f"a single level ({levels[0]!r})" if levels else "no levels"
        return [
            f"cv.by: grouping {cv.by!r} has {found} in the data; leaving levels out needs at "
            "least 2 — choose another cv.by"
        ]
    if cv.method == "kfold" and cv.folds > len(levels):
        return [
            f"cv.folds: {cv.folds} folds but only {len(levels)} levels of {cv.by!r} in the data; "
            f"set folds to at most {len(levels)}"
        ]
    return []


# ----------------------------------------------------------------------------------------------
# Summary
# ----------------------------------------------------------------------------------------------


def _describe_header(comparison: Comparison) -> list[str]:
    """Lines on the data, traits, cross-validation and sampler settings."""
    data, cv, sampler = comparison.data, comparison.cv, comparison.sampler
    lines = [
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
    return lines


def _describe_trait(data: DataSpec, trait: str) -> str:
    """``leaf_n (centred at its leaf-table mean)`` or with the stated centre and scale."""
    centre = f"centred at {data.centre[trait]:g}" if trait in data.centre else "centred at its leaf-table mean"
    scale = f", divided by {data.scale[trait]:g}" if trait in data.scale else ""
    return f"{trait} ({centre}{scale})"
