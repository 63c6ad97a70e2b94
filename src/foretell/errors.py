"""Exceptions of foretell: every input problem names its file, line and column."""

from __future__ import annotations

from dataclasses import dataclass


class ForetellError(Exception):
    """Base class of every error foretell raises on purpose."""


@dataclass(frozen=True)
class Problem:
    """One problem found in an input: where it is and what is wrong.

    Attributes
    ----------
    message : str
        What is wrong, and where possible how to fix it.
    path : str or None
        The file (or ``"<frame>"`` for an in-memory table).
    line : int or None
        1-based line of the file (the header of a table is line 1).
    column : str or None
        A column name of the file, or a TOML key path.
    char : int or None
        1-based character position in the line, where it is known (task files).

    Examples
    --------
    >>> str(Problem("unknown key 'nxt'", "task.toml", 5, "contexts[1].nxt", 3))
    "task.toml:5:3: column 'contexts[1].nxt': unknown key 'nxt'"
    """

    message: str
    path: str | None = None
    line: int | None = None
    column: str | None = None
    char: int | None = None

    def __str__(self) -> str:
        where = self.path or "<input>"
        if self.line is not None:
            where += f":{self.line}"
            if self.char is not None:
                where += f":{self.char}"
        if self.column is not None:
            where += f": column '{self.column}'"
        return printable(f"{where}: {self.message}")


def printable(text: str) -> str:
    """Return ``text`` with control and other non-printing characters escaped (\\x0b), on one line.

    Examples
    --------
    >>> printable("a\\tb")
    'a\\\\tb'
    """
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)


class InputError(ForetellError):
    """One or more problems in a task file, a log or another input.

    Parameters
    ----------
    problems : list of Problem, Problem or str
        Every problem found (validators collect them all before raising); a
        string is one problem at ``path``, ``line`` and ``column``.
    path, line, column : optional
        Where the single problem given as a string is.

    Attributes
    ----------
    problems : list of Problem
        ``str(err)`` gives one line per problem.
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
