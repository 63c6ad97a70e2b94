"""Reading one response-log file: delimited text (encoding, delimiter, quotes, the header), JSON, spreadsheets, Parquet."""

from __future__ import annotations

import csv
import io
import json
import re
import zipfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import LogError, Problem
from .logcolumns import CANONICAL
from .text import plural

_DELIMITER_NAMES = {",": "commas", "\t": "tabs", ";": "semicolons", "|": "vertical bars"}
_DELIMITER_OF_SUFFIX = {".csv": ",", ".tsv": "\t", ".tab": "\t"}
_PARQUET_SUFFIXES = {".parquet", ".pq"}
_JSON_SUFFIXES = {".json"}
_SPREADSHEET_SUFFIXES = {".xlsx", ".xlsm"}
TABLE_SUFFIXES = (".csv", ".tsv", ".tab", ".txt", ".json", ".xlsx", ".xlsm", ".parquet", ".pq")
"""The extensions of the files a folder of logs is read from (when no name pattern chooses them)."""
_SNIFF_LINES = 20
_SIGNATURES = (
    (re.compile(rb"\x1f\x8b"), "a gzip-compressed file", "decompress it (e.g. gunzip) and give the CSV inside"),
    (re.compile(rb"PK\x03\x04"), "a zip archive, such as an Excel .xlsx or OpenDocument .ods workbook",
     "give a workbook the extension .xlsx (read with openpyxl), or save the sheet as CSV (UTF-8)"),
    (re.compile(rb"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"), "an Excel .xls workbook (OLE2)",
     "save the sheet as CSV (UTF-8)"),
    (re.compile(rb"BZh[1-9]1AY&SY"), "a bzip2-compressed file", "decompress it (bunzip2) and give the CSV inside"),
    (re.compile(rb"\xfd7zXZ\x00"), "an xz-compressed file", "decompress it (unxz) and give the CSV inside"),
    (re.compile(rb"PAR1(?=.*PAR1\Z)", re.S), "a Parquet file", "give it the extension .parquet (or save it as CSV)"),
    (re.compile(rb"%PDF-"), "a PDF document", "export the trial table as CSV instead"),
)
"""File signatures (magic bytes) of files that are not text tables: what each is and the fix."""


@dataclass(frozen=True)
class LogFile:
    """One file of a log, and what its place says about its rows.

    Attributes
    ----------
    path : pathlib.Path
    ids : mapping of str to str
        Canonical column -> the value every row of the file gets (the
        participant, session or group its name or folder gives).
    missing : tuple of str
        Cell texts that mean "no value" in this file (BIDS writes ``n/a``).
    """

    path: Path
    ids: Mapping[str, str] = field(default_factory=dict)
    missing: tuple[str, ...] = ()


def read_log_cells(path: Path, *, names: Sequence[str] = CANONICAL,
                   sheet: str | int | None = None) -> tuple[pd.DataFrame, np.ndarray]:
    """Return the cells of a log file and the file line of each row.

    Parameters
    ----------
    path : pathlib.Path
        CSV (``.csv``), TSV (``.tsv``, ``.tab``), a JSON array of trial
        objects (``.json``), a spreadsheet (``.xlsx``, ``.xlsm``, with
        openpyxl), Parquet (``.parquet``, ``.pq``, with pyarrow) or, for any
        other extension, text whose delimiter (comma, tab, semicolon,
        vertical bar) is detected.
    names : sequence of str, default :data:`CANONICAL`
        Column names the header holds, to recognise a stray line above it.
    sheet : str or int, optional
        The sheet of a spreadsheet (default: the first).

    Returns
    -------
    (pandas.DataFrame, numpy.ndarray)
        The cells (text for delimited files, typed for JSON, spreadsheets and
        Parquet) under the header's column names, and the first file line of
        each row (the header is line 1; a JSON object's line is where it
        opens; a spreadsheet's is its row number; for Parquet, row index + 2).

    Raises
    ------
    LogError
        Naming the line and the real cause: a missing file, a compressed
        file or a workbook (by its signature), UTF-16 or another encoding, a
        line before the header, a wrong delimiter, an unterminated quote, a
        repeated column name, a ragged line, JSON that is not an array of
        objects.
    """
    source = str(path)
    if not path.is_file():
        raise LogError(Problem("no such file" if not path.exists() else "not a file", source))
    suffix = path.suffix.lower()
    if suffix in _PARQUET_SUFFIXES:
        return _read_parquet(path)
    if suffix in _SPREADSHEET_SUFFIXES:
        return _read_spreadsheet(path, sheet)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise LogError(Problem("no such file", source)) from None
    except OSError as err:
        raise LogError(Problem(f"cannot read the file: {err.strerror}", source)) from None
    text = _decode(raw, source)
    if suffix in _JSON_SUFFIXES:
        return _read_json(text, source)
    _check_header_line(text, source, names)
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
    """Return the text of a UTF-8 file (a BOM is dropped), or raise LogError naming the cause and the line."""
    for signature, what, fix in _SIGNATURES:
        if signature.match(raw):
            shown = " ".join(f"{b:02x}" for b in raw[:4])
            raise LogError(Problem(f"not a text table: the file starts with the bytes {shown}, the "
                                   f"signature of {what}; {fix}", source, 1))
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


def _check_header_line(text: str, source: str, names: Sequence[str]) -> None:
    """Refuse, in one problem, a first line that holds no column name above a line that holds several.

    A spreadsheet's ``sep=,`` line or a comment above the header would
    otherwise make every row a problem of its own.
    """
    lines = [(n, line) for n, line in enumerate(text.splitlines(), start=1) if line.strip()][:2]
    if len(lines) < 2:
        return
    (first_n, first), (second_n, second) = lines
    if _column_names(first, names) == 0 and _column_names(second, names) >= 2:
        raise LogError(Problem(f"the header seems to be on line {second_n} ({second[:60]!r}): line "
                               f"{first_n} ({first[:60]!r}) holds none of the log's column names; "
                               "remove that line (a spreadsheet's 'sep=' line or a comment)",
                               source, first_n))


def _column_names(line: str, names: Sequence[str]) -> int:
    """Return how many fields of ``line`` (split at any delimiter) are among ``names`` (any letter case)."""
    known = {n.strip().casefold() for n in names}
    fields = (f.strip().strip('"').strip().casefold() for f in re.split(r"[,\t;|]", line))
    return sum(f in known for f in fields)


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


def _read_json(text: str, source: str) -> tuple[pd.DataFrame, np.ndarray]:
    """Return the cells of a JSON array of trial objects (one row per object) and the line where each opens.

    Columns are the objects' keys in the order first seen; a key an object
    lacks is an empty cell; a nested value (array, object) is kept as JSON text.
    """
    decoder = json.JSONDecoder()
    rows: list[dict] = []
    lines: list[int] = []
    line, seen = 1, 0

    def line_at(pos: int) -> int:
        nonlocal line, seen
        line += text.count("\n", seen, pos)
        seen = pos
        return line

    pos = _skip_space(text, 0)
    if not text.startswith("[", pos):
        raise LogError(Problem("a JSON log is an array of trial objects ([{...}, {...}]); this file "
                               "does not start with '['", source, line_at(pos)))
    pos = _skip_space(text, pos + 1)
    while not text.startswith("]", pos):
        try:
            value, end = decoder.raw_decode(text, pos)
        except json.JSONDecodeError as err:
            raise LogError(Problem(f"not valid JSON: {err.msg} (character {err.colno})", source,
                                   err.lineno)) from None
        if not isinstance(value, dict):
            raise LogError(Problem(f"element {len(rows) + 1} of the array is not a trial object "
                                   f"({{...}}) but {type(value).__name__}", source, line_at(pos)))
        rows.append(value)
        lines.append(line_at(pos))
        pos = _skip_space(text, end)
        if text.startswith(",", pos):
            pos = _skip_space(text, pos + 1)
        elif not text.startswith("]", pos):
            raise LogError(Problem("not valid JSON: expected ',' or ']' after a trial object",
                                   source, line_at(min(pos, len(text)))))
    if not rows:
        raise LogError(Problem("the JSON array holds no trial objects", source, 1))
    header = list(dict.fromkeys(key for row in rows for key in row))
    cells = pd.DataFrame([[_json_cell(row.get(key)) for key in header] for row in rows],
                         columns=header, dtype=object)
    return cells, np.asarray(lines, dtype=np.int64)


def _skip_space(text: str, pos: int) -> int:
    """Return the position of the first character at or after ``pos`` that is not JSON whitespace."""
    while pos < len(text) and text[pos] in " \t\r\n":
        pos += 1
    return pos


def _json_cell(value: object) -> object:
    """Return a JSON value as a cell: scalars as they are, arrays and objects as compact JSON text."""
    return json.dumps(value, separators=(",", ":")) if isinstance(value, (list, dict)) else value


def _read_spreadsheet(path: Path, sheet: str | int | None) -> tuple[pd.DataFrame, np.ndarray]:
    """Return the cells of one sheet (the first by default) and each row's number in the sheet.

    Rows whose cells are all empty are left out (their numbers are skipped).
    """
    source = str(path)
    try:
        import openpyxl  # noqa: F401  (pandas' engine for .xlsx)
    except ImportError:
        raise LogError(Problem("reading a spreadsheet needs the package 'openpyxl', which is not "
                               "installed: pip install 'foretell[xlsx]', or save the sheet as CSV",
                               source)) from None
    try:
        cells = pd.read_excel(path, sheet_name=0 if sheet is None else sheet, dtype=object,
                              engine="openpyxl")
    except (ValueError, OSError, KeyError, zipfile.BadZipFile) as err:
        raise LogError(Problem(f"cannot read the spreadsheet: {err}", source)) from None
    lines = np.arange(len(cells), dtype=np.int64) + 2
    filled = cells.notna().any(axis=1).to_numpy()
    cells.columns = [str(c) for c in cells.columns]
    return cells[filled].reset_index(drop=True), lines[filled]


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


