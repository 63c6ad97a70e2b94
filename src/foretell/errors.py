"""Exceptions of foretell: every input problem names its file, line and column."""

from __future__ import annotations

from dataclasses import dataclass


class ForetellError(Exception):
    """Base class of every error foretell raises on purpose."""


@dataclass(frozen=True)
class Problem:
    """One problem found in an input: where it is and what is wrong.

    ``line`` is 1-based (the header of a table is line 1); ``column`` is a
    column name of the file (or a TOML key path); either may be ``None``.
    """

    message: str
    path: str | None = None
    line: int | None = None
    column: str | None = None

    def __str__(self) -> str:
        where = self.path or "<input>"
        if self.line is not None:
            where += f":{self.line}"
        if self.column is not None:
            where += f": column '{self.column}'"
        return printable(f"{where}: {self.message}")


def printable(text: str) -> str:
    """Return ``text`` with control and other non-printing characters escaped (\\x0b), on one line."""
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)


class InputError(ForetellError):
    """One or more problems in a task file, a log or another input.

    ``problems`` lists every problem found (validators collect them all
    before raising); ``str(err)`` gives one line per problem.
    """

    def __init__(self, problems: list[Problem] | Problem | str, *, path: str | None = None,
                 line: int | None = None, column: str | None = None) -> None:
        if isinstance(problems, str):
            problems = [Problem(problems, path=path, line=line, column=column)]
        elif isinstance(problems, Problem):
            problems = [problems]
        self.problems: list[Problem] = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


class TaskError(InputError):
    """A task file that cannot describe a stimulus source."""


class LogError(InputError):
    """A response log that does not fit the canonical format or its task."""


class UsageError(ForetellError):
    """Arguments or options that do not make sense together (CLI exit 2)."""


class OutputError(ForetellError):
    """An output that cannot be written without losing something (e.g. it exists)."""
