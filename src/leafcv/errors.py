"""Error types. User-facing problems carry every problem found, so one run reports them all.

Tests: tests/comparison/test_checker.py, tests/test_data_reading.py, tests/test_api.py,
tests/engines/test_pystan_engine.py.
"""
from __future__ import annotations


class LeafcvError(Exception):
    """Base class of leafcv's errors."""


class UserInputError(LeafcvError):
    """A problem with the user's data or files (command-line exit code 1).

    Parameters
    ----------
    source
        The file (or structure) the problems belong to.
    problems
        One plain sentence per problem, each naming column, rows or term and what to do.
    """

    def __init__(self, source: str, problems: list[str]):
        self.source = str(source)
        self.problems = list(problems)
        lines = "\n".join(f"  - {p}" for p in self.problems)
        super().__init__(f"{self.source}: {len(self.problems)} problem(s)\n{lines}")


class Problem(str):
    """One problem sentence that also carries a code and a location, so that callers act on the code
    and never parse the words. A ``str``: every place that shows problems shows it unchanged.

    The location is where the problem is: in a comparison file, the place its message starts with (a
    dotted path such as ``cv.by``, ``data.columns.photon_flux`` or ``structure 'x', vcmax25.fixed``; an
    unknown key's location ends with the key); in the data, the column name.

    Codes in use. Any value of a comparison file (`leafcv.comparison.checker.Checker`):
    ``unknown-key``, ``missing-key``, ``misplaced-key`` (a key not allowed in that table), ``renamed-key``
    (an earlier data-role key; location e.g. ``[data.columns] ci``), ``wrong-type``, ``empty-value``,
    ``out-of-range`` (a number or integer outside its limits), ``wrong-value`` (any other value that
    breaks its rule: a prior, ``ratio_to``, ``pressure_kpa``), ``unknown-choice`` (a word not among a
    setting's choices), ``repeated-entry``.
    The file as a whole: ``unreadable-file``, ``not-utf8``, ``toml-syntax`` (location ``line L, column C``
    or ``end of file``), ``unsupported-format``, ``needs-format-2``, ``no-structure``.
    Structures and grids: ``unknown-parameter``, ``unsupported-parameter`` (tpu25 given terms),
    ``unknown-term`` (a trait or grouping not declared under [data.leaf]), ``misplaced-term`` (a term of the
    wrong kind for its place: a trait as a grouping, ``leaf`` as a fixed term, ...), ``conflicting-terms``,
    ``needs-fixed-term`` (random slopes without the fixed slope), ``ratio-not-allowed``, ``bad-name`` (not
    usable as a file name), ``duplicate-name``, ``inapplicable-option`` (an option whose condition is not
    met), ``empty-grid``, ``grid-conflict``.
    The data mapping (`leafcv.data.mapping`, for a comparison file and a `DataSpec` alike):
    ``missing-role``, ``shared-column``, ``group-and-trait``, ``reserved-name`` (a leaf-level column
    called ``leaf``), ``leaf-id-column``, ``unknown-unit``, ``missing-pressure``, ``implausible-pressure``.
    Against the loaded data (`leafcv.comparison.check_against_data`): ``unknown-column``, ``no-values``,
    ``single-level``, ``constant-trait``, ``no-within-variation``, ``no-between-variation``,
    ``too-many-folds``; the design's own problems (`leafcv.design`): ``constant-term``, ``collinear-term``,
    ``too-few-leaf-terms``, ``no-training-points``, and ``not-estimable`` for any without a code.
    The observation table: ``varies-within-leaf`` (location: the column name).
    A fit's sampler diagnostics (`leafcv.diagnostics.diagnose`): ``rhat`` (location: the worst
    parameter), ``ess-bulk``, ``ess-tail``, ``divergences``, ``treedepth``, ``ebfmi``.
    """

    def __new__(cls, text: str, code: str, location: str = ""):
        obj = super().__new__(cls, text)
        obj.code, obj.location = code, location
        return obj

    def __reduce__(self):
        return (Problem, (str(self), self.code, self.location))


class DataError(UserInputError):
    """Problems in the observation table."""


class SpecError(UserInputError):
    """Problems in the comparison file or its structures."""


class EngineError(LeafcvError):
    """The Stan engine failed; carries the engine's own messages."""

    def __init__(self, message: str, engine_messages: str = ""):
        self.engine_messages = engine_messages
        super().__init__(message)
