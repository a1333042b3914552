"""The terms of each structure, and which pairs of structures differ in exactly one term.

A term is keyed by (parameter, variable) and says how the variable enters: ``fixed`` (a trait slope
or a factor's levels), ``random`` (intercepts by a grouping; the variable ``leaf`` is the leaf
effect), ``split`` (within- and between-group slopes of a trait), ``slopes`` (random slopes of a
trait by a grouping), or ``ratio`` (jmax25 or rd25 tied to vcmax25). Model options and correlated
leaf effects are terms too. Two structures differ in one term when exactly one key is present in
one only, or present in both entering differently (e.g. campaign on vcmax25 fixed in one, random
in the other).

The terms are read from ``manifest["structures"][name]["params"]`` (each parameter's ``fixed``,
``random``, ``ratio_to``, ``slopes`` and ``split`` as in :class:`leafcv.spec.ParamSpec`, written as data by
``leafcv compare``), never from the words of ``structures.txt``.

Tests: tests/report/test_structure_terms.py, tests/report/test_report_page.py.
"""
from __future__ import annotations

from dataclasses import dataclass
from itertools import combinations

from ..data.dataset import LEAF_TERM

#: Term key -> how it enters (for a model option, keyed ("model", option), its value).
Terms = dict[tuple[str, str], object]

#: Model options in words (a value of each option -> its description).
OPTION_WORDS = {
    "electron": lambda v: f"{str(v).replace('-', '/')} electrons per CO2",
    "transition": lambda v: "hard minimum of the limitations" if v == "min" else "smooth co-limitation",
    "smooth_curvature": lambda v: f"co-limitation curvature {v:g}",
    "tpu": lambda v: "TPU limitation" if v else "no TPU limitation",
    "student_t": lambda v: "Student-t likelihood" if v else "normal likelihood",
    "sigma_by_curve": lambda v: "one residual SD per curve type" if v else "one residual SD",
    "peaked": lambda v: "peaked Arrhenius for Vcmax and Jmax" if v else "Arrhenius",
}


@dataclass(frozen=True)
class Recorded:
    """A term as its term object recorded it (how it enters, and its own words)."""

    how: str
    words: str


def _from_records(record: dict) -> Terms:
    """The terms the structure's term objects recorded (``terms`` of its manifest record), and ratios."""
    terms: Terms = {(t["parameter"], t["key"]): Recorded(t["how"], t["words"]) for t in record["terms"]}
    for p, spec in record["params"].items():
        if spec.get("ratio_to"):
            terms[(p, spec["ratio_to"])] = "ratio"
    return terms


def _from_params(params: dict) -> Terms:
    """The terms of a manifest written before terms recorded themselves (read from the parameter specs)."""
    terms: Terms = {}
    for p, spec in params.items():
        for v in spec.get("fixed", []):
            terms[(p, v)] = "fixed"
        for v in spec.get("random", []):
            terms[(p, v)] = "random"
        for t, g in spec.get("split", []):
            terms[(p, t)] = f"split:{g}"
        for t, g in spec.get("slopes", []):
            terms[(p, f"{t}|{g}")] = "slopes"
        for c in spec.get("smooth", []):
            terms[(p, c)] = "smooth"
        if spec.get("ratio_to"):
            terms[(p, spec["ratio_to"])] = "ratio"
    return terms


def structure_terms(manifest: dict) -> dict[str, Terms]:
    """Per structure of the manifest, its terms (parameters, model options, leaf correlation).

    Structures whose record has no parameter terms (``params``; a run folder of a leafcv that predates the
    report) are left out.
    """
    out: dict[str, Terms] = {}
    for name, record in manifest.get("structures", {}).items():
        if "params" not in record:
            continue
        terms = _from_records(record) if "terms" in record else _from_params(record["params"])
        for key, value in (record.get("model") or {}).items():
            terms[("model", key)] = value
        terms[("model", "leaf_correlation")] = bool(record.get("leaf_correlation", False))
        out[name] = terms
    return out


def _how(how, p: str, v: str) -> str:
    if isinstance(how, Recorded):
        return how.words
    if how == "fixed":
        return f"a fixed effect of {v} on {p}"
    if how == "random":
        return f"leaf effects on {p}" if v == LEAF_TERM else f"random {v} effects on {p}"
    if how == "ratio":
        return f"{p} tied to {v} as a ratio"
    if how == "slopes":
        t, g = v.split("|", 1)
        return f"{g}-specific slopes of {p} on {t}"
    if how == "smooth":
        return f"a smooth trend of {p} over {v}"
    if how.startswith("split:"):
        return f"separate within- and between-{how[6:]} slopes of {p} on {v}"
    return f"{v} on {p} ({how})"


def _option(key: str, value: object) -> str:
    if key == "leaf_correlation":
        return "correlated leaf effects" if value else "independent leaf effects"
    return OPTION_WORDS.get(key, lambda x: f"{key} = {x}")(value)


def one_term_difference(a: Terms, b: Terms, name_a: str = "the first", name_b: str = "the second") -> str | None:
    """The one term in which structure ``a`` differs from ``b``, in words; None unless exactly one."""
    keys = [k for k in sorted(set(a) | set(b)) if a.get(k) != b.get(k)]
    if len(keys) != 1:
        return None
    (p, v), = keys
    if p == "model":
        return f"{_option(v, a[(p, v)])} in {name_a}, {_option(v, b[(p, v)])} in {name_b}"
    if (p, v) not in b:
        return f"{name_a} adds {_how(a[(p, v)], p, v)}"
    if (p, v) not in a:
        return f"{name_b} adds {_how(b[(p, v)], p, v)}"
    return f"{_how(a[(p, v)], p, v)} in {name_a}, {_how(b[(p, v)], p, v)} in {name_b}"


def one_term_pairs(names: list[str], terms: dict[str, Terms]) -> list[tuple[str, str, str]]:
    """(first, second, difference in words) for every pair of ``names`` (in their order, so the
    better-ranked structure first) that differ in exactly one term."""
    out = []
    for a, b in combinations(names, 2):
        if a in terms and b in terms:
            words = one_term_difference(terms[a], terms[b], a, b)
            if words:
                out.append((a, b, words))
    return out
