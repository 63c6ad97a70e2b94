"""Lab profiles: a small TOML file, written once, that says how a lab's own files become foretell's trial table."""

from __future__ import annotations

import difflib
import json
import math
import re
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import InputError, LogError, Problem, UsageError
from .logcheck import RT_UNITS
from .logcolumns import CANONICAL, check_column_map
from .logsets import name_regex
from .taskfile import _toml_error_line
from .text import plural

KEYS = {
    "columns": "[columns]: foretell's column = your column, e.g. response = \"key_resp.keys\"",
    "rt_unit": "\"s\" or \"ms\": the unit of your rt column",
    "values": "[values.<column>]: your value = foretell's (a task symbol, or a session number)",
    "no_response": "cells of the response and rt columns that mean no response, e.g. [\"None\", \"-1\"]",
    "zero_based": "counters that start at 0 (session, block, trial): foretell adds 1",
    "drop": "[[drop]] column = \"...\", values = [...]: leave out the rows whose cell is one of the values",
    "keep": "[[keep]] column = \"...\", values = [...]: read only the rows whose cell is one of the values",
    "name_pattern": "ids from file names, e.g. \"{participant}_ses-{session}_*.csv\"",
    "fix_labels": "true: read labels that differ from a task symbol only by spaces or letter case",
    "sheet": "the sheet of a spreadsheet (its name, or its number from 0; default the first)",
    "bids": "[bids] files = \"beh\" or \"events\", task = \"<label>\": what to read from a BIDS dataset",
}
"""The keys of a profile and what each holds (the README's "Lab profiles" documents the same)."""
VALUE_COLUMNS = ("participant", "group", "session", "stimulus", "response")
"""The canonical columns a profile may map values of."""
COUNTERS = ("session", "block", "trial")
"""The canonical columns a profile may read as counting from 0."""
RULE_KEYS = ("column", "values")
BIDS_KEYS = ("files", "task")
BIDS_FILES = ("beh", "events")
_HEADER = re.compile(r"\s*\[\[?\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_ASSIGN = re.compile(r"\s*(\"[^\"]*\"|'[^']*'|[A-Za-z0-9_-]+)\s*=")


@dataclass(frozen=True)
class RowRule:
    """Rows to leave out by a column's value (``keep``: read only the rows whose value is listed)."""

    column: str
    values: tuple[str, ...]
    keep: bool = False


@dataclass(frozen=True, eq=False)
class Profile:
    """How a lab's files become foretell's trial table; build one with :func:`load_profile` or :func:`as_profile`.

    Attributes
    ----------
    columns : mapping of str to str
        Canonical column -> the lab's column.
    rt_unit : str or None
        "s" or "ms" (None: not said; seconds unless the caller says otherwise).
    values : mapping of str to mapping of str to str
        Canonical column -> {the lab's value: foretell's value}.
    no_response : tuple of str
        Cells of the response and rt columns that mean no response.
    zero_based : tuple of str
        Canonical counters that start at 0 (1 is added).
    rows : tuple of RowRule
        The ``[[drop]]`` and ``[[keep]]`` rules, in file order.
    name_pattern, sheet, bids_files, bids_task : str or None
    fix_labels : bool or None
    path : str or None
        The profile file, for messages.
    """

    columns: Mapping[str, str] = field(default_factory=dict)
    rt_unit: str | None = None
    values: Mapping[str, Mapping[str, str]] = field(default_factory=dict)
    no_response: tuple[str, ...] = ()
    zero_based: tuple[str, ...] = ()
    rows: tuple[RowRule, ...] = ()
    name_pattern: str | None = None
    fix_labels: bool | None = None
    sheet: str | int | None = None
    bids_files: str | None = None
    bids_task: str | None = None
    path: str | None = None
    text: str | None = field(default=None, repr=False)

    @property
    def name(self) -> str:
        """Return how messages call the profile: its file, or "the profile"."""
        return self.path or "the profile"

    def apply(self, cells: pd.DataFrame, lines: np.ndarray, files: np.ndarray, columns: Mapping[str, str],
              symbols: Sequence[str]) -> tuple[pd.DataFrame, np.ndarray, np.ndarray, list[str]]:
        """Return the cells with the profile's rows left out and values read, and what was mapped.

        In order: the ``[[drop]]`` and ``[[keep]]`` rules, the no-response
        codes (response and rt), the value maps, the zero-based counters.

        Parameters
        ----------
        cells : pandas.DataFrame
            The lab's cells under their own column names.
        lines, files : numpy.ndarray
            The file line and the file of each row.
        columns : mapping of str to str
            The column map in force (the profile's with the caller's on top).
        symbols : sequence of str
            The task's symbols: every value map of stimulus or response must give one.

        Returns
        -------
        (pandas.DataFrame, numpy.ndarray, numpy.ndarray, list of str)
            The cells, lines and files of the rows kept, and one plain line
            per thing mapped (for ``foretell check --profile``).

        Raises
        ------
        LogError
            A rule's column that the log lacks, a value with no entry in its
            value map (naming file, line and column), a value map that gives
            something other than a task symbol (naming the profile's line).
        """
        if not (self.rows or self.no_response or self.values or self.zero_based):
            return cells, lines, files, []
        problems = self._target_problems(symbols)
        report: list[str] = []
        keep = np.ones(len(cells), dtype=bool)
        for k, rule in enumerate(self.rows):
            column = _column_of(cells, rule.column)
            if column is None:
                problems.append(Problem(f"the profile's [[{'keep' if rule.keep else 'drop'}]] rule reads column "
                                        f"{rule.column!r}, which the log does not have", self.path,
                                        self._line(("keep" if rule.keep else "drop", k + 1, "column")), "column"))
                continue
            hit = _texts(cells[column]).isin(rule.values).to_numpy()
            out = keep & (~hit if rule.keep else hit)
            keep &= ~out
            listed = ", ".join(repr(v) for v in rule.values)
            report.append(f"{plural(int(out.sum()), 'row')} left out: {column!r} "
                          f"{'is none of' if rule.keep else 'is'} {listed}")
        if problems:
            raise LogError(problems)
        cells, lines, files = cells[keep].reset_index(drop=True).copy(), lines[keep], files[keep]
        report += self._no_response(cells, columns)
        problems += self._map_values(cells, lines, files, columns, report)
        if problems:
            raise LogError(problems)
        for canon in self.zero_based:
            column = _column_of(cells, columns.get(canon, canon))
            if column is not None:
                cells[column] = [_plus_one(v) for v in cells[column]]
                report.append(f"{canon} ({column!r}) counted from 0: 1 added")
        return cells, lines, files, report

    def _no_response(self, cells: pd.DataFrame, columns: Mapping[str, str]) -> list[str]:
        """Empty the response and rt cells that hold a no-response code; return what was done."""
        report = []
        for canon in ("response", "rt"):
            column = _column_of(cells, columns.get(canon, canon)) if self.no_response else None
            if column is None:
                continue
            hit = _texts(cells[column]).isin(self.no_response).to_numpy()
            cells.loc[hit, column] = ""
            if hit.any():
                report.append(f"{plural(int(hit.sum()), 'cell')} of {column!r} read as no response "
                              f"({', '.join(map(repr, self.no_response))})")
        return report

    def _map_values(self, cells: pd.DataFrame, lines: np.ndarray, files: np.ndarray,
                    columns: Mapping[str, str], report: list[str]) -> list[Problem]:
        """Read every value map's column through its map; return a problem per value it has no entry for."""
        problems = []
        for canon, mapping in self.values.items():
            column = _column_of(cells, columns.get(canon, canon))
            if column is None:
                continue
            text = _texts(cells[column])
            present = text.ne("").to_numpy()
            unknown = present & ~text.isin(list(mapping)).to_numpy()
            for value in pd.unique(text[unknown])[:10]:
                rows = np.flatnonzero(text.eq(value).to_numpy())
                more = f" and {plural(rows.size - 1, 'more row')}" if rows.size > 1 else ""
                problems.append(Problem(
                    f"value {value!r} has no entry in the value map of {canon} ([values.{canon}] in "
                    f"{self.name}){more}: add {toml_key(value)} = \"...\" there (or list it in "
                    "no_response if it means no response)", str(files[rows[0]]), int(lines[rows[0]]), column))
            cells[column] = np.where(present, text.map(mapping).fillna(text), "").astype(object)
            counts = text[present].value_counts(sort=False)
            report.append(f"{canon} ({column!r}): " + ", ".join(
                f"{v!r} -> {mapping[v]!r} ({plural(int(counts.get(v, 0)), 'row')})" for v in mapping))
        return problems

    def _target_problems(self, symbols: Sequence[str]) -> list[Problem]:
        """Return a problem per stimulus or response value map entry that gives no task symbol."""
        return [Problem(f"the value map of {canon} reads {theirs!r} as {ours!r}, which is not a symbol of the "
                        f"task ({', '.join(symbols)})", self.path, self._line(("values", canon, theirs)),
                        f"values.{canon}")
                for canon in ("stimulus", "response") for theirs, ours in self.values.get(canon, {}).items()
                if ours not in symbols]

    def _line(self, key: tuple) -> int | None:
        """Return the line of a key of the profile file (None when unknown)."""
        return _line_of(self.text, key)

    def summary(self, columns: Mapping[str, str], rt_unit: str) -> list[str]:
        """Return the column map and unit as plain lines (the start of what ``check --profile`` reports)."""
        head = [f"profile {self.path}"] if self.path else []
        return head + [f"{canon} <- column {theirs!r}" for canon, theirs in columns.items()] + \
            [f"rt read in {'milliseconds' if rt_unit == 'ms' else 'seconds'}"]


def load_profile(path: str | Path) -> Profile:
    """Return the lab profile of a TOML file.

    Parameters
    ----------
    path : str or pathlib.Path
        The profile (see the README, "Lab profiles", and :data:`KEYS`).

    Returns
    -------
    Profile

    Raises
    ------
    InputError
        A missing or unreadable file, TOML that does not parse, an unknown
        key (with the closest known one), a value of the wrong kind; each
        problem names the file and the line.

    Examples
    --------
    >>> profile = load_profile("examples/profiles/builder-csv.toml")  # doctest: +SKIP
    >>> profile.columns["response"]  # doctest: +SKIP
    'key_resp.keys'
    """
    source = str(path)
    try:
        text = Path(path).read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise InputError("no such profile file", path=source) from None
    except OSError as err:
        raise InputError(f"cannot read the profile: {err.strerror or err}", path=source) from None
    except UnicodeDecodeError:
        raise InputError("not UTF-8 text: a profile is TOML; save it as UTF-8", path=source) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"not valid TOML: {err}", path=source, line=_toml_error_line(str(err))) from None
    return profile_from_dict(data, source, text)


def as_profile(profile: object) -> Profile | None:
    """Return ``profile`` as a :class:`Profile`: a Profile, a profile file, a mapping of its keys, or None.

    Raises
    ------
    InputError
        For a file or mapping that is not a valid profile (see :func:`load_profile`).
    UsageError
        For anything else.
    """
    if profile is None or isinstance(profile, Profile):
        return profile
    if isinstance(profile, (str, Path)):
        return load_profile(profile)
    if isinstance(profile, Mapping):
        return profile_from_dict(profile)
    raise UsageError(f"profile must be a profile file (TOML), a mapping of its keys or a Profile, "
                     f"got {type(profile).__name__}")


def profile_from_dict(data: Mapping[str, Any], path: str | None = None, text: str | None = None) -> Profile:
    """Return the profile of a mapping of its keys (:data:`KEYS`), after checking every key and value.

    Raises
    ------
    InputError
        Listing every problem, each with the key (and, with ``text``, the line).
    """
    problems: list[Problem] = []

    def bad(message: str, *key: str | int) -> None:
        problems.append(Problem(message, path, _line_of(text, key), ".".join(map(str, key))))

    for key in data:
        if key not in KEYS:
            close = difflib.get_close_matches(str(key), list(KEYS), n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            bad(f"unknown profile key {key!r}{hint}; a profile holds {', '.join(KEYS)}", key)
    columns = _columns(data.get("columns", {}), bad)
    rt_unit = data.get("rt_unit")
    if rt_unit is not None and rt_unit not in RT_UNITS:
        bad(f"rt_unit must be one of {', '.join(map(repr, RT_UNITS))}, got {rt_unit!r}", "rt_unit")
    values = _value_maps(data.get("values", {}), bad)
    no_response = tuple(_strings(data.get("no_response", []), "no_response", bad))
    zero_based = tuple(_strings(data.get("zero_based", []), "zero_based", bad))
    for name in zero_based:
        if name not in COUNTERS:
            bad(f"zero_based lists {name!r}; counters are {', '.join(COUNTERS)}", "zero_based")
    rows = _rules(data, bad)
    name_pattern = _optional(data, "name_pattern", str, bad)
    if name_pattern is not None:
        try:
            name_regex(name_pattern)
        except UsageError as err:
            bad(str(err), "name_pattern")
    fix_labels = _optional(data, "fix_labels", bool, bad)
    sheet = _optional(data, "sheet", (str, int), bad)
    bids = data.get("bids", {})
    if not isinstance(bids, Mapping):
        bad("bids must be a table: [bids] files = \"beh\" or \"events\", task = \"<label>\"", "bids")
        bids = {}
    for key in bids:
        if key not in BIDS_KEYS:
            close = difflib.get_close_matches(str(key), BIDS_KEYS, n=1)
            bad(f"unknown key {key!r} in [bids]" + (f" (did you mean '{close[0]}'?)" if close else "")
                + f"; it holds {', '.join(BIDS_KEYS)}", "bids", key)
    if bids.get("files") is not None and bids.get("files") not in BIDS_FILES:
        bad(f"[bids] files must be one of {', '.join(map(repr, BIDS_FILES))}, got {bids.get('files')!r}",
            "bids", "files")
    if problems:
        raise InputError(problems)
    return Profile(columns=columns, rt_unit=rt_unit, values=values, no_response=no_response,
                   zero_based=zero_based, rows=rows, name_pattern=name_pattern, fix_labels=fix_labels,
                   sheet=sheet, bids_files=bids.get("files"), bids_task=bids.get("task"), path=path, text=text)


def _columns(raw: object, bad) -> dict[str, str]:
    """Return the checked column map of a profile (flagging what is wrong)."""
    if not isinstance(raw, Mapping):
        bad("columns must be a table of foretell's column = your column", "columns")
        return {}
    for canon in raw:
        if canon not in CANONICAL:
            close = difflib.get_close_matches(str(canon), CANONICAL, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            bad(f"unknown column {canon!r} in [columns]{hint}; foretell's columns are {', '.join(CANONICAL)}",
                "columns", canon)
    known = {k: v for k, v in raw.items() if k in CANONICAL}
    try:
        return check_column_map(known)
    except UsageError as err:
        bad(str(err), "columns")
        return {}


def _value_maps(raw: object, bad) -> dict[str, dict[str, str]]:
    """Return the checked value maps: canonical column -> {their value: ours}, values as text."""
    if not isinstance(raw, Mapping):
        bad("values must hold one table per column, e.g. [values.response]", "values")
        return {}
    out = {}
    for canon, mapping in raw.items():
        if canon not in VALUE_COLUMNS:
            close = difflib.get_close_matches(str(canon), VALUE_COLUMNS, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            bad(f"no value map for {canon!r}{hint}: values are mapped for {', '.join(VALUE_COLUMNS)}",
                "values", canon)
        elif not isinstance(mapping, Mapping) or not all(isinstance(v, (str, int)) and not isinstance(v, bool)
                                                          for v in mapping.values()):
            bad(f"[values.{canon}] must map your values to text (or session numbers), e.g. f = \"red\"",
                "values", canon)
        else:
            out[canon] = {str(k): str(v) for k, v in mapping.items()}
    return out


def _rules(data: Mapping[str, Any], bad) -> tuple[RowRule, ...]:
    """Return the ``[[drop]]`` and ``[[keep]]`` rules (drop first, then keep)."""
    rules = []
    for kind in ("drop", "keep"):
        raw = data.get(kind, [])
        if not isinstance(raw, list):
            bad(f"{kind} must be an array of tables: [[{kind}]] column = \"...\", values = [...]", kind)
            continue
        for k, rule in enumerate(raw, start=1):
            if not isinstance(rule, Mapping) or not isinstance(rule.get("column"), str) or "values" not in rule:
                bad(f"[[{kind}]] number {k} needs column = \"...\" and values = [...]", kind, k)
                continue
            for key in rule:
                if key not in RULE_KEYS:
                    close = difflib.get_close_matches(str(key), RULE_KEYS, n=1)
                    bad(f"unknown key {key!r} in [[{kind}]]" + (f" (did you mean '{close[0]}'?)" if close else ""),
                        kind, k, key)
            rules.append(RowRule(rule["column"], tuple(_strings(rule["values"], kind, bad, k, "values")),
                                 keep=kind == "keep"))
    return tuple(rules)


def _strings(raw: object, key: str, bad, *more: str | int) -> list[str]:
    """Return a list of texts (whole numbers allowed, as text); flag anything else."""
    if not isinstance(raw, list) or not all(isinstance(v, (str, int)) and not isinstance(v, bool) for v in raw):
        bad(f"{key} must be a list of texts, e.g. [\"None\", \"-1\"]", key, *more)
        return []
    return [str(v) for v in raw]


def _optional(data: Mapping[str, Any], key: str, kind: type | tuple[type, ...], bad) -> Any:
    """Return ``data[key]`` when it is of ``kind`` (None when absent); flag it otherwise."""
    value = data.get(key)
    if value is not None and (not isinstance(value, kind) or (kind is not bool and isinstance(value, bool))):
        bad(f"{key} has the wrong kind of value: {value!r}", key)
        return None
    return value


def _column_of(cells: pd.DataFrame, name: str) -> str | None:
    """Return the column of ``cells`` called ``name`` (else the one that matches it up to spaces and case)."""
    header = [str(c) for c in cells.columns]
    if name in header:
        return name
    loose = [c for c in header if c.strip().casefold() == name.strip().casefold()]
    return loose[0] if len(loose) == 1 else None


def _texts(values: pd.Series) -> pd.Series:
    """Return cells as the text a profile matches: '' for empty, whole numbers without '.0'."""
    return pd.Series([cell_text(v) for v in values], index=values.index, dtype=object)


def cell_text(value: object) -> str:
    """Return a cell as the text a profile matches ('' when empty; 3.0 as '3')."""
    if value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value)):
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def _plus_one(value: object) -> object:
    """Return a counter cell plus one when it holds a whole number ("3", "3.0"; else as it is, for the checks to name)."""
    text = cell_text(value).strip()
    if not re.fullmatch(r"[+-]?\d{1,15}(\.0*)?", text):
        return value
    return str(int(text.split(".")[0]) + 1)


def toml_key(value: str) -> str:
    """Return ``value`` as a TOML key: bare when it can be, else a quoted string."""
    return value if re.fullmatch(r"[A-Za-z0-9_-]+", value) else json.dumps(value, ensure_ascii=False)


def _line_of(text: str | None, key: tuple) -> int | None:
    """Return the line where a key path is set or its table opens (None when not found).

    ``key`` is a path such as ("rt_unit",), ("columns", "response"),
    ("values", "response", "f") or ("drop", 2, "column") (the second
    ``[[drop]]`` table).
    """
    if not text or not key:
        return None
    names = [str(k) for k in key if not isinstance(k, int)]
    index = next((k for k in key if isinstance(k, int)), None)
    table, last, full = ".".join(names[:-1]), names[-1], ".".join(names)
    current, counts = "", {}
    for n, line in enumerate(text.splitlines(), start=1):
        header = _HEADER.match(line)
        if header:
            current = ".".join(part.strip().strip("\"'") for part in header.group(1).split("."))
            counts[current] = counts.get(current, 0) + 1
            if (current == full or current.startswith(full + ".")) and index in (None, counts[current]):
                return n
            continue
        assign = _ASSIGN.match(line)
        if assign and current == table and assign.group(1).strip("\"'") == last \
                and index in (None, counts.get(current)):
            return n
    return None
