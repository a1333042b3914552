"""[[structure]] tables: names, parameter entries (fixed, random, ratio_to, centring, slopes, split, smooth),
model options, priors and correlated leaf effects. `leafcv.comparison.grid` builds structures through
`parse_structure_body` too."""
from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from ..spec import CENTRING_CHOICES, PARAMETERS, RATIO_PARAMETERS, ModelOptions, ParamSpec, Structure
from .checker import Checker, show, unknown
from .keys import LEAF_TERM, NAME_RE, PARAM_KEYS, RATIO_TARGET, STRUCTURE_KEYS
from .sections import parse_model, parse_priors


def parse_structures(
    check: Checker, value: Any, groups: Sequence[str], traits: Sequence[str],
    model: ModelOptions = ModelOptions(), priors=None,
) -> list[Structure]:
    """Every [[structure]], in file order, with unique file-safe names."""
    if value is None:
        check.problem("no [[structure]] found; add at least one [[structure]] with a name", "no-structure",
                      "structure")
        return []
    if isinstance(value, dict):
        check.problem("structure: write each structure as [[structure]] (double brackets), not [structure]",
                      "wrong-type", "structure")
        value = [value]
    if not isinstance(value, list):
        check.problem(f"structure: expected [[structure]] tables, got {show(value)}", "wrong-type", "structure")
        return []
    structures: list[Structure] = []
    names: dict[str, int] = {}
    for number, item in enumerate(value, start=1):
        if not isinstance(item, dict):
            check.problem(f"structure #{number}: expected a table, got {show(item)}", "wrong-type",
                          f"structure #{number}")
            continue
        name = _parse_structure_name(check, item, number, names)
        label = f"structure {name!r}" if name is not None else f"structure #{number}"
        structure = parse_structure_body(check, item, name, label, groups, traits, model, priors)
        if structure is not None:
            structures.append(structure)
    return structures


def parse_structure_body(check: Checker, item: dict[str, Any], name: str | None, label: str, groups, traits,
                         model: ModelOptions, priors, origin: str = "") -> Structure | None:
    """Parameters, model options, priors and leaf correlation of one structure (written or expanded)."""
    params = _parse_structure_params(check, item, label, groups, traits)
    options = parse_model(check, item.get("model", {}), f"{label}: model", model)
    structure_priors = parse_priors(check, item.get("priors", {}), f"{label}: priors", priors)
    own_priors = item.get("priors") if isinstance(item.get("priors"), dict) else {}
    if "tpu25" in own_priors and not options.tpu:
        check.problem(f"{label}: priors.tpu25 applies only with TPU limitation on; add model = {{ tpu = true }} "
                      "or remove the tpu25 prior", "inapplicable-option", f"{label}: priors.tpu25")
    corr = check.flag(item.get("leaf_correlation", False), f"{label}: leaf_correlation") or False
    leaf_params = [p for p in PARAMETERS if LEAF_TERM in params[p].random]
    if corr and len(leaf_params) < 2:
        check.problem(f"{label}: leaf_correlation applies only with leaf effects on two or more parameters "
                      f"(leaf effects here: {', '.join(leaf_params) or 'none'}); add random = [\"leaf\"] to "
                      "another parameter or remove leaf_correlation", "inapplicable-option",
                      f"{label}: leaf_correlation")
    lkj = 2.0
    if "lkj_eta" in item:
        if not corr:
            check.problem(f"{label}: lkj_eta applies only with leaf_correlation = true; remove it or switch the "
                          "correlation on", "inapplicable-option", f"{label}: lkj_eta")
        value = check.number(item["lkj_eta"], f"{label}: lkj_eta", lambda x: x > 0, "a number > 0")
        lkj = float(value) if value is not None else lkj
    if name is None:
        return None
    return Structure(name=name, params=params, options=options, priors=structure_priors,
                     leaf_correlation=corr, lkj_eta=lkj, origin=origin)


def _parse_structure_name(check: Checker, item: dict[str, Any], number: int, names: dict[str, int]) -> str | None:
    """The structure's name: present, file-safe and unique (also ignoring letter case).

    Returns the name when it is a non-empty string (even if it breaks a rule, so that later
    messages can name the structure), else None.
    """
    where = f"structure #{number}"
    if "name" not in item:
        check.problem(f"{where}: name is missing; add name = \"...\" (letters, digits, '-', '_', '.')",
                      "missing-key", f"{where}.name")
        return None
    name = item["name"]
    if not isinstance(name, str):
        check.problem(f"{where}: name: expected a string, got {show(name)}", "wrong-type", f"{where}.name")
        return None
    if not name:
        check.problem(f"{where}: name is empty; give it a name of letters, digits, '-', '_', '.'", "empty-value",
                      f"{where}.name")
        return None
    _check_name_characters(check, name)
    _check_name_unique(check, name, number, names)
    names.setdefault(name, number)
    return name


def _check_name_characters(check: Checker, name: str) -> None:
    """A name becomes a file name: only ASCII letters, digits, '-', '_' and '.', and not only dots."""
    bad = sorted({c for c in name if not NAME_RE.fullmatch(c)})
    if bad:
        shown = ", ".join(repr(c) for c in bad)
        check.problem(f"structure {name!r}: name may only contain letters, digits, '-', '_' and '.' "
                      f"(it becomes a file name); found {shown}", "bad-name", f"structure {name!r}")
    elif set(name) == {"."}:
        check.problem(f"structure {name!r}: name cannot be only dots (it becomes a file name)", "bad-name",
                      f"structure {name!r}")


def _check_name_unique(check: Checker, name: str, number: int, names: dict[str, int]) -> None:
    """Names must differ, and differ by more than letter case (some file systems ignore case)."""
    if name in names:
        check.problem(f"structure {name!r} (#{number}): duplicate name, also used by structure #{names[name]}; "
                      "names must be unique", "duplicate-name", f"structure {name!r}")
        return
    for other, other_number in names.items():
        if other.lower() == name.lower():
            check.problem(f"structure {name!r} (#{number}): name differs from structure {other!r} "
                          f"(#{other_number}) only in letter case; names become file names, which some "
                          "file systems do not tell apart", "duplicate-name", f"structure {name!r}")
            return


def _parse_structure_params(
    check: Checker, item: dict[str, Any], label: str, groups: Sequence[str], traits: Sequence[str]
) -> dict[str, ParamSpec]:
    """Every parameter of one structure; an unnamed parameter is shared by all leaves."""
    for key in item:
        if key not in STRUCTURE_KEYS and key not in PARAMETERS:
            if key == "tpu25":
                check.problem(f"{label}: tpu25 cannot vary by structure terms in this version; it is one value "
                              "shared by all leaves when [model] tpu = true", "unsupported-parameter",
                              f"{label}: tpu25")
                continue
            message = unknown("parameter", key, PARAMETERS, "parameters")
            check.problem(f"{label}: {message} (and {', '.join(repr(k) for k in STRUCTURE_KEYS)})",
                          "unknown-parameter", f"{label}: {key}")
    return {
        pname: _parse_param(check, item[pname], label, pname, groups, traits) if pname in item else ParamSpec()
        for pname in PARAMETERS
    }


def _parse_param(
    check: Checker, value: Any, label: str, pname: str, groups: Sequence[str], traits: Sequence[str]
) -> ParamSpec:
    """One parameter's table: fixed and random terms, ratio_to, centring, slopes and split."""
    where = f"{label}, {pname}"
    if not isinstance(value, dict):
        check.problem(f"{where}: expected a table such as {{ random = [\"leaf\"] }}, got {show(value)}", "wrong-type",
                      where)
        return ParamSpec()
    check.keys(value, PARAM_KEYS, where)
    fixed = _parse_fixed(check, value.get("fixed", []), f"{where}.fixed", groups, traits)
    random_as_written = check.text_list(value.get("random", []), f"{where}.random")
    random = _filter_random(check, random_as_written, f"{where}.random", groups, traits)
    for term in fixed:
        if term in random:
            check.problem(f"{where}: {term!r} is both fixed and random; choose one", "conflicting-terms", where)
    ratio_to = _parse_ratio_to(check, value, where, pname)
    slopes = _parse_trait_by_group(check, value.get("slopes", {}), f"{where}.slopes", groups, traits)
    split = _parse_trait_by_group(check, value.get("split", {}), f"{where}.split", groups, traits)
    for trait, group in slopes:
        if trait not in fixed:
            check.problem(f"{where}.slopes: the {group}-specific slopes on {trait!r} vary around a mean slope; "
                          f"add {trait!r} to {pname}.fixed too", "needs-fixed-term", f"{where}.slopes.{trait}")
    split_traits = [t for t, _ in split]
    for trait in dict.fromkeys(split_traits):
        if trait in fixed:
            check.problem(f"{where}: {trait!r} is both in fixed and in split; split already estimates its "
                          "within- and between-group slopes — remove it from fixed", "conflicting-terms", where)
        if split_traits.count(trait) > 1:
            check.problem(f"{where}.split: {trait!r} is split by more than one grouping; choose one",
                          "conflicting-terms", f"{where}.split.{trait}")
    for trait, group in slopes:
        if trait in split_traits:
            check.problem(f"{where}: {trait!r} is in both slopes and split; choose one", "conflicting-terms", where)
    smooth = _parse_smooth(check, value.get("smooth", []), f"{where}.smooth", groups, traits)
    for trait in smooth:
        if trait in fixed or trait in split_traits or trait in (t for t, _ in slopes):
            check.problem(f"{where}: {trait!r} is both smooth and a slope; the smooth already includes its straight-line "
                          f"trend — remove it from fixed, slopes or split", "conflicting-terms", where)
    random_terms = list(random_as_written) + [f"{t}|{g}" for t, g in slopes]
    centring = _parse_centring(check, value.get("centring", {}), f"{where}.centring", pname, random_terms)
    return ParamSpec(fixed=tuple(fixed), random=tuple(random), ratio_to=ratio_to, centring=centring,
                     slopes=tuple(slopes), split=tuple(split), smooth=tuple(smooth))


def _parse_smooth(check: Checker, value: Any, where: str, groups: Sequence[str], traits: Sequence[str]) -> list[str]:
    """``smooth = ["day_of_year"]``: declared traits (numeric leaf covariates), each a penalised spline."""
    kept: list[str] = []
    for term in check.text_list(value, where):
        if term in kept:
            check.problem(f"{where}: {term!r} is listed twice", "repeated-entry", where)
        elif term in traits:
            kept.append(term)
        elif term in groups or term == LEAF_TERM:
            check.problem(f"{where}: {term!r} is a grouping; a smooth needs a numeric leaf covariate listed in "
                          f"[data.leaf] traits ({', '.join(traits) or 'none declared'}); for a grouping use fixed or "
                          f"random", "misplaced-term", where)
        else:
            check.problem(f"{where}: " + unknown("trait", term, traits, "traits"), "unknown-term", where)
    return kept


def _parse_trait_by_group(check: Checker, value: Any, where: str, groups: Sequence[str],
                          traits: Sequence[str]) -> list[tuple[str, str]]:
    """``{ trait = "grouping" }`` or ``{ trait = ["grouping", ...] }`` -> [(trait, grouping), ...]."""
    table = check.table(value, where)
    out: list[tuple[str, str]] = []
    for trait, target in table.items():
        if trait not in traits:
            if trait in groups or trait == LEAF_TERM:
                check.problem(f"{where}: {trait!r} is a grouping; the keys here are traits "
                              f"({', '.join(traits) or 'none declared'})", "misplaced-term", f"{where}.{trait}")
            else:
                check.problem(f"{where}: " + unknown("trait", trait, traits, "traits"), "unknown-term",
                              f"{where}.{trait}")
            continue
        at = f"{where}.{trait}"
        for group in ([target] if isinstance(target, str) else check.text_list(target, at)):
            if group == LEAF_TERM:
                check.problem(f"{at}: a trait is one value per leaf, so a leaf-specific slope on it cannot be "
                              f"estimated; use a grouping of leaves ({', '.join(groups) or 'none declared'})",
                              "misplaced-term", at)
            elif group not in groups:
                check.problem(f"{at}: " + unknown("grouping", group, groups, "groupings"), "unknown-term", at)
            elif (trait, group) in out:
                check.problem(f"{at}: {group!r} is listed twice", "repeated-entry", at)
            else:
                out.append((trait, group))
    return out


def _parse_fixed(check: Checker, value: Any, where: str, groups: Sequence[str], traits: Sequence[str]) -> list[str]:
    """Fixed terms: declared traits (slopes) or group columns (treatment-coded factors)."""
    valid = (*traits, *groups)
    kept: list[str] = []
    for term in check.text_list(value, where):
        if term in valid:
            kept.append(term)
        elif term == LEAF_TERM:
            check.problem(f"{where}: 'leaf' cannot be a fixed term (it would be one coefficient per leaf); "
                          "use random = [\"leaf\"]", "misplaced-term", where)
        else:
            check.problem(f"{where}: " + unknown("term", term, valid, "terms"), "unknown-term", where)
    return kept


def _filter_random(
    check: Checker, terms: list[str], where: str, groups: Sequence[str], traits: Sequence[str]
) -> list[str]:
    """Random intercepts: ``leaf`` or a declared group column; a trait is a random slope."""
    valid = (LEAF_TERM, *groups)
    kept: list[str] = []
    for term in terms:
        if term in valid:
            kept.append(term)
        elif term in traits:
            check.problem(
                f"{where}: {term!r} is a trait; random lists groupings. For one slope shared by all leaves put it "
                f"in fixed; for slopes that differ by a grouping add slopes = {{ {term} = \"<grouping>\" }} (format 2)",
                "misplaced-term", where,
            )
        else:
            check.problem(f"{where}: " + unknown("grouping", term, valid, "groupings"), "unknown-term", where)
    return kept


def _parse_ratio_to(check: Checker, value: dict[str, Any], where: str, pname: str) -> str | None:
    """``ratio_to = "vcmax25"``, allowed for jmax25 and rd25 only."""
    if "ratio_to" not in value:
        return None
    target = value["ratio_to"]
    if pname not in RATIO_PARAMETERS:
        allowed = " and ".join(RATIO_PARAMETERS)
        check.problem(f"{where}.ratio_to: only {allowed} can be tied to {RATIO_TARGET} as a ratio; remove ratio_to",
                      "ratio-not-allowed", f"{where}.ratio_to")
        return None
    if target != RATIO_TARGET:
        shown = repr(target) if isinstance(target, str) else show(target)
        check.problem(f"{where}.ratio_to: must be {RATIO_TARGET!r}, got {shown}", "wrong-value", f"{where}.ratio_to")
        return None
    return RATIO_TARGET


def _parse_centring(check: Checker, value: Any, where: str, pname: str, random: list[str]) -> dict[str, str]:
    """``centring``: random grouping -> auto | centred | noncentred."""
    table = check.table(value, where)
    centring: dict[str, str] = {}
    for group, choice in table.items():
        if group not in random:
            written = ", ".join(f'"{t}"' for t in random)
            check.problem(f"{where}: {group!r} is not in {pname}.random (random = [{written}]); "
                          "centring applies to random terms only", "misplaced-term", f"{where}.{group}")
        else:
            chosen = check.choice(choice, f"{where}.{group}", CENTRING_CHOICES, "choice")
            if chosen is not None:
                centring[group] = chosen
    return centring
