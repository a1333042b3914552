"""Error types. User-facing problems carry every problem found, so one run reports them all."""
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

    Codes in use: ``"varies-within-leaf"`` (location: the column name).
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
