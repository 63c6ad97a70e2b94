"""Response logs: reading, validating and reaction-time screening of trial tables."""

from __future__ import annotations

import csv
import difflib
import io
import math
import re
from dataclasses import dataclass, field, replace
from decimal import Decimal, InvalidOperation
from pathlib import Path
from typing import TYPE_CHECKING, Mapping, Sequence

import numpy as np
import pandas as pd
from pandas.api.types import (is_bool_dtype, is_float_dtype, is_integer_dtype,
                              is_numeric_dtype)

from .errors import LogError, Problem, UsageError
from .labels import ALL
from .text import plural

if TYPE_CHECKING:
    from .tasks import Task

CANONICAL = ("participant", "group", "session", "block", "trial", "stimulus",
             "response", "rt", "onset", "reveal_onset")
REQUIRED = ("participant", "block", "trial", "stimulus", "response")
DERIVED = ("stimulus_idx", "response_idx", "missed", "rt_ok", "rt_flag")
RT_FLAGS = ("", "missed", "no-rt", "fast", "slow", "mad")
RT_UNITS = {"s": 1.0, "ms": 1e-3}
MAX_INTEGER = 2**53 - 1
"""The largest session, block or trial number accepted (the largest integer a float holds exactly)."""

_DELIMITER_NAMES = {",": "commas", "\t": "tabs", ";": "semicolons", "|": "vertical bars"}
_DELIMITER_OF_SUFFIX = {".csv": ",", ".tsv": "\t", ".tab": "\t"}
_PARQUET_SUFFIXES = {".parquet", ".pq"}
_SNIFF_LINES = 20
_MISSING_NUMBER = {"", "na", "nan", "n/a", "null", "none"}
_SHOW_LINES = 5
_SHOW_LABELS = 10
_MS_SUSPECT = 20.0  # a median RT above this many seconds is almost surely in ms
_S_SUSPECT = 0.02  # a median RT below this many seconds (after ms -> s) was almost surely in s
_MAD_SCALE = 1.0 / 0.6744897501960817  # 1 / Phi^-1(3/4): MAD -> SD under normality
_IDENTIFYING = re.compile(
    r"(^|_)(first_?|last_?|full_?|sur|fore|given_?|family_?)?name($|_)"
    r"|e_?mail|birth|(^|_)dob($|_)|address|phone|mobile")


@dataclass(frozen=True)
class RTScreen:
    """Limits that decide which reaction times an RT analysis may use (seconds).

    ``floor``: guesses faster than this are premature presses, flagged "fast"
    (common practice: about 0.1-0.15 s); an RT of 0 is always "fast".
    ``ceiling``: guesses slower than this are flagged "slow"; 3 s by default
    (common practice: 2-3 s for prompted responses; slower guesses mostly
    reflect lapses of attention). ``math.inf`` switches it off.
    ``mad_k``: when set, per participant, an RT that passed floor and ceiling
    is flagged "mad" if |log RT - median log RT| > mad_k * MAD, with the scaled
    MAD = 1.4826 * median |log RT - median log RT| (common practice; Leys et
    al., 2013, recommend k = 2.5 to 3). ``None`` switches the rule off.
    """

    floor: float = 0.15
    ceiling: float = 3.0
    mad_k: float | None = None

    def __post_init__(self) -> None:
        if not (math.isfinite(self.floor) and self.floor >= 0):
            raise UsageError(f"RT floor must be a number >= 0 seconds, got {self.floor!r}")
        if not self.ceiling > self.floor:
            raise UsageError(f"RT ceiling ({self.ceiling!r} s) must be above the floor "
                             f"({self.floor!r} s)")
        if self.mad_k is not None and not (math.isfinite(self.mad_k) and self.mad_k > 0):
            raise UsageError(f"MAD factor must be a positive number, got {self.mad_k!r}")

    def __str__(self) -> str:
        mad = ("off" if self.mad_k is None
               else f"beyond {self.mad_k:g} scaled MADs of log RT, per participant")
        return f"RT screen: floor {self.floor:g} s, ceiling {self.ceiling:g} s, MAD rule {mad}"


@dataclass(frozen=True, eq=False)
class ValidatedLog:
    """A response log that passed validation against its task: the trial table and what is known of it.

    ``frame``: one row per trial, the canonical columns present in the log
    (session always; group, onset, reveal_onset only when given) plus
    ``stimulus_idx``, ``response_idx`` (-1 = missed), ``missed``, ``rt_ok`` and
    ``rt_flag`` (one of :data:`RT_FLAGS`); rt in seconds; rows sorted by
    participant, session, block and trial. ``task``: the task it was validated
    against; ``source``: the file (or "<frame>"); ``rt_unit``: the unit the
    log's rt column was read in; ``screen``: the RT screen applied;
    ``read_warnings``: what reading found (personal-data columns, label
    fixes, unit doubts, ...); ``screen_warnings``: what screening found;
    ``labels_fixed``: participant -> number of rows whose labels were fixed.
    """

    frame: pd.DataFrame
    task: Task
    source: str
    rt_unit: str
    screen: RTScreen
    read_warnings: tuple[str, ...] = ()
    screen_warnings: tuple[str, ...] = ()
    labels_fixed: Mapping[str, int] = field(default_factory=dict)

    @property
    def warnings(self) -> tuple[str, ...]:
        """Return every warning: reading first, then screening."""
        return self.read_warnings + self.screen_warnings

    @property
    def participants(self) -> list[str]:
        """Return the participant ids in sorted order."""
        return sorted(self.frame["participant"].unique().tolist())

    def __len__(self) -> int:
        return len(self.frame)


def load_log(path: str | Path, task: Task, columns: Mapping[str, str] | None = None,
             rt_unit: str = "s", fix_labels: bool = False, *,
             screen: RTScreen = RTScreen(), measures: Sequence[str] = ()) -> ValidatedLog:
    """Return the validated, screened log (:class:`ValidatedLog`) of the response log at ``path``.

    CSV (``.csv``), TSV (``.tsv``, ``.tab``) or, for any other extension, text
    whose delimiter (comma, tab, semicolon, vertical bar) is detected; Parquet
    (``.parquet``, ``.pq``) when pyarrow is installed. See :func:`validate_log`
    for ``columns``, ``rt_unit``, ``fix_labels``, ``screen``, ``measures`` and the result.
    Raises LogError listing every problem found, each with file, line, column.
    """
    path = Path(path)
    cells, lines = _read_table(path)
    return _validate(cells, lines, task, str(path), columns, rt_unit, fix_labels, screen, measures)


def validate_log(frame: pd.DataFrame, task: Task, source: str = "<frame>",
                 columns: Mapping[str, str] | None = None, rt_unit: str = "s",
                 fix_labels: bool = False, *, screen: RTScreen = RTScreen(),
                 measures: Sequence[str] = ()) -> ValidatedLog:
    """Return the validated, screened log (:class:`ValidatedLog`) of an in-memory log ``frame``.

    ``columns`` maps canonical names (:data:`CANONICAL`) to the lab's own
    column names, e.g. ``{"response": "guess", "rt": "RT_ms"}``; problems name
    the lab's column. ``rt_unit`` is "s" or "ms". With ``fix_labels``, labels
    that differ from a task symbol only by stray spaces or letter case (and ids
    with stray spaces) are fixed and the fix is reported; otherwise they are
    problems. Row ``i`` of ``frame`` is reported as line ``i + 2``, as if the
    frame were a file with a header line.

    Rules: required columns are participant, block, trial, stimulus, response;
    session defaults to 1. Session, block and trial are whole numbers below
    2**53 in magnitude. Trials are ordered within participant x session by
    block, then trial number, so both common numberings are accepted: trials
    counted through the session (1..600) and trials that restart in every
    block (1..120 in each); within a block the rows may come in any trial
    order. Only a true duplicate (the same participant, session, block and
    trial twice) is refused. Blocks must not decrease down the file within
    participant x session. An empty response is a missed guess (kept, flagged); an empty or
    absent rt is no RT. Ids and labels may not hold control characters.

    ``measures`` names other numeric per-trial columns to carry over (e.g. a
    single-trial EEG amplitude, for :func:`foretell.steps.measures.analyse_rt`); their
    cells must be numbers or empty (NaN).

    The result's ``frame`` is described in :class:`ValidatedLog`; other
    columns of the log are not carried over.
    """
    lines = np.arange(len(frame)) + 2
    return _validate(frame, lines, task, source, columns, rt_unit, fix_labels, screen, measures)


def screen_rt(log: ValidatedLog, screen: RTScreen = RTScreen()) -> ValidatedLog:
    """Return a copy of a validated log with ``rt_ok`` and ``rt_flag`` set by ``screen``.

    Flags, first match wins: "missed" (no guess; any RT ignored), "no-rt",
    "fast" (below the floor), "slow" (above the ceiling), "mad" (the
    per-participant log-RT rule, over the RTs that passed floor and ceiling).
    "" means usable: ``rt_ok`` is ``rt_flag == ""``. No row is ever removed.
    """
    if not isinstance(log, ValidatedLog):
        raise UsageError("screen_rt needs a validated log: use load_log or validate_log first")
    frame = log.frame
    rt = frame["rt"].to_numpy(dtype=float)
    missed = frame["missed"].to_numpy(dtype=bool)
    has_rt = ~missed & ~np.isnan(rt)
    fast = has_rt & ((rt < screen.floor) | (rt <= 0))
    slow = has_rt & ~fast & (rt > screen.ceiling)
    flag = np.full(len(frame), "", dtype=object)
    flag[slow] = "slow"
    flag[fast] = "fast"
    flag[~missed & ~has_rt] = "no-rt"
    flag[missed] = "missed"
    warnings: list[str] = []
    if screen.mad_k is not None:
        mad_out, flat = _mad_outliers(frame["participant"].to_numpy(), rt, flag == "",
                                      screen.mad_k)
        flag[mad_out] = "mad"
        warnings += [f"participant {p}: the MAD of their {plural(n, 'log RT')} is 0, so the MAD "
                     "rule flags none of their trials" for p, n in flat.items()]
    out = frame.copy()
    out["rt_ok"] = flag == ""
    out["rt_flag"] = pd.Series(flag, index=out.index, dtype="str")
    return replace(log, frame=out, screen=screen, screen_warnings=tuple(warnings))


def log_summary(log: ValidatedLog, totals: bool = True) -> pd.DataFrame:
    """Return the validation summary of a validated log, one row per participant.

    Columns: participant, group (NA without a group column), sessions, blocks
    (distinct session x block), trials, missed, missed_with_rt (missed guesses
    that carry an RT, ignored), rt_missing, rt_fast, rt_slow, rt_mad (trials
    flagged by the screen, see :func:`screen_rt`), rt_usable, labels_fixed.
    With ``totals``, a last row with participant "all" sums every count.
    """
    frame = log.frame
    part = frame["participant"]
    flag = frame["rt_flag"]

    def count(mask: pd.Series) -> pd.Series:
        return mask.groupby(part).sum().astype("int64")

    group = (frame.groupby("participant")["group"].first() if "group" in frame.columns
             else pd.Series(pd.NA, index=pd.Index(sorted(part.unique())), dtype="str"))
    fixed = log.labels_fixed
    table = pd.DataFrame({
        "group": group,
        "sessions": frame.groupby("participant")["session"].nunique(),
        "blocks": frame.drop_duplicates(["participant", "session", "block"])
                       .groupby("participant").size(),
        "trials": frame.groupby("participant").size(),
        "missed": count(frame["missed"]),
        "missed_with_rt": count(frame["missed"] & frame["rt"].notna()),
        "rt_missing": count(flag == "no-rt"),
        "rt_fast": count(flag == "fast"),
        "rt_slow": count(flag == "slow"),
        "rt_mad": count(flag == "mad"),
        "rt_usable": count(frame["rt_ok"]),
    })
    table["labels_fixed"] = [int(fixed.get(p, 0)) for p in table.index]
    table = table.rename_axis("participant").reset_index()
    table["participant"] = table["participant"].astype("str")
    if totals:
        counts = table.columns[2:]
        total = pd.DataFrame({"participant": [ALL], "group": [pd.NA],
                              **{c: [table[c].sum()] for c in counts}})
        table = pd.concat([table, total.astype(table.dtypes.to_dict())], ignore_index=True)
    return table


def unscorable(log: ValidatedLog, warmup: int) -> pd.DataFrame:
    """Return the participants none of whose trials can be scored: columns participant, reason.

    A trial is scored when its guess is not missed and it is at position
    ``warmup`` or later of its session (positions count from 0 in the order of
    block and trial; the first ``warmup`` trials of every session are warm-up,
    as in the fits). Reasons: "every guess missed", or "no guess after the
    first {warmup} trials of a session (warm-up)". A participant who always
    guesses the same symbol is scorable.
    """
    if not isinstance(log, ValidatedLog):
        raise UsageError("unscorable needs a validated log: use load_log or validate_log first")
    if isinstance(warmup, bool) or not isinstance(warmup, (int, np.integer)) or warmup < 0:
        raise UsageError(f"warmup must be a whole number of trials >= 0, got {warmup!r}")
    frame = log.frame
    position = frame.groupby(["participant", "session"], sort=False).cumcount().to_numpy()
    guessed = ~frame["missed"].to_numpy(dtype=bool)
    per = pd.DataFrame({"participant": frame["participant"], "guessed": guessed,
                        "scored": guessed & (position >= warmup)}).groupby("participant").any()
    lost = per[~per["scored"]]
    reason = np.where(lost["guessed"], f"no guess after the first {int(warmup)} trials of a "
                      "session (warm-up)", "every guess missed")
    return pd.DataFrame({"participant": pd.array(lost.index.to_numpy(), dtype="str"),
                         "reason": pd.array(reason, dtype="str")})


# --- reading -----------------------------------------------------------------

def _read_table(path: Path) -> tuple[pd.DataFrame, np.ndarray]:
    """Return the cells of the log file (as text) and the file line of each row."""
    source = str(path)
    if not path.is_file():
        raise LogError(Problem("no such file" if not path.exists() else "not a file", source))
    if path.suffix.lower() in _PARQUET_SUFFIXES:
        return _read_parquet(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise LogError(Problem("no such file", source)) from None
    except OSError as err:
        raise LogError(Problem(f"cannot read the file: {err.strerror}", source)) from None
    text = _decode(raw, source)
    delimiter = _delimiter(text, path.suffix.lower(), source)
    rows: list[list[str]] = []
    spans: list[tuple[int, int]] = []  # first and last file line of each record
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    start = 1
    try:
        for fields in reader:
            if any(f.strip() for f in fields):
                rows.append(fields)
                spans.append((start, reader.line_num))
            start = reader.line_num + 1
    except csv.Error as err:
        why = (f"; most likely a quote opened on line {start} is never closed"
               if "field larger" in str(err) else "")
        raise LogError(Problem(f"unreadable as delimited text: {err}{why}", source, start)) from None
    if not rows:
        raise LogError(Problem("the header line has no column names (the lines hold only "
                               f"{_DELIMITER_NAMES[delimiter]})", source, 1))
    header = rows[0]
    while len(header) > 1 and not header[-1].strip():
        header = header[:-1]
    width = len(header)
    last_line = text.count("\n") + (not text.endswith("\n"))
    problems = _quote_problems(rows, spans, width, delimiter, last_line, source)
    if problems:
        raise LogError(problems)
    problems = [Problem("this column name appears more than once in the header", source,
                        spans[0][0], name)
                for name in sorted({h for h in header if header.count(h) > 1})]
    for fields, (line, _) in zip(rows[1:], spans[1:]):
        if len(fields) < width or any(f.strip() for f in fields[width:]):
            problems.append(Problem(f"this line has {plural(len(fields), 'field')} but the header "
                                    f"has {width}", source, line))
    if problems:
        raise LogError(problems)
    cells = pd.DataFrame([f[:width] for f in rows[1:]], columns=header, dtype=object)
    return cells, np.asarray([line for line, _ in spans[1:]], dtype=np.int64)


def _decode(raw: bytes, source: str) -> str:
    """Return the text of a UTF-8 file (a BOM is dropped), or raise LogError naming the line."""
    head = raw[:4096]
    if head.startswith((b"\xff\xfe", b"\xfe\xff")) or (head and head.count(0) >= len(head) // 4):
        raise LogError(Problem("the file looks UTF-16 (byte-order mark or NUL bytes between the "
                               "characters): save it as UTF-8", source, 1))
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        offset = err.start + (3 if raw.startswith(b"\xef\xbb\xbf") else 0)
        line = raw[:offset].count(b"\n") + 1
        raise LogError(Problem(f"not UTF-8 text: byte 0x{raw[offset]:02x} on this line is not "
                               "UTF-8 (the file may be Latin-1 or Windows-1252); save the log as "
                               "UTF-8", source, line)) from None


def _quote_problems(rows: list[list[str]], spans: list[tuple[int, int]], width: int,
                    delimiter: str, last_line: int, source: str) -> list[Problem]:
    """Return a problem for each record whose quoted field swallowed the lines after it.

    The csv module reads an unclosed quote as one field running on to the next
    quote or the end of the file. A field with a line break is taken for such a
    field when it runs to the end of the file or when a line inside it holds a
    whole record's worth of delimiters; a quoted note over two lines passes.
    """
    problems = []
    for fields, (first, last) in zip(rows, spans):
        for f in fields:
            if "\n" not in f:
                continue
            swallowed = f.split("\n")[1:]
            if (last >= last_line and len(fields) < width) or any(
                    part.count(delimiter) >= max(width - 1, 1) for part in swallowed):
                end = " (the end of the file)" if last >= last_line else ""
                problems.append(Problem(
                    f"unterminated quote starting on line {first}: the quoted field runs on to "
                    f"line {last}{end}, swallowing {plural(last - first, 'line')}; close the "
                    "quote or remove it", source, first))
                break
    return problems


def _read_parquet(path: Path) -> tuple[pd.DataFrame, np.ndarray]:
    """Return the table of a Parquet log and, as line numbers, row index + 2."""
    try:
        import pyarrow  # noqa: F401  (pandas' Parquet engine)
    except ImportError:
        raise LogError(Problem("reading a Parquet log needs the package 'pyarrow', which is not "
                               "installed: pip install pyarrow, or save the log as CSV",
                               str(path))) from None
    try:
        cells = pd.read_parquet(path)
    except (OSError, ValueError) as err:
        raise LogError(Problem(f"cannot read the Parquet file: {err}", str(path))) from None
    return cells, np.arange(len(cells)) + 2


def _delimiter(text: str, suffix: str, source: str) -> str:
    """Return the delimiter of the text: the extension's, or the one detected."""
    sample = [line for line in text.splitlines() if line.strip()][:_SNIFF_LINES]
    if not sample:
        raise LogError(Problem("the file is empty: no header and no rows", source))

    def width(line: str, delimiter: str) -> int:
        return len(next(csv.reader([line], delimiter=delimiter)))

    fields = {d: width(sample[0], d) for d in _DELIMITER_NAMES}
    fitting = [d for d in _DELIMITER_NAMES
               if fields[d] > 1 and all(width(line, d) == fields[d] for line in sample[1:])]
    expected = _DELIMITER_OF_SUFFIX.get(suffix)
    if expected is not None:
        others = [d for d in fitting if d != expected]
        if fields[expected] == 1 and others:
            found = others[0]
            raise LogError(Problem(
                f"wrong delimiter: a {suffix} file is split by {_DELIMITER_NAMES[expected]}, but "
                f"its header has a single column and its lines look delimited by "
                f"{_DELIMITER_NAMES[found]} ({found!r}); save it with "
                f"{_DELIMITER_NAMES[expected]}, or give it the extension .txt to have the "
                f"delimiter detected", source, 1))
        return expected
    candidates = fitting or [d for d in _DELIMITER_NAMES if fields[d] > 1] or [","]
    return max(candidates, key=fields.__getitem__)


# --- validating --------------------------------------------------------------

class _Checker:
    """Collects the problems and warnings of one log; rows are reported by file line."""

    def __init__(self, source: str, lines: np.ndarray) -> None:
        self.source = source
        self.lines = lines
        self.problems: list[Problem] = []
        self.warnings: list[str] = []

    def at(self, mask: np.ndarray) -> str:
        """Return 'line 4' or 'lines 4, 9, 12 and 3 more' for the rows in ``mask``."""
        rows = np.flatnonzero(mask)
        shown = ", ".join(str(n) for n in self.lines[rows[:_SHOW_LINES]])
        more = f" and {rows.size - _SHOW_LINES} more" if rows.size > _SHOW_LINES else ""
        return f"{'line' if rows.size == 1 else 'lines'} {shown}{more}"

    def flag(self, mask: np.ndarray, column: str | None, message: str) -> bool:
        """Add one problem at the first row in ``mask``, listing the others; return whether any."""
        rows = np.flatnonzero(mask)
        if rows.size:
            listed = f" ({self.at(mask)})" if rows.size > 1 else ""
            self.problems.append(Problem(message + listed, self.source,
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
            hint = ("; use a decimal point, not a comma"
                    if re.fullmatch(r"-?\d+,\d+", example) else "")
            self.flag(bad, column, f"{what} must be a number, got {example!r}{hint}")
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
            hint = "; use a decimal point, not a comma" if re.fullmatch(r"-?\d+,\d+", example) else ""
            self.flag(bad, column, f"{what} must be a number, got {example!r}{hint}")
        self.flag(empty, column, f"{what} is empty")
        self.flag(fraction, column, f"{what} must be a whole number")
        self.flag(big, column, too_large)
        return None if (bad | empty | fraction | big).any() else out

    def ids(self, values: pd.Series, column: str, what: str, fix: bool) -> np.ndarray | None:
        """Return the cells as id strings, or None when some are empty, carry stray spaces or
        hold a control character."""
        text = _text(values)
        stripped = np.array([t.strip() for t in text], dtype=object)
        ok = not self.flag(_equals(stripped, ""), column, f"{what} is empty")
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
            self.flag(_equals(text, raw), column, f"label {raw!r} holds the control character "
                                           f"{_hidden_character(raw)}; remove it")
            unknown.remove(raw)
            ok = False
        for raw in unknown[:_SHOW_LABELS]:
            hint = "; an empty cell marks a missed guess" if allow_missed else ""
            self.flag(_equals(text, raw), column, f"unknown symbol {raw!r}: task '{task.name}' has "
                                           f"{', '.join(symbols)}{hint}")
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
    return f"the task's symbol {target!r}" if target else "an empty cell (a missed guess)"


def _resolve_columns(cells: pd.DataFrame, columns: Mapping[str, str] | None,
                     check: _Checker, measures: Sequence[str] = ()) -> dict[str, str]:
    """Return canonical name -> the log's column name, for the columns the log has."""
    columns = dict(columns or {})
    unknown = sorted(set(columns) - set(CANONICAL))
    if unknown:
        raise UsageError(f"unknown canonical column(s) {', '.join(map(repr, unknown))} in the "
                         f"column map; the canonical columns are {', '.join(CANONICAL)}")
    theirs = list(columns.values())
    twice = sorted({c for c in theirs if theirs.count(c) > 1})
    if twice:
        raise UsageError(f"column(s) {', '.join(map(repr, twice))} mapped to more than one "
                         f"canonical column")
    names = {canon: columns.get(canon, canon) for canon in CANONICAL}
    used = [c for c, name in names.items()
            if name != c and name in CANONICAL and names[name] == name]
    if used:
        raise UsageError("column map reads " + ", ".join(f"'{c}' from '{names[c]}'" for c in used)
                         + ", which is itself a canonical column: map that one to another column too")
    present = {canon: name for canon, name in names.items() if name in cells.columns}
    extra = [str(c) for c in cells.columns if c not in present.values()]
    for canon in REQUIRED:
        if canon in present:
            continue
        name = names[canon]
        near = ([c for c in extra if c.strip().casefold() == name.casefold()]
                or difflib.get_close_matches(name, extra, n=1)
                or difflib.get_close_matches(name.casefold(), [c.casefold() for c in extra], n=1))
        if near and near[0] not in extra:  # a case-folded match: back to the log's spelling
            near = [c for c in extra if c.casefold() == near[0]]
        mine = near[0] if near else "<your column>"
        hint = (f"; the closest is {near[0]!r}" if near else "")
        alias = f" (canonical '{canon}')" if name != canon else ""
        check.problems.append(Problem(
            f"missing required column '{name}'{alias}; the log has "
            f"{', '.join(map(repr, map(str, cells.columns)))}{hint}: map a column with "
            f"columns={{'{canon}': {mine!r}}} (CLI: --map {canon}={mine})",
            check.source, 1, name))
    personal = [c for c in extra if _looks_identifying(c)]
    if personal:
        check.warnings.append(f"{_columns(personal)} {_verb(personal, 'looks', 'look')} like "
                              f"personal data and {_verb(personal, 'was', 'were')} not loaded; do "
                              "not share the file they came from")
    ignored = [c for c in extra if c not in personal and c not in measures]
    if ignored:
        check.warnings.append(f"{_columns(ignored)} {_verb(ignored, 'is', 'are')} not part of the "
                              "log format and were ignored")
    if "participant" in present and _looks_identifying(present["participant"]):
        check.warnings.append(f"participant ids come from column '{present['participant']}', "
                              "which sounds identifying: use pseudonymous ids")
    return present


def _columns(names: list[str]) -> str:
    """Return "column 'a'" or "columns 'a', 'b'"."""
    return ("column " if len(names) == 1 else "columns ") + ", ".join(map(repr, names))


def _verb(items: object, singular: str, plural_form: str) -> str:
    """Return the verb form that agrees with the number of ``items``."""
    return singular if len(items) == 1 else plural_form


def _looks_identifying(name: str) -> bool:
    """Return whether a column name looks like it holds personal data (name, email, ...)."""
    snake = re.sub(r"([a-z0-9])([A-Z])", r"\1_\2", name)
    return bool(_IDENTIFYING.search(re.sub(r"[^a-z0-9]+", "_", snake.lower())))


def _validate(cells: pd.DataFrame, lines: np.ndarray, task: Task, source: str,
              columns: Mapping[str, str] | None, rt_unit: str, fix_labels: bool,
              screen: RTScreen, measures: Sequence[str] = ()) -> ValidatedLog:
    """Return the canonical, screened log of ``cells``, or raise LogError with every problem."""
    if rt_unit not in RT_UNITS:
        raise UsageError(f"rt_unit must be one of {', '.join(RT_UNITS)}, got {rt_unit!r}")
    measures = tuple(measures)
    clash = [m for m in measures if m in CANONICAL or m in DERIVED]
    if clash:
        raise UsageError(f"measure column(s) {', '.join(map(repr, clash))} would shadow a column "
                         "foretell computes or reads: rename them")
    check = _Checker(source, lines)
    if len(cells) == 0:
        raise LogError(Problem("the log has a header but no data rows", source, 1))
    cells = cells.reset_index(drop=True)
    name = _resolve_columns(cells, columns, check, measures)
    extra_values = {}
    for m in measures:
        if m not in cells.columns:
            check.problems.append(Problem(f"missing measure column '{m}'; the log has "
                                          f"{', '.join(map(repr, map(str, cells.columns)))}",
                                          source, 1, m))
        else:
            extra_values[m] = check.numbers(cells[m], m, m)[0]

    def col(canon: str) -> pd.Series:
        return cells[name[canon]]

    part = check.ids(col("participant"), name["participant"], "participant",
                     fix_labels) if "participant" in name else None
    group = check.ids(col("group"), name["group"], "group",
                      fix_labels) if "group" in name else None
    session = (check.integers(col("session"), name["session"], "session") if "session" in name
               else np.ones(len(cells), dtype=np.int64))
    ints = {c: check.integers(col(c), name[c], c) for c in ("block", "trial") if c in name}
    stim = (check.labels(col("stimulus"), name["stimulus"], task, fix_labels, allow_missed=False)
            if "stimulus" in name else None)
    resp = (check.labels(col("response"), name["response"], task, fix_labels, allow_missed=True)
            if "response" in name else None)
    times = {}
    for c in ("rt", "onset", "reveal_onset"):
        if c in name:
            times[c] = check.numbers(col(c), name[c], c)[0]
    rt = times.get("rt", np.full(len(cells), np.nan)) * RT_UNITS[rt_unit]
    if "rt" in name:
        check.flag(rt < 0, name["rt"], "rt is negative")
    if "onset" in times and "reveal_onset" in times:
        check.flag(times["reveal_onset"] < times["onset"], name["reveal_onset"],
                   f"reveal_onset is before onset ('{name['onset']}'): the stimulus is revealed "
                   "after the guess prompt")
    for ids, canon in ((part, "participant"), (group, "group")):
        if ids is not None:
            check.flag(pd.Series(ids).eq(ALL).to_numpy(), name[canon],
                       f"the {canon} id '{ALL}' is reserved: output tables use it for everyone; "
                       "rename it")
    if part is not None and group is not None:
        first = pd.Series(group).groupby(part).transform("first").to_numpy()
        check.flag(group != first, name["group"], "participant is in more than one group (a group "
                   "is between participants; use session or block within a participant)")
    if part is not None and session is not None:
        _check_order(check, part, session, ints, name)
    if check.problems:
        raise LogError(sorted(check.problems, key=lambda p: (p.line is None, p.line or 0)))

    stimulus, stim_fixed = stim
    response, resp_fixed = resp
    missed = response == ""
    index = {s: i for i, s in enumerate(task.symbols)}
    data = {"participant": pd.array(part, dtype="str")}
    if group is not None:
        data["group"] = pd.array(group, dtype="str")
    data |= {"session": session, "block": ints["block"], "trial": ints["trial"],
             "stimulus": pd.array(stimulus, dtype="str"),
             "response": pd.array(np.where(missed, None, response), dtype="str"), "rt": rt}
    data |= {c: times[c] for c in ("onset", "reveal_onset") if c in times}
    data |= extra_values
    data |= {"stimulus_idx": np.array([index[s] for s in stimulus], dtype=np.int64),
             "response_idx": np.array([index.get(r, -1) for r in response], dtype=np.int64),
             "missed": missed}
    frame = pd.DataFrame(data)
    _read_warnings(check, frame, name, rt_unit)
    fixed_rows = stim_fixed | resp_fixed
    labels_fixed = {str(p): int(n) for p, n in
                    pd.Series(fixed_rows).groupby(part).sum().items() if n}
    frame = frame.iloc[np.lexsort((frame["trial"], frame["block"], frame["session"], part))]
    frame = frame.reset_index(drop=True)
    log = ValidatedLog(frame, task, source, rt_unit, screen, tuple(check.warnings),
                       labels_fixed=labels_fixed)
    return screen_rt(log, screen)


def _check_order(check: _Checker, part: np.ndarray, session: np.ndarray,
                 ints: dict[str, np.ndarray | None], name: dict[str, str]) -> None:
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


def _read_warnings(check: _Checker, frame: pd.DataFrame, name: dict[str, str],
                   rt_unit: str) -> None:
    """Add the warnings a valid log can still deserve: RTs on missed guesses, no RTs, units."""
    rt = frame["rt"].to_numpy()
    has_rt = ~np.isnan(rt)
    missed_rt = frame["missed"].to_numpy() & has_rt
    if missed_rt.any():
        n = int(missed_rt.sum())
        check.warnings.append(f"column '{name['rt']}': {plural(n, 'missed guess')} "
                              f"{'carries' if n == 1 else 'carry'} an RT, which is ignored ({check.at(missed_rt)})")
    if not has_rt.any():
        check.warnings.append("no reaction times in this log: RT analyses will be skipped")
    elif rt_unit == "s" and np.median(rt[has_rt]) > _MS_SUSPECT:
        check.warnings.append(f"column '{name['rt']}': the median RT is "
                              f"{np.median(rt[has_rt]):g} s; if the RTs are in milliseconds, "
                              "pass rt_unit='ms' (CLI: --rt-unit ms)")
    elif rt_unit == "ms" and np.median(rt[has_rt]) < _S_SUSPECT:
        check.warnings.append(f"column '{name['rt']}': read as milliseconds, the median RT is "
                              f"{np.median(rt[has_rt]):g} s; if the RTs are in seconds, drop "
                              "rt_unit='ms' (CLI: --rt-unit)")


def _mad_outliers(part: np.ndarray, rt: np.ndarray, eligible: np.ndarray,
                  k: float) -> tuple[np.ndarray, dict[str, int]]:
    """Return the rows beyond k scaled MADs of their participant's median log RT.

    Only ``eligible`` rows enter the median and the MAD and can be flagged;
    also returns the participants whose MAD is 0 (nothing flagged for them) with
    their number of eligible RTs.
    """
    log_rt = pd.Series(np.where(eligible, np.log(np.where(eligible, rt, 1.0)), np.nan))
    dev = (log_rt - log_rt.groupby(part).transform("median")).abs()
    mad = _MAD_SCALE * dev.groupby(part).transform("median")
    out = (eligible & (dev > k * mad) & (mad > 0)).to_numpy()
    flat = pd.Series(part[eligible & (mad == 0).to_numpy()]).value_counts().sort_index()
    return out, {str(p): int(n) for p, n in flat.items()}
