"""Checking a response log's cells against its task: every problem with its file line and column."""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from decimal import Decimal, InvalidOperation
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from pandas.api.types import is_bool_dtype, is_float_dtype, is_integer_dtype, is_numeric_dtype

from .errors import LogError, Problem
from .labels import ALL, MAX_LABEL_LENGTH
from .logcolumns import resolve_columns
from .text import plural

if TYPE_CHECKING:
    from .tasks import Task

RT_UNITS = {"s": 1, "ms": 1000}
"""The units an rt column may be read in, as how many make a second (the column is divided by it,
so whole milliseconds give exactly the seconds they are: 523 ms reads as 0.523 s)."""
MAX_INTEGER = 2**53 - 1
"""The largest session, block or trial number accepted (the largest integer a float holds exactly)."""
MS_SUSPECT = 20.0
"""A median RT above this many seconds is almost surely in milliseconds."""

_MISSING_NUMBER = {"", "na", "nan", "n/a", "null", "none"}
_SHOW_LINES = 5
_SHOW_LABELS = 10
_SHOW_CHARS = 40
_S_SUSPECT = 0.02  # a median RT below this many seconds (after ms -> s) was almost surely in s


def check_cells(cells: pd.DataFrame, lines: np.ndarray, task: Task, source: str,
                columns: Mapping[str, str], rt_unit: str, fix_labels: bool,
                measures: Sequence[str] = (), files: np.ndarray | None = None
                ) -> tuple[pd.DataFrame, list[str], dict[str, int]]:
    """Return the canonical trial table of a log's cells, or raise LogError with every problem.

    Parameters
    ----------
    cells : pandas.DataFrame
        The log's cells under its own column names.
    lines : numpy.ndarray
        The file line of each row (for the messages).
    task : Task
        The task the stimuli and responses belong to.
    source : str
        The file, or "<frame>" (the first of ``files`` when they are given).
    columns : mapping
        The checked column map (:func:`foretell.logcolumns.check_column_map`).
    rt_unit : str
        A key of :data:`RT_UNITS`.
    fix_labels : bool
        Whether labels (and ids) that differ only by stray spaces or letter
        case are fixed (and reported) rather than refused.
    measures : sequence of str
        Other numeric columns to carry over.
    files : numpy.ndarray, optional
        The file of each row, when the rows come from several files: then
        every problem names its row's file, and a participant and session
        found in two files is a problem.

    Returns
    -------
    (pandas.DataFrame, list of str, dict)
        The trial table sorted by participant, session, block and trial
        (described in :class:`foretell.logs.ValidatedLog`, without the RT
        screen's columns); the warnings; participant -> rows whose labels
        were fixed.

    Raises
    ------
    LogError
        Listing every problem, each with file, line and column.
    """
    if len(cells) == 0:
        raise LogError(Problem("the log has a header but no data rows", source, 1))
    check = _Checker(source, lines, files)
    cells = cells.reset_index(drop=True)
    name, problems, warnings = resolve_columns(list(cells.columns), columns, source, measures)
    check.problems += problems
    check.warnings += warnings
    values = _read_columns(check, cells, name, task, fix_labels, measures)
    rt = values.get("rt", np.full(len(cells), np.nan)) / RT_UNITS[rt_unit]
    if "rt" in name:
        check.flag(rt < 0, name["rt"], "rt is negative")
    _cross_checks(check, values, name)
    if check.problems:
        raise LogError(sorted(check.problems, key=lambda p: (p.line is None, p.line or 0)))
    frame, fixed_rows = _frame(values, rt, task, measures)
    _read_warnings(check, frame, name, rt_unit)
    order = np.lexsort((frame["trial"], frame["block"], frame["session"], values["participant"]))
    frame = frame.iloc[order].reset_index(drop=True)
    if task.has_source:
        _impossible_warnings(check, frame, order, task)
    labels_fixed = {str(p): int(n) for p, n in
                    pd.Series(fixed_rows).groupby(values["participant"]).sum().items() if n}
    return frame, check.warnings, labels_fixed


def _read_columns(check: _Checker, cells: pd.DataFrame, name: dict[str, str], task: Task,
                  fix_labels: bool, measures: Sequence[str]) -> dict[str, object]:
    """Return each column's checked values by canonical name (None where a column has problems)."""
    def col(canon: str) -> pd.Series:
        return cells[name[canon]]

    values: dict[str, object] = {}
    for canon in ("participant", "group"):
        if canon in name:
            values[canon] = check.ids(col(canon), name[canon], canon, fix_labels)
    values["session"] = (check.integers(col("session"), name["session"], "session") if "session" in name
                         else np.ones(len(cells), dtype=np.int64))
    for canon in ("block", "trial"):
        if canon in name:
            values[canon] = check.integers(col(canon), name[canon], canon)
    for canon, missed in (("stimulus", False), ("response", True)):
        if canon in name:
            values[canon] = check.labels(col(canon), name[canon], task, fix_labels, allow_missed=missed)
    for canon in ("rt", "onset", "reveal_onset"):
        if canon in name:
            values[canon] = check.numbers(col(canon), name[canon], canon)[0]
    for m in measures:
        if m not in cells.columns:
            check.problems.append(Problem(f"missing measure column '{m}'; the log has "
                                          f"{', '.join(map(repr, map(str, cells.columns)))}",
                                          check.source, 1, m))
        else:
            values[m] = check.numbers(cells[m], m, m)[0]
    return values


def _cross_checks(check: _Checker, values: dict[str, object], name: dict[str, str]) -> None:
    """Flag what involves several columns: reveal before prompt, reserved ids, groups, trial order."""
    if "onset" in values and "reveal_onset" in values:
        check.flag(values["reveal_onset"] < values["onset"], name["reveal_onset"],
                   f"reveal_onset is before onset ('{name['onset']}'): the stimulus is revealed "
                   "after the guess prompt")
    part, group = values.get("participant"), values.get("group")
    for ids, canon in ((part, "participant"), (group, "group")):
        if ids is not None:
            check.flag(pd.Series(ids).eq(ALL).to_numpy(), name[canon],
                       f"the {canon} id '{ALL}' is reserved: output tables use it for everyone; "
                       "rename it")
    if part is not None and group is not None:
        first = pd.Series(group).groupby(part).transform("first").to_numpy()
        check.flag(group != first, name["group"], "participant is in more than one group (a group "
                   "is between participants; use session or block within a participant)")
    if part is not None and values["session"] is not None:
        if check.files is None or not _check_files(check, part, values["session"], name):
            _check_order(check, part, values["session"], values, name)


def _frame(values: dict[str, object], rt: np.ndarray, task: Task,
           measures: Sequence[str]) -> tuple[pd.DataFrame, np.ndarray]:
    """Return the canonical trial table (in file order) and the rows whose labels were fixed."""
    stimulus, stim_fixed = values["stimulus"]
    response, resp_fixed = values["response"]
    missed = response == ""
    index = {s: i for i, s in enumerate(task.symbols)}
    data = {"participant": pd.array(values["participant"], dtype="str")}
    if "group" in values:
        data["group"] = pd.array(values["group"], dtype="str")
    data |= {"session": values["session"], "block": values["block"], "trial": values["trial"],
             "stimulus": pd.array(stimulus, dtype="str"),
             "response": pd.array(np.where(missed, None, response), dtype="str"), "rt": rt}
    data |= {c: values[c] for c in ("onset", "reveal_onset") if c in values}
    data |= {m: values[m] for m in measures}
    data |= {"stimulus_idx": np.array([index[s] for s in stimulus], dtype=np.int64),
             "response_idx": np.array([index.get(r, -1) for r in response], dtype=np.int64),
             "missed": missed}
    return pd.DataFrame(data), stim_fixed | resp_fixed


def _check_order(check: _Checker, part: np.ndarray, session: np.ndarray,
                 ints: Mapping[str, object], name: dict[str, str]) -> None:
    """Flag repeated (participant, session, block, trial) rows, and blocks that decrease in file order."""
    keys = [pd.Series(part), pd.Series(session)]
    if ints.get("trial") is not None and ints.get("block") is not None:
        repeat = pd.DataFrame({"p": part, "s": session, "b": ints["block"],
                               "t": ints["trial"]}).duplicated().to_numpy()
        check.flag(repeat, name["trial"], "trial number repeats an earlier trial of the same "
                   "participant, session and block")
    if ints.get("block") is not None:
        block = pd.Series(ints["block"])
        check.flag((block.groupby(keys, sort=False).diff() < 0).to_numpy(), name["block"],
                   "block number decreases within a participant and session (blocks are rest "
                   "breaks and only count up)")


def _check_files(check: _Checker, part: np.ndarray, session: np.ndarray, name: dict[str, str]) -> bool:
    """Flag a participant and session whose rows come from two or more files, at the first row of each later file.

    Returns whether any was flagged (then the trial order is not checked:
    its problems would only repeat this one).
    """
    keys = pd.DataFrame({"p": part, "s": session, "f": check.files})
    first = keys.groupby(["p", "s"], sort=False)["f"].transform("first").to_numpy()
    later = pd.unique(check.files[first != check.files])
    for f in later:
        rows = np.flatnonzero((check.files == f) & (first != check.files))
        row = rows[0]
        check.problems.append(Problem(
            f"participant {part[row]}, session {session[row]} is also in {first[row]}: two files for "
            "one participant and session; remove one, or tell the sessions apart (a session column, "
            "or {session} in the name pattern)", str(f), int(check.lines[row]), name["participant"]))
    return len(later) > 0


def _read_warnings(check: _Checker, frame: pd.DataFrame, name: dict[str, str], rt_unit: str) -> None:
    """Add the warnings a valid log can still deserve: RTs on missed guesses, no RTs, units."""
    rt = frame["rt"].to_numpy()
    has_rt = ~np.isnan(rt)
    missed_rt = frame["missed"].to_numpy() & has_rt
    if missed_rt.any():
        n = int(missed_rt.sum())
        check.warnings.append(f"column '{name['rt']}': {plural(n, 'missed guess')} "
                              f"{'carries' if n == 1 else 'carry'} an RT, which is ignored "
                              f"({check.at(missed_rt)})")
    if not has_rt.any():
        check.warnings.append("no reaction times in this log: RT analyses will be skipped")
        return
    median = pd.Series(rt[has_rt]).groupby(frame["participant"].to_numpy()[has_rt]).median()
    odd = median[median > MS_SUSPECT] if rt_unit == "s" else median[median < _S_SUSPECT]
    if odd.empty:
        return
    overall = float(np.median(rt[has_rt]))
    if len(odd) == len(median) and rt_unit == "s":
        check.warnings.append(f"column '{name['rt']}': the median RT is {overall:g} s; if the RTs "
                              "are in milliseconds, pass rt_unit='ms' (CLI: --rt-unit ms)")
    elif len(odd) == len(median):
        check.warnings.append(f"column '{name['rt']}': read as milliseconds, the median RT is "
                              f"{overall:g} s; if the RTs are in seconds, drop rt_unit='ms' "
                              "(CLI: --rt-unit)")
    else:
        unit, other = ("seconds", "milliseconds") if rt_unit == "s" else ("milliseconds", "seconds")
        who = ", ".join(map(str, odd.index[:_SHOW_LABELS])) + (
            f" and {len(odd) - _SHOW_LABELS} more" if len(odd) > _SHOW_LABELS else "")
        check.warnings.append(
            f"column '{name['rt']}': {'participant' if len(odd) == 1 else 'participants'} {who} "
            f"{'has a median RT' if len(odd) == 1 else 'have median RTs'} of "
            f"{', '.join(f'{v:g} s' for v in odd.to_numpy()[:_SHOW_LABELS])}, implausible when read "
            f"in {unit} like the others: if their RTs are in {other}, convert them in the log "
            "(the RT unit applies to every participant)")


def _impossible_warnings(check: _Checker, frame: pd.DataFrame, order: np.ndarray, task: Task) -> None:
    """Warn, per participant, about stimuli that the task's source gives probability 0 after their past.

    ``frame`` is sorted by participant, session, block and trial and row
    ``i`` of it is row ``order[i]`` of the log; each session is one sequence.
    The warning names the first such trial's line and context, and how many there are.
    """
    x = frame["stimulus_idx"].to_numpy()
    part = frame["participant"].to_numpy(dtype=object)
    session = frame["session"].to_numpy()
    new = np.ones(len(frame), dtype=bool)
    new[1:] = (part[1:] != part[:-1]) | (session[1:] != session[:-1])
    starts = np.flatnonzero(new)
    found: dict[str, list] = {}
    for a, b in zip(starts, np.r_[starts[1:], len(frame)]):
        bad = task.impossible(x[a:b])
        if bad.size and part[a] not in found:
            context = task.context_indices(x[a:b])[bad[0]]
            found[part[a]] = [a + bad[0], task.context_label(task.contexts[context]), 0]
        if bad.size:
            found[part[a]][2] += bad.size
    for p, (row, context, n) in list(found.items())[:_SHOW_LABELS]:
        check.warnings.append(
            f"participant {p}: stimulus {task.symbols[x[row]]!r} on {check.place(order[row])} has probability 0 "
            f"under task {task.name!r} after context {context!r} ({plural(int(n), 'such trial')}); "
            "check that the log belongs to this task")
    if len(found) > _SHOW_LABELS:
        check.warnings.append(f"and {plural(len(found) - _SHOW_LABELS, 'more participant')} with "
                              f"stimuli of probability 0 under task {task.name!r}")

class _Checker:
    """Collects the problems and warnings of one log; rows are reported by file line."""

    def __init__(self, source: str, lines: np.ndarray, files: np.ndarray | None = None) -> None:
        self.source = source
        self.lines = lines
        self.files = None if files is None else np.asarray(files, dtype=object)
        self.problems: list[Problem] = []
        self.warnings: list[str] = []

    def file(self, row: int) -> str:
        """Return the file of a row."""
        return self.source if self.files is None else str(self.files[row])

    def place(self, row: int) -> str:
        """Return 'line 4', or 'line 4 of s01.csv' when the rows come from several files."""
        return f"line {self.lines[row]}" + ("" if self.files is None else f" of {self.files[row]}")

    def at(self, mask: np.ndarray) -> str:
        """Return 'line 4', 'lines 4, 9, 12 and 3 more' (or, across files, 'lines 4 of a.csv, 2 of b.csv') for ``mask``."""
        rows = np.flatnonzero(mask)
        shown = rows[:_SHOW_LINES]
        more = f" and {rows.size - _SHOW_LINES} more" if rows.size > _SHOW_LINES else ""
        if self.files is None or len(set(self.files[shown])) == 1:
            listed = ", ".join(str(n) for n in self.lines[shown])
            where = "" if self.files is None else f" of {self.files[shown[0]]}"
            return f"{'line' if rows.size == 1 else 'lines'} {listed}{more}{where}"
        return "lines " + ", ".join(f"{self.lines[r]} of {self.files[r]}" for r in shown) + more

    def flag(self, mask: np.ndarray, column: str | None, message: str) -> bool:
        """Add one problem at the first row in ``mask``, listing the others; return whether any."""
        rows = np.flatnonzero(mask)
        if rows.size:
            listed = f" ({self.at(mask)})" if rows.size > 1 else ""
            self.problems.append(Problem(message + listed, self.file(rows[0]),
                                         int(self.lines[rows[0]]), column))
        return bool(rows.size)

    def numbers(self, values: pd.Series, column: str, what: str) -> tuple[np.ndarray, np.ndarray]:
        """Return the cells as floats (NaN = empty or bad) and the mask of bad cells.

        Empty cells and the tokens NA, NaN, N/A, null, None (any case) are empty;
        anything else that is not a finite number is a problem.
        """
        if is_numeric_dtype(values) and not is_bool_dtype(values):
            num = np.array(values.to_numpy(dtype=float, na_value=np.nan))
            bad = np.isinf(num)
        else:
            text = [t.strip() for t in _text(values)]
            empty = np.array([t.lower() in _MISSING_NUMBER for t in text], dtype=bool)
            num = np.array(pd.to_numeric(pd.Series(np.where(empty, "nan", text), dtype=object),
                                         errors="coerce"), dtype=float)
            bad = ~empty & ~np.isfinite(num)
        num[bad] = np.nan
        if bad.any():
            example = str(values.iloc[int(np.flatnonzero(bad)[0])]).strip()
            self.flag(bad, column, f"{what} must be a number, got {_shown(example)}"
                                   f"{_comma_hint(example, whole=False)}")
        return num, bad

    def integers(self, values: pd.Series, column: str, what: str) -> np.ndarray | None:
        """Return the cells as int64, or None when some cell is empty, not whole or too large.

        Whole numbers are read exactly (never through a float), so that a
        number too large for float or int64 is refused instead of rounded or
        wrapped; "3.0" and "1e3" are whole. Magnitudes of 2**53 and beyond are
        refused (:data:`MAX_INTEGER`).
        """
        too_large = f"{what} number too large: {what} numbers must be below 2**53 in magnitude"
        if is_integer_dtype(values) and not values.isna().any():
            raw = values.to_numpy()
            if self.flag((raw > MAX_INTEGER) | (raw < -MAX_INTEGER), column, too_large):
                return None
            return raw.astype(np.int64)
        if is_float_dtype(values):  # whole floats below 2**53 are exact; the rest read as text
            num = values.to_numpy(dtype=float, na_value=np.nan)
            plain = np.isfinite(num) & (num == np.round(num)) & (np.abs(num) <= MAX_INTEGER)
            out = np.where(plain, num, 0.0).astype(np.int64)
            text = np.full(len(num), "", dtype=object)
            for i in np.flatnonzero(~plain & ~np.isnan(num)):
                text[i] = repr(float(num[i]))
        else:
            text = np.array([t.strip() for t in _text(values)], dtype=object)
            plain = pd.Series(text, dtype=object).str.fullmatch(r"[+-]?\d{1,15}").to_numpy(dtype=bool)
            out = np.zeros(len(text), dtype=np.int64)
            out[plain] = np.array(text[plain].tolist(), dtype=np.int64) if plain.any() else 0
        empty, bad, fraction, big = (np.zeros(len(text), dtype=bool) for _ in range(4))
        for i in np.flatnonzero(~plain):
            value = _exact_number(text[i])
            if text[i].lower() in _MISSING_NUMBER:
                empty[i] = True
            elif value is None:
                bad[i] = True
            elif value.copy_abs() > MAX_INTEGER:
                big[i] = True
            elif value != value.to_integral_value():
                fraction[i] = True
            else:
                out[i] = int(value)
        if bad.any():
            example = text[int(np.flatnonzero(bad)[0])]
            self.flag(bad, column, f"{what} must be a number, got {_shown(example)}"
                                   f"{_comma_hint(example, whole=True)}")
        self.flag(empty, column, f"{what} is empty")
        self.flag(fraction, column, f"{what} must be a whole number")
        self.flag(big, column, too_large)
        return None if (bad | empty | fraction | big).any() else out

    def ids(self, values: pd.Series, column: str, what: str, fix: bool) -> np.ndarray | None:
        """Return the cells as id strings, or None when some are empty, too long, carry stray
        spaces or hold a control character (the length limit is :data:`foretell.labels.MAX_LABEL_LENGTH`)."""
        text = _text(values)
        stripped = np.array([t.strip() for t in text], dtype=object)
        ok = not self.flag(_equals(stripped, ""), column, f"{what} is empty")
        length = np.array([len(t) for t in stripped], dtype=np.int64)
        if self.flag(length > MAX_LABEL_LENGTH, column,
                     f"{what} id is {int(length.max())} characters long: ids name output files "
                     f"(e.g. events files), so they may hold at most {MAX_LABEL_LENGTH} characters"):
            ok = False
        hidden = [_hidden_character(t) for t in stripped]
        found = np.array([h is not None for h in hidden], dtype=bool)
        if found.any():
            ok = False
            self.flag(found, column, f"{what} id holds the control character "
                                     f"{hidden[int(np.flatnonzero(found)[0])]}: ids are written "
                                     "into every output table; remove it")
        spaced = (stripped != text) & ~_equals(stripped, "")
        if spaced.any() and fix:
            self.warnings.append(f"column '{column}': stray spaces removed from {what} ids "
                                 f"({self.at(spaced)})")
        elif spaced.any():
            ok = False
            self.flag(spaced, column, f"{what} id has stray spaces; pass fix_labels=True "
                                      f"(CLI: --fix-labels) to strip them")
        return stripped if ok else None

    def labels(self, values: pd.Series, column: str, task: Task, fix: bool,
               allow_missed: bool) -> tuple[np.ndarray, np.ndarray] | None:
        """Return the cells as task symbols ('' = missed) and the rows whose label was fixed.

        None when some label is unknown, or needs a fix that was not asked for.
        """
        text = _text(values)
        symbols = list(task.symbols)
        targets = symbols + ([""] if allow_missed else [])
        out = text.copy()
        fixed = np.zeros(len(text), dtype=bool)
        ok = True
        unknown: list[str] = []
        for raw in pd.unique(text):
            if raw in targets:
                continue
            rows = _equals(text, raw)
            match, why = _fix_of(raw, targets)
            if match is None:
                unknown.append(raw)
                continue
            if not fix:
                ok = False
                self.flag(rows, column, f"label {raw!r} differs from "
                          f"{_show_target(match)} only by {why}; pass fix_labels=True "
                          f"(CLI: --fix-labels) to read it as such")
                continue
            out[rows] = match
            fixed |= rows
            self.warnings.append(f"column '{column}': label {raw!r} read as "
                                 f"{_show_target(match)} ({why}; {self.at(rows)})")
        if "" in unknown:
            self.flag(_equals(text, ""), column, "empty cell: every trial reveals a symbol")
            unknown.remove("")
        for raw in [u for u in unknown if _hidden_character(u) is not None]:
            self.flag(_equals(text, raw), column, f"label {_shown(raw)} holds the control character "
                                                  f"{_hidden_character(raw)}; remove it")
            unknown.remove(raw)
            ok = False
        for raw in unknown[:_SHOW_LABELS]:
            hint = "; an empty cell marks a missed guess" if allow_missed else ""
            self.flag(_equals(text, raw), column, f"unknown symbol {_shown(raw)}: task '{task.name}' "
                                                  f"has {', '.join(symbols)}{hint}")
        if len(unknown) > _SHOW_LABELS:
            more = plural(len(unknown) - _SHOW_LABELS, "more unknown symbol")
            self.problems.append(Problem(f"and {more}", self.source, None, column))
        return (out, fixed) if ok and not unknown else None


def _equals(text: np.ndarray, value: str) -> np.ndarray:
    """Return the mask of the cells equal to ``value``, exactly.

    Not ``text == value``: NumPy turns the string into a fixed-width scalar
    that drops trailing NUL characters, so "a\\x00" would equal "a".
    """
    return pd.Series(text, dtype=object).eq(value).to_numpy(dtype=bool)


def _text(values: pd.Series) -> np.ndarray:
    """Return the cells as an object array of strings, '' for missing cells."""
    return np.array(["" if _is_missing(v) else str(v) for v in values], dtype=object)


def _exact_number(text: str) -> Decimal | None:
    """Return the exact value of a number cell ("12", "3.0", "1e19"), None when it is no finite number.

    :class:`decimal.Decimal` keeps every digit, so no large value is rounded
    and no long one is expanded before it is compared.
    """
    try:
        value = Decimal(text)
    except InvalidOperation:
        return None
    return value if value.is_finite() else None


def _hidden_character(text: str) -> str | None:
    """Return the first control or other non-printing character of ``text`` as "U+0000", else None."""
    for ch in text:
        if not ch.isprintable():
            return f"U+{ord(ch):04X}"
    return None


def _is_missing(value: object) -> bool:
    """Return whether a cell holds None, NA or NaN."""
    return value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value))


def _fix_of(raw: str, targets: list[str]) -> tuple[str | None, str]:
    """Return the one target that ``raw`` matches up to spaces and case, and why it differs."""
    stripped = raw.strip()
    if stripped in targets:
        return stripped, "stray spaces"
    folded = [t for t in targets if t.casefold() == stripped.casefold()]
    if len(folded) != 1:
        return None, ""
    return folded[0], "letter case" if stripped == raw else "stray spaces and letter case"


def _show_target(target: str) -> str:
    """Return how a message names a label's target: a symbol, or a missed guess."""
    return f"the task's symbol {target!r}" if target else "an empty cell (a missed guess)"


def _shown(text: str) -> str:
    """Return ``text`` quoted for a message, cut to its first characters when long."""
    return repr(text) if len(text) <= _SHOW_CHARS else f"{text[:_SHOW_CHARS]!r}... ({len(text)} characters)"


def _comma_hint(example: str, whole: bool) -> str:
    """Return the hint for a number written with a comma: a thousands separator or a decimal comma."""
    if re.fullmatch(r"[+-]?\d{1,3}(,\d{3})+", example):
        if whole:
            return "; the comma looks like a thousands separator: write whole numbers without one"
        return ("; the comma looks like a thousands separator (write 1001) or a decimal comma "
                "(write 1.001): write numbers without thousands separators and with a decimal point")
    if re.fullmatch(r"[+-]?\d*,\d+", example):
        return "; use a decimal point, not a comma"
    return ""


