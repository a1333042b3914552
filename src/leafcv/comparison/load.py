"""`load_comparison`: read a comparison file, check every section and build the `Comparison`."""
from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from ..errors import Problem, SpecError
from ..spec import Comparison, ModelOptions
from .checker import Checker
from .grid import parse_grids
from .keys import TOP_KEYS
from .reading import read_toml
from .sections import parse_cv, parse_data, parse_engine, parse_format, parse_model, parse_priors, parse_sampler
from .structures import parse_structures


def load_comparison(path: str | os.PathLike[str]) -> Comparison:
    """Read and validate a comparison file.

    Parameters
    ----------
    path
        The comparison file (TOML, format 1 or 2).

    Returns
    -------
    Comparison
        The validated comparison, structures in file order, every parameter of every structure
        present (a parameter not named in the file is ``ParamSpec()``, shared by all leaves), and
        the data file resolved against the comparison file's folder.

    Raises
    ------
    SpecError
        With every problem found (each a `leafcv.errors.Problem` with a code and a location), when the
        file cannot be read, is not valid TOML or breaks a rule of its format. The data file's
        existence is not checked here.
    """
    path = Path(path)
    raw = read_toml(path)
    check = Checker()
    comparison = parse_comparison(check, raw, path)
    if check or comparison is None:
        raise SpecError(str(path), check.problems or [Problem("the comparison file could not be read",
                                                              "unreadable-file", str(path))])
    return comparison


def parse_comparison(check: Checker, raw: dict[str, Any], path: Path) -> Comparison | None:
    """Check every section of the file's TOML tables; the Comparison when nothing was wrong."""
    check.keys(raw, TOP_KEYS, "")
    fmt = parse_format(check, raw)
    question = check.text(raw["question"], "question") if "question" in raw else ""
    base = Path(os.path.abspath(path)).parent
    data = parse_data(check, raw.get("data"), base, path.name)
    sampler = parse_sampler(check, raw.get("sampler", {}))
    engine = parse_engine(check, raw.get("engine", {}))
    groups = data.groups if data else ()
    traits = data.traits if data else ()
    cv = parse_cv(check, raw.get("cv", {}), groups, traits)
    model = parse_model(check, raw.get("model", {}), "model", ModelOptions())
    priors = parse_priors(check, raw.get("priors", {}), "priors", None)
    items = raw.get("structure")
    if items is None and "grid" not in raw:
        check.problem("no [[structure]] or [[grid]] found; add at least one [[structure]] with a name",
                      "no-structure", "structure")
        items = []
    structures = parse_structures(check, [] if items is None else items, groups, traits, model, priors)
    if "grid" in raw:
        taken = {s.name.lower() for s in structures}
        structures += parse_grids(check, raw["grid"], groups, traits, model, priors, taken)
    if check or data is None or fmt is None:
        return None
    return Comparison(path=Path(os.path.abspath(path)), data=data, sampler=sampler, cv=cv,
                      structures=tuple(structures), format=fmt, question=question or "", engine=engine)
