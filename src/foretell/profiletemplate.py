"""A lab profile suggested from one of the lab's files: its columns and values, read, never trusted."""

from __future__ import annotations

import json
import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from .logcheck import MS_SUSPECT
from .logread import read_log_cells
from .profiles import COUNTERS, cell_text, toml_key
from .tasks import Task

GUESSES = {
    "participant": (r"participant(_?id)?", r"subject(_?id)?", r"subj", r"sub", r"pid"),
    "session": (r"session", r"sess?"),
    "group": (r"group", r"condition", r"cond"),
    "block": (r".*\.thisrepn", r"block(_?(n|num|number|index))?", r"blk"),
    "trial": (r".*\.thisn", r"trial(_?(n|num|number))?", r"trial_?index", r".*\.thistrialn"),
    "stimulus": (r"stimulus", r"stim", r"symbol", r"cue", r"image"),
    "response": (r".*\.keys", r"response", r"resp", r"key(_?press)?", r"button", r"choice"),
    "rt": (r".*\.rt", r"rt", r"rt_?ms", r"reaction_?time", r"response_?time"),
    "onset": (r"onset",),
}
"""Per canonical column, the lab column names it is guessed from (lower case, whole name), best first."""
NO_RESPONSE = ("None", "none", "null", "NULL", "-1", "NA", "NaN", "nan", "n/a", "timeout")
"""Cell texts that usually mean no response."""
_KIND = re.compile(r"(trial_?)?type|phase|part|routine|stage")
_MAX_VALUES = 20


def suggest_profile(path: str | Path, task: Task | None = None, *, sheet: str | int | None = None) -> str:
    """Return the text of a lab profile suggested from one file's columns and values.

    Parameters
    ----------
    path : str or pathlib.Path
        One of the lab's files (any format :func:`foretell.logs.load_log` reads).
    task : Task, optional
        The task: response and stimulus values that are not its symbols get
        a value map to fill in.
    sheet : str or int, optional
        The sheet of a spreadsheet.

    Returns
    -------
    str
        A commented TOML profile. Guesses are marked for checking; a value
        map's entries to fill in read ``"?"``, which :func:`foretell.logs.load_log`
        refuses until they are replaced by task symbols.

    Raises
    ------
    LogError
        When the file cannot be read.
    """
    cells, _ = read_log_cells(Path(path), names=[], sheet=sheet)
    columns = _guess_columns(cells, task)
    rules, kept = _row_rules(cells, columns)
    text = {canon: pd.Series([cell_text(v) for v in cells.loc[kept, col]], dtype=object)
            for canon, col in columns.items()}
    lines = [f"# foretell lab profile suggested from {Path(path).name}: check every line",
             "# (see the README, \"Lab profiles\"; foretell check --profile shows what it maps)", ""]
    if "participant" not in columns:
        lines += ["# no participant column: the ids come from the file names (check the pattern)",
                  f"name_pattern = {_toml(_name_pattern(Path(path).name))}"]
    if "rt" in columns:
        rt = pd.to_numeric(text["rt"], errors="coerce")
        lines.append(f"rt_unit = {_toml('ms' if rt.median() > MS_SUSPECT else 's')}"
                     f"  # median {rt.median():g}")
    codes = [c for c in NO_RESPONSE if "response" in text and text["response"].eq(c).any()]
    if codes:
        lines.append(f"no_response = {_toml_list(codes)}")
    zero = [c for c in COUNTERS if c in text and pd.to_numeric(text[c], errors="coerce").min() == 0]
    if zero:
        lines.append(f"zero_based = {_toml_list(zero)}  # these counters start at 0")
    lines += ["", "[columns]  # foretell's column = your column"]
    lines += [f"{canon} = {_toml(columns[canon])}" for canon in GUESSES if canon in columns]
    lines += [f"# {canon} = \"...\"  (not found)" for canon in ("block", "trial", "stimulus", "response")
              if canon not in columns]
    for canon in ("response", "stimulus"):
        if canon in text:
            lines += _value_map(canon, text[canon], codes, task)
    return "\n".join(lines + rules) + "\n"


def _guess_columns(cells: pd.DataFrame, task: Task | None) -> dict[str, str]:
    """Return canonical -> the file's column, guessed from the names (the most filled column among equals).

    Without a name to go by, the stimulus column is the one whose cells are all task symbols.
    """
    header = [str(c) for c in cells.columns]
    texts = {c: [cell_text(v) for v in cells[c]] for c in header}
    filled = {c: sum(t != "" for t in texts[c]) for c in header}
    out: dict[str, str] = {}
    if task is not None:
        symbolic = [c for c in header if filled[c] and all(t in task.symbols or t == "" for t in texts[c])]
        if symbolic and not any(re.fullmatch(p, _plain(c)) for c in header for p in GUESSES["stimulus"]):
            out["stimulus"] = max(symbolic, key=lambda c: filled[c])
    for canon, patterns in GUESSES.items():
        for pattern in patterns if canon not in out else ():
            hits = [c for c in header if re.fullmatch(pattern, _plain(c)) and c not in out.values()]
            if canon == "rt" and "response" in out and "." in out["response"]:
                routine = out["response"].rsplit(".", 1)[0] + "."
                hits = [c for c in hits if c.startswith(routine)] or hits
            if hits:
                out[canon] = max(hits, key=lambda c: filled[c])
                break
    return out


def _value_map(canon: str, values: pd.Series, codes: Sequence[str], task: Task | None) -> list[str]:
    """Return the lines of a value map for the values that are not task symbols ("?" to fill in)."""
    seen = [v for v in pd.unique(values) if v != "" and v not in codes]
    symbols = task.symbols if task is not None else ()
    foreign = [v for v in seen if v not in symbols]
    if not foreign or len(seen) > _MAX_VALUES:
        return []
    hint = f" ({', '.join(symbols)})" if symbols else ""
    return ["", f"[values.{canon}]  # your value = the task's symbol{hint}: replace every \"?\""] + \
        [f"{toml_key(v)} = \"?\"" for v in sorted(foreign)]


def _row_rules(cells: pd.DataFrame, columns: dict[str, str]) -> tuple[list[str], np.ndarray]:
    """Return rules for rows outside the trials (an empty loop counter; a column naming the kind of row), and the rows kept."""
    lines, kept = [], np.ones(len(cells), dtype=bool)
    counter = columns.get("trial")
    if counter is not None:
        empty = np.array([cell_text(v) == "" for v in cells[counter]], dtype=bool)
        if empty.any():
            kept &= ~empty
            lines += ["", f"[[drop]]  # {int(empty.sum())} rows without a trial number (instructions, breaks, ...)",
                      f"column = {_toml(counter)}", "values = [\"\"]"]
    for col in (str(c) for c in cells.columns):
        if not _KIND.fullmatch(_plain(col)):
            continue
        kinds = pd.Series([cell_text(v) for v in cells[col]], dtype=object)
        counts = kinds.value_counts()
        if 1 < len(counts) <= _MAX_VALUES:
            kept &= kinds.eq(counts.index[0]).to_numpy()
            listed = ", ".join(f"{v!r} ({n})" for v, n in counts.items())
            lines += ["", f"[[keep]]  # {col!r} holds {listed}: keep the trials' kind only",
                      f"column = {_toml(col)}", f"values = {_toml_list([str(counts.index[0])])}"]
    return lines, kept


def _name_pattern(name: str) -> str:
    """Return a name pattern for a file name: its first id-like part as {participant}, a session number as {session}.

    Id-like: up to four letters then digits ("p01", "sub12"); a session:
    "ses-2", "session2", "s2" (the digits). Other parts become "*".

    Examples
    --------
    >>> _name_pattern("lanterns_p01_session1.json")
    '*_{participant}_session{session}.json'
    """
    stem, dot, suffix = name.partition(".")
    parts, found = [], set()
    for part in stem.split("_"):
        session = re.fullmatch(r"(ses-?|session-?|s)(\d+)", part, re.IGNORECASE)
        if session and "session" not in found:
            parts.append(session.group(1) + "{session}")
            found.add("session")
        elif re.fullmatch(r"[A-Za-z]{0,4}\d+", part) and "participant" not in found:
            parts.append("{participant}")
            found.add("participant")
        else:
            parts.append("*")
    if "participant" not in found:
        return "{participant}_*" + dot + suffix
    return re.sub(r"\*(_\*)+", "*", "_".join(parts)) + dot + suffix


def _plain(name: str) -> str:
    """Return a column name as the guesses read it: lower case, runs of other characters as '_' ("RT (ms)" -> "rt_ms")."""
    return re.sub(r"[^a-z0-9.]+", "_", name.strip().lower()).strip("_")


def _toml(text: str) -> str:
    """Return a TOML basic string."""
    return json.dumps(text, ensure_ascii=False)


def _toml_list(texts: Sequence[str]) -> str:
    """Return a TOML array of strings."""
    return "[" + ", ".join(map(_toml, texts)) + "]"
