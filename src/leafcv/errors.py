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


class DataError(UserInputError):
    """Problems in the observation table."""


class SpecError(UserInputError):
    """Problems in the comparison file or its structures."""


class EngineError(LeafcvError):
    """The Stan engine failed; carries the engine's own messages."""

    def __init__(self, message: str, engine_messages: str = ""):
        self.engine_messages = engine_messages
        super().__init__(message)
