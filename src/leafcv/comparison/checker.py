"""`Checker`: collects the problems of one comparison file while its sections are read.

Each method checks one written value, reports what is wrong with it (a `Problem` with a code and a
location) and returns the usable part (None, {} or [] when nothing is usable), so that a parser carries
on past a mistake and one run reports every problem.

Locations are the places the messages start with: a dotted path such as ``cv.by`` or
``structure 'x', vcmax25.fixed``; an unknown key's location ends with the key itself.
"""
from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Iterable, Sequence
from typing import Any

from ..data.messages import kind_of as show
from ..errors import Problem

__all__ = ["Checker", "show", "suggest", "unknown", "is_int", "is_number"]


def suggest(word: str, valid: Sequence[str]) -> str | None:
    """The closest valid name to ``word`` (ignoring letter case), or None."""
    lowered = {v.lower(): v for v in valid}
    match = difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=0.6)
    return lowered[match[0]] if match else None


def unknown(kind: str, word: str, valid: Sequence[str], valid_label: str) -> str:
    """``unknown key 'samplr'; did you mean 'sampler'? valid keys: ...``."""
    hint = suggest(word, valid)
    did = f"; did you mean {hint!r}?" if hint else ";"
    listing = ", ".join(valid) if valid else "none"
    return f"unknown {kind} {word!r}{did} valid {valid_label}: {listing}"


def is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _at(where: str, message: str) -> str:
    """Prefix a message with its location, if any."""
    return f"{where}: {message}" if where else message


class Checker:
    """The problems found so far in one comparison file, in the order found.

    >>> check = Checker()
    >>> check.integer("4", "sampler.chains", 1, None, "a positive integer") is None
    True
    >>> check.problems[0], check.problems[0].code, check.problems[0].location
    ("sampler.chains: expected a positive integer, got a string ('4')", 'wrong-type', 'sampler.chains')
    """

    def __init__(self) -> None:
        self.problems: list[Problem] = []

    def __bool__(self) -> bool:
        """True when a problem was found."""
        return bool(self.problems)

    def problem(self, text: str, code: str, location: str = "") -> None:
        """Report one problem: its sentence, its code (see `leafcv.errors.Problem`) and where it is."""
        self.problems.append(Problem(text, code, location))

    def extend(self, problems: Iterable[Problem]) -> None:
        """Report problems found elsewhere (e.g. by `leafcv.data.mapping.check_mapping`), codes kept."""
        self.problems.extend(problems)

    def keys(self, table: dict[str, Any], valid: Sequence[str], where: str) -> None:
        """Report every key of ``table`` that is not in ``valid`` (code ``unknown-key``)."""
        for key in table:
            if key not in valid:
                self.problem(_at(where, unknown("key", key, valid, "keys")), "unknown-key",
                             f"{where}.{key}" if where else key)

    def table(self, value: Any, where: str) -> dict[str, Any]:
        """``value`` if it is a table, else {} after reporting the wrong type."""
        if isinstance(value, dict):
            return value
        self.problem(_at(where, f"expected a table, got {show(value)}"), "wrong-type", where)
        return {}

    def integer(self, value: Any, where: str, low: int, high: int | None, expected: str) -> int | None:
        """An integer within [low, high] (``high`` None: no upper limit), or None after reporting why not."""
        if not is_int(value):
            self.problem(f"{where}: expected {expected}, got {show(value)}", "wrong-type", where)
            return None
        if value < low or (high is not None and value > high):
            self.problem(f"{where}: expected {expected}, got {value}", "out-of-range", where)
            return None
        return value

    def number(self, value: Any, where: str, ok: Callable[[float], bool], expected: str) -> float | None:
        """A finite number accepted by ``ok``, as a float, or None after reporting why not."""
        if not is_number(value):
            self.problem(f"{where}: expected {expected}, got {show(value)}", "wrong-type", where)
            return None
        if not math.isfinite(value) or not ok(value):
            self.problem(f"{where}: expected {expected}, got {value:g}", "out-of-range", where)
            return None
        return float(value)

    def flag(self, value: Any, where: str) -> bool | None:
        """true or false, or None after reporting the wrong type."""
        if isinstance(value, bool):
            return value
        self.problem(f"{where}: expected true or false, got {show(value)}", "wrong-type", where)
        return None

    def text(self, value: Any, where: str) -> str | None:
        """A non-empty string, or None after reporting why not."""
        if not isinstance(value, str):
            self.problem(f"{where}: expected a string, got {show(value)}", "wrong-type", where)
            return None
        if not value.strip():
            self.problem(f"{where}: is empty", "empty-value", where)
            return None
        return value

    def choice(self, value: Any, where: str, choices: Sequence[str], kind: str) -> str | None:
        """One of ``choices``, or None after reporting the unknown value (with a suggestion)."""
        if value in choices:
            return value
        if isinstance(value, str):
            self.problem(f"{where}: " + unknown(kind, value, choices, f"{kind}s"), "unknown-choice", where)
        else:
            self.problem(f"{where}: expected one of {', '.join(choices)}, got {show(value)}", "wrong-type", where)
        return None

    def text_list(self, value: Any, where: str) -> list[str]:
        """The distinct non-empty strings of a list, in order, reporting every bad or repeated entry.

        A lone string is reported and then treated as a one-entry list, so that later checks do not
        repeat the same mistake as many problems.
        """
        if isinstance(value, str):
            self.problem(f'{where}: expected a list of strings, e.g. ["{value}"], got {show(value)}', "wrong-type",
                         where)
            value = [value]
        elif not isinstance(value, list):
            self.problem(f"{where}: expected a list of strings, got {show(value)}", "wrong-type", where)
            return []
        items: list[str] = []
        for item in value:
            if not isinstance(item, str):
                self.problem(f"{where}: entries must be strings, got {show(item)}", "wrong-type", where)
            elif not item.strip():
                self.problem(f"{where}: has an empty entry", "empty-value", where)
            elif item in items:
                self.problem(f"{where}: repeated entry {item!r}; list each term once", "repeated-entry", where)
            else:
                items.append(item)
        return items
