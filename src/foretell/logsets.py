"""Logs in many files: a folder, a glob or a file-name pattern, read in a stable order into one table."""

from __future__ import annotations

import difflib
import glob
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import LogError, Problem, UsageError
from .logread import TABLE_SUFFIXES, LogFile, read_log_cells
from .text import plural

PLACEHOLDERS = ("participant", "session", "group")
"""The ids a name pattern may take from a file's name (``{participant}``, ...)."""
_GLOB = re.compile(r"[*?\[]")
_TOKEN = re.compile(r"\{([^{}]*)\}|\*\*/|\*|\?")
_SHOW = 5


@dataclass(frozen=True, eq=False)
class LogTable:
    """The cells of every file of a log, one table, and where each row came from.

    Attributes
    ----------
    cells : pandas.DataFrame
        Every file's rows, files in reading order, under the files' column
        names (columns a file lacks are empty in its rows), plus a canonical
        column per id the files' names or places give.
    lines, files : numpy.ndarray
        The file line and the file of each row.
    sources : tuple of str
        Every file read, in reading order.
    warnings : tuple of str
        What reading found (files left out, columns some files lack, ids
        from file names that replaced a column).
    notes : tuple of str
        Where the files and ids came from, for ``foretell check --profile``.
    """

    cells: pd.DataFrame
    lines: np.ndarray
    files: np.ndarray
    sources: tuple[str, ...]
    warnings: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()


def name_regex(pattern: str) -> re.Pattern:
    """Return the regular expression of a file-name pattern.

    ``{participant}``, ``{session}`` and ``{group}`` match one or more
    characters (as few as possible) and name what they match; the same
    placeholder twice must match the same text. ``*`` matches any text
    within a folder name, ``**/`` any folders, ``?`` one character.

    Parameters
    ----------
    pattern : str
        e.g. ``"{participant}_ses-{session}_*.csv"``.

    Returns
    -------
    re.Pattern
        Matched against the end of a file's path (after a '/').

    Raises
    ------
    UsageError
        For an unknown placeholder (with the closest known one), or a pattern with none and no wildcard either.

    Examples
    --------
    >>> name_regex("{participant}_ses-{session}_*.csv").search("p01_ses-2_x.csv").groupdict()
    {'participant': 'p01', 'session': '2'}
    """
    if not isinstance(pattern, str) or not pattern.strip():
        raise UsageError(f"a name pattern is text such as '{{participant}}_*.csv', got {pattern!r}")
    parts, pos, seen = [], 0, set()
    for token in _TOKEN.finditer(pattern):
        parts.append(re.escape(pattern[pos:token.start()]))
        name = token.group(1)
        if name is None:
            parts.append({"**/": "(?:[^/]+/)*", "*": "[^/]*", "?": "[^/]"}[token.group(0)])
        elif name not in PLACEHOLDERS:
            close = difflib.get_close_matches(name, PLACEHOLDERS, n=1)
            hint = f" (did you mean '{{{close[0]}}}'?)" if close else ""
            raise UsageError(f"unknown placeholder {{{name}}} in the name pattern {pattern!r}{hint}; "
                             f"placeholders are {', '.join('{' + p + '}' for p in PLACEHOLDERS)}")
        else:
            parts.append(f"(?P={name})" if name in seen else f"(?P<{name}>[^/]+?)")
            seen.add(name)
        pos = token.end()
    parts.append(re.escape(pattern[pos:]))
    return re.compile("(?:^|/)" + "".join(parts) + "$")


def find_log_files(source: str | Path, name_pattern: str | None = None
                   ) -> tuple[list[LogFile], list[str], list[str]]:
    """Return the files of a log, in a stable order, with the ids their names give, what was left out and why.

    Parameters
    ----------
    source : str or pathlib.Path
        A file; a folder (its files with a table extension,
        :data:`foretell.logread.TABLE_SUFFIXES`, or those the pattern
        matches, in its subfolders too when the pattern holds '/'); or a
        glob (``data/*.csv``, ``data/**/*.json``).
    name_pattern : str, optional
        See :func:`name_regex`; it chooses the files and names their ids.

    Returns
    -------
    (list of LogFile, list of str, list of str)
        The files sorted by path; warnings naming the files the pattern left
        out; a note saying which ids come from the names.

    Raises
    ------
    LogError
        When nothing matches: a glob or a pattern that matches no file, an
        empty folder, a missing path.
    UsageError
        For a bad pattern.
    """
    text = str(source)
    regex = name_regex(name_pattern) if name_pattern is not None else None
    path = Path(text)
    if path.is_file() or (not path.exists() and not _GLOB.search(text)):
        candidates, where = [path], "the file"
    elif path.is_dir():
        walk = path.rglob("*") if name_pattern and "/" in name_pattern else path.iterdir()
        candidates = [p for p in walk if p.is_file() and not p.name.startswith(".")]
        if regex is None:
            candidates = [p for p in candidates if p.suffix.lower() in TABLE_SUFFIXES]
        where = "the folder's files"
    else:
        candidates = [Path(p) for p in glob.glob(text, recursive=True) if Path(p).is_file()]
        where = "the files the glob finds"
        if not candidates:
            raise LogError(Problem(f"no file matches the glob {text!r}; check the folder and the "
                                   "pattern (quote it on the command line so the shell leaves it alone)", text))
    candidates = sorted(candidates, key=lambda p: p.as_posix())
    if regex is None:
        if not candidates:
            raise LogError(Problem(f"the folder holds no log file (extensions {', '.join(TABLE_SUFFIXES)}); "
                                   "give a name pattern to choose other files", text))
        return [LogFile(p) for p in candidates], [], []
    found, left = [], []
    for p in candidates:
        match = regex.search(p.as_posix())
        (found if match else left).append((p, match))
    if not found:
        shown = ", ".join(p.name for p, _ in left[:_SHOW]) + (" ..." if len(left) > _SHOW else "")
        raise LogError(Problem(f"the name pattern {name_pattern!r} matches none of {where} "
                               f"({shown or 'no files'}); fix the pattern: placeholders are "
                               f"{', '.join('{' + p + '}' for p in PLACEHOLDERS)}, * matches any text", text))
    warnings = [f"{plural(len(left), 'file')} of {text} {'does' if len(left) == 1 else 'do'} not fit the name "
                f"pattern {name_pattern!r} and {'was' if len(left) == 1 else 'were'} not read: "
                f"{_names(p for p, _ in left)}"] if left else []
    named = [p for p in PLACEHOLDERS if p in regex.groupindex]
    notes = [f"{' and '.join(named)} from the file names ({plural(len(found), 'file')}, pattern "
             f"{name_pattern!r})"] if named else []
    return [LogFile(p, ids=match.groupdict()) for p, match in found], warnings, notes


def read_log_files(files: Sequence[LogFile], *, names: Sequence[str], wanted: Sequence[str] = (),
                   sheet: str | int | None = None) -> LogTable:
    """Return the cells of every file as one table, each row with its file and line.

    Parameters
    ----------
    files : sequence of LogFile
        In reading order.
    names : sequence of str
        The column names a header may hold (to recognise a stray line above it).
    wanted : sequence of str
        The columns foretell reads: a file that lacks one that another file
        has is a problem; other differences in the column sets are warned about.
    sheet : str or int, optional
        The sheet of spreadsheets.

    Returns
    -------
    LogTable

    Raises
    ------
    LogError
        Every problem of every file (file, line and column), and files that
        lack a column foretell reads from the others.
    """
    tables, problems, warnings = [], [], []
    for file in files:
        try:
            cells, lines = read_log_cells(file.path, names=names, sheet=sheet)
        except LogError as err:
            problems += err.problems
            continue
        tables.append((file, _with_ids(cells, file, warnings), lines))
    if problems:
        raise LogError(problems)
    problems, differ = _column_sets(tables, wanted)
    if problems:
        raise LogError(problems)
    warnings += differ
    cells = pd.concat([c for _, c, _ in tables], ignore_index=True) if len(tables) > 1 else tables[0][1]
    per_row = np.concatenate([np.full(len(c), str(f.path), dtype=object) for f, c, _ in tables])
    return LogTable(cells=cells, lines=np.concatenate([line for _, _, line in tables]), files=per_row,
                    sources=tuple(str(f.path) for f in files), warnings=tuple(dict.fromkeys(warnings)))


def _with_ids(cells: pd.DataFrame, file: LogFile, warnings: list[str]) -> pd.DataFrame:
    """Return a file's cells with its missing-value texts emptied and a column per id of its name."""
    if file.missing:
        cells = cells.mask(cells.isin(file.missing), "")
    for canon, value in file.ids.items():
        if canon in cells.columns and not cells[canon].astype(str).eq(value).all():
            warnings.append(f"column {canon!r} of the files was replaced by the {canon} their names give")
        cells = cells.assign(**{canon: value})
    return cells


def _column_sets(tables: list[tuple[LogFile, pd.DataFrame, np.ndarray]],
                 wanted: Sequence[str]) -> tuple[list[Problem], list[str]]:
    """Return a problem per file that lacks a read column another file has, and a warning for other differences."""
    if len(tables) < 2:
        return [], []
    sets = [set(map(str, c.columns)) for _, c, _ in tables]
    union = set().union(*sets)
    read = {w.strip().casefold() for w in wanted}
    problems, unread = [], set()
    for (file, _, _), cols in zip(tables, sets):
        lacking = sorted(union - cols)
        needed = [c for c in lacking if c.strip().casefold() in read]
        unread |= set(lacking) - set(needed)
        if needed:
            other = next(str(f.path) for (f, _, _), s in zip(tables, sets) if needed[0] in s)
            problems.append(Problem(f"this file lacks {_names(needed, 'column')}, which {other} has; the files "
                                    "of one log share the columns foretell reads: add the column, or read "
                                    "these files as separate logs", str(file.path), 1))
    warnings = [f"the files differ in {_names(sorted(unread), 'column')}, which foretell does not read"] \
        if unread else []
    return problems, warnings


def _names(items, what: str = "") -> str:
    """Return the first few names, quoted, and how many more ("'a', 'b' and 3 more")."""
    items = [getattr(i, "name", i) for i in items]
    head = (what + ("s " if len(items) > 1 else " ")) if what else ""
    more = f" and {len(items) - _SHOW} more" if len(items) > _SHOW else ""
    return head + ", ".join(map(repr, items[:_SHOW])) + more
