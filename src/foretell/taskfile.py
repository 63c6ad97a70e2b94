"""Task files (TOML): the keys they hold, and checks that name the line and character of every problem."""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Sequence

from .errors import Problem, TaskError
from .labels import symbol_label_problem

PROB_TOL = 1e-9
"""How far a context's probabilities may sum from 1."""
RESPONSES = {
    "guess": "a guess of the next symbol before it is shown, RT from the guess prompt",
    "reaction": "a press of the key of the symbol just shown (serial reaction time), "
                "RT from stimulus onset",
}
"""The response designs a task file may declare with ``response = ...``, and what each means."""
KEYS = ("name", "description", "symbols", "block_length", "response", "contexts")
"""The keys of a task file; anything else is a typo and refused."""
CONTEXT_KEYS = ("past", "next")
"""The keys of one ``[[contexts]]`` table."""


@dataclass(frozen=True)
class TaskFields:
    """The checked content of a task file: what :class:`foretell.tasks.Task` is built from.

    ``contexts`` are symbol indices, oldest first; ``rows`` their next-symbol
    probabilities in the order of ``symbols``.
    """

    name: str
    symbols: tuple[str, ...]
    contexts: tuple[tuple[int, ...], ...]
    rows: tuple[tuple[float, ...], ...]
    description: str
    block_length: int | None
    response: str


def read_task_file(path: Path) -> tuple[dict[str, Any], str]:
    """Return the parsed mapping and the text of a TOML task file.

    Parameters
    ----------
    path : pathlib.Path
        The file. A UTF-8 byte-order mark is accepted.

    Returns
    -------
    (dict, str)

    Raises
    ------
    TaskError
        When the file is missing or unreadable, not UTF-8, or not valid TOML
        (naming the line).
    """
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise TaskError(f"cannot read the task file: {exc.strerror or exc}", path=str(path)) from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise TaskError("not UTF-8 text: a task file is TOML; save it as UTF-8", path=str(path),
                        line=raw[:exc.start].count(b"\n") + 1) from None
    try:
        return tomllib.loads(text), text
    except tomllib.TOMLDecodeError as exc:
        raise TaskError(f"not valid TOML: {exc}", path=str(path), line=_toml_error_line(str(exc))) from None


def check_task_data(data: object, path: str | None, text: str | None = None) -> TaskFields:
    """Return the checked fields of a parsed task file, or raise TaskError with every problem found.

    Parameters
    ----------
    data : mapping
        The parsed file: ``name``, ``symbols``, optional ``description``,
        ``block_length``, ``response`` (see :data:`RESPONSES`) and
        ``contexts`` (tables of ``past`` and ``next``).
    path : str or None
        The file, for the messages.
    text : str, optional
        The file's text, to name the line and character of each problem.

    Returns
    -------
    TaskFields

    Raises
    ------
    TaskError
        Unknown keys (with the closest known key), wrong types, unknown or
        repeated symbols, probabilities that are not finite, outside [0, 1]
        or that do not sum to 1 (within :data:`PROB_TOL`), and contexts that
        do not form a complete context tree.
    """
    if not isinstance(data, Mapping):
        raise TaskError(f"a task must be a mapping of keys ({', '.join(KEYS)}), got {type(data).__name__}",
                        path=path)
    locate = _Locator(text)

    def bad(msg: str, key: str | None = None) -> None:
        line, char = locate(key)
        problems.append(Problem(msg, path=path, line=line, column=key, char=char))

    problems: list[Problem] = []
    _unknown_keys(data, bad)
    name, description, block_length, response = _plain_fields(data, path, bad)
    symbols = _symbols(data, bad, problems)
    contexts, rows = _context_rows(data.get("contexts", []), symbols, bad)
    if problems:
        raise TaskError(problems)
    for problem in _tree_problems(contexts, symbols, path):
        line, char = locate(problem.column)
        problems.append(replace(problem, line=line, char=char))
    if problems:
        raise TaskError(problems)
    return TaskFields(name=name, symbols=tuple(symbols), contexts=tuple(contexts), rows=tuple(rows),
                      description=description, block_length=block_length, response=response)


def _unknown_keys(data: Mapping[str, Any], bad) -> None:
    """Flag every key that a task file or a [[contexts]] table does not hold, with the closest known one."""
    def flag(key: str, known: Sequence[str], where: str, shown: str) -> None:
        close = difflib.get_close_matches(key, known, n=1, cutoff=0.6)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        bad(f"unknown key {key!r}{hint}: {shown}", where)

    for key in data:
        if key not in KEYS:
            flag(key, KEYS, key, f"a task file holds {', '.join(KEYS)}")
    contexts = data.get("contexts")
    for k, ctx in enumerate(contexts if isinstance(contexts, list) else [], start=1):
        for key in (ctx if isinstance(ctx, dict) else {}):
            if key not in CONTEXT_KEYS:
                flag(key, CONTEXT_KEYS, f"contexts[{k}].{key}", "a [[contexts]] table holds past and next")


def _plain_fields(data: Mapping[str, Any], path: str | None, bad) -> tuple[str, str, int | None, str]:
    """Return name, description, block_length and response, flagging wrong values (defaults then)."""
    name = data.get("name")
    if not isinstance(name, str) or not name.strip():
        bad("'name' must be a non-empty string", "name")
        name = Path(path).stem if path else "task"
    description = data.get("description", "")
    if not isinstance(description, str):
        bad("'description' must be a string", "description")
        description = ""
    block_length = data.get("block_length")
    if block_length is not None and (not isinstance(block_length, int) or isinstance(block_length, bool)
                                     or block_length < 1):
        bad(f"'block_length' must be a positive whole number, got {block_length!r}", "block_length")
        block_length = None
    response = data.get("response", "guess")
    if not isinstance(response, str) or response not in RESPONSES:
        bad(f"'response' must be one of {', '.join(map(repr, RESPONSES))}, got {response!r}", "response")
        response = "guess"
    return name, description, block_length, response


def _symbols(data: Mapping[str, Any], bad, problems: list[Problem]) -> list[str]:
    """Return the symbol labels; raise TaskError (with what was found so far) when they are unusable."""
    symbols = data.get("symbols")
    if not isinstance(symbols, list) or len(symbols) < 2:
        bad("'symbols' must be a list of at least two labels", "symbols")
        raise TaskError(problems)
    if not all(isinstance(s, str) for s in symbols):
        bad(f"'symbols' must be a list of text labels, e.g. [\"up\", \"down\"]; got {symbols!r}", "symbols")
        raise TaskError(problems)
    for s in symbols:
        if (why := symbol_label_problem(s)) is not None:
            bad(why, "symbols")
    if problems:
        raise TaskError(problems)
    if len(set(symbols)) != len(symbols):
        dupes = sorted({s for s in symbols if symbols.count(s) > 1})
        bad(f"symbol labels must be unique; repeated: {', '.join(dupes)}", "symbols")
    if "contexts" in data and (not isinstance(data["contexts"], list) or not data["contexts"]):
        bad("'contexts' must be one or more [[contexts]] tables; leave it out when the task "
            "does not give the source", "contexts")
    if problems:
        raise TaskError(problems)
    return symbols


def _context_rows(raw_contexts: list, symbols: list[str],
                  bad) -> tuple[list[tuple[int, ...]], list[tuple[float, ...]]]:
    """Return the contexts (symbol indices) and their probability rows, flagging every bad table."""
    index = {s: i for i, s in enumerate(symbols)}
    contexts: list[tuple[int, ...]] = []
    rows: list[tuple[float, ...]] = []
    for k, ctx in enumerate(raw_contexts, start=1):
        key = f"contexts[{k}]"
        if not isinstance(ctx, dict):
            bad("must be a table with 'past' and 'next'", key)
            continue
        past, row = _one_context(ctx, key, symbols, index, bad)
        if row is not None:
            contexts.append(past)
            rows.append(row)
    return contexts, rows


def _one_context(ctx: dict, key: str, symbols: list[str], index: dict[str, int],
                 bad) -> tuple[tuple[int, ...], tuple[float, ...] | None]:
    """Return one context's past and probabilities (None after flagging a problem)."""
    past, nxt = ctx.get("past"), ctx.get("next")
    label = f"{key} (past = {past!r})"
    if not isinstance(past, list) or not all(isinstance(s, str) for s in past):
        bad(f"{label}: 'past' must be a list of symbol labels (oldest first)", f"{key}.past")
        return (), None
    unknown = [s for s in past if s not in index]
    if unknown:
        bad(f"{label}: unknown {_symbol_list(unknown)} in 'past'", f"{key}.past")
        return (), None
    if not isinstance(nxt, dict):
        bad(f"{label}: 'next' must be a table of symbol = probability", f"{key}.next")
        return (), None
    unknown = [s for s in nxt if s not in index]
    missing = [s for s in symbols if s not in nxt]
    if unknown:
        bad(f"{label}: unknown {_symbol_list(unknown)} in 'next'", f"{key}.next")
    if missing:
        bad(f"{label}: 'next' gives no probability for {', '.join(map(repr, missing))}", f"{key}.next")
    if unknown or missing:
        return (), None
    vals = [nxt[s] for s in symbols]
    if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals):
        bad(f"{label}: probabilities must be numbers", f"{key}.next")
        return (), None
    outside = [f"{s} = {v!r}" for s, v in zip(symbols, vals) if not (math.isfinite(v) and 0 <= v <= 1)]
    if outside:
        negative = " (negative probability)" if any(v < 0 for v in vals) else ""
        bad(f"{label}: {', '.join(outside)}{negative}: every probability must be a finite "
            "number in [0, 1]", f"{key}.next")
        return (), None
    if abs(sum(vals) - 1.0) > PROB_TOL:
        bad(f"{label}: probabilities sum to {sum(vals):.12g}, not 1 (tolerance {PROB_TOL})", f"{key}.next")
        return (), None
    return tuple(index[s] for s in past), tuple(float(v) for v in vals)


class _Locator:
    """The line and character (both 1-based) of a task-file key in the file's text: best effort.

    Keys are top-level names ("symbols"), "contexts[k]" (the k-th
    ``[[contexts]]`` table) or "contexts[k].<key>" (a key inside it).
    (None, None) when there is no text or the key is not found.
    """

    _TABLE = re.compile(r"\s*\[")
    _CONTEXTS = re.compile(r"\s*\[\[\s*(contexts)\s*\]\]")

    def __init__(self, text: str | None) -> None:
        self.lines = text.splitlines() if text else []

    def __call__(self, key: str | None) -> tuple[int | None, int | None]:
        if key is None or not self.lines:
            return None, None
        match = re.fullmatch(r"contexts\[(\d+)\](?:\.(.+))?", key)
        if match is None:
            return self._top_level(key)
        tables = [i for i, line in enumerate(self.lines) if self._CONTEXTS.match(line)]
        k, inner = int(match.group(1)), match.group(2)
        if len(tables) < k:  # contexts written as an inline array: search from 'contexts ='
            start = self._top_level("contexts")[0]
            found = self._assignment(inner, (start or 1) - 1, inline=True) if inner else None
            return found or (start, None)
        start = tables[k - 1]
        found = self._assignment(inner, start + 1) if inner else None
        return found or (start + 1, self._CONTEXTS.match(self.lines[start]).start(1) + 1)

    def _top_level(self, key: str) -> tuple[int | None, int | None]:
        """Return where ``key`` is assigned before the first table, or opens a table of its own."""
        found = self._assignment(key, 0)
        if found:
            return found
        header = re.compile(rf"\s*\[\[?\s*(\"?){re.escape(key)}\1\s*[\].]")
        for i, line in enumerate(self.lines):
            hit = header.match(line)
            if hit:
                return i + 1, hit.end(1) + 1
        return None, None

    def _assignment(self, key: str, start: int, inline: bool = False) -> tuple[int, int] | None:
        """Return where ``key = ...`` is, from line index ``start`` to the next table (or anywhere, inline)."""
        pattern = re.compile(rf"(^\s*|[{{,]\s*)(\"?){re.escape(key)}\2\s*[=.]" if inline
                             else rf"(\s*)(\"?){re.escape(key)}\2\s*[=.]")
        for i in range(start, len(self.lines)):
            if not inline and self._TABLE.match(self.lines[i]):
                return None
            hit = pattern.search(self.lines[i]) if inline else pattern.match(self.lines[i])
            if hit:
                return i + 1, hit.end(2) + 1
        return None


def _tree_problems(contexts: list[tuple[int, ...]], symbols: list[str],
                   path: str | None) -> list[Problem]:
    """Return the problems that keep ``contexts`` from being a complete context tree.

    Complete: every past of maximal depth has exactly one context as a suffix,
    i.e. no context is a suffix of another and every inner node has all m children.
    """
    def show(c: Sequence[int]) -> str:
        return "[" + ", ".join(symbols[i] for i in c) + "]"

    problems: list[Problem] = []
    seen: dict[tuple[int, ...], int] = {}
    for k, c in enumerate(contexts, start=1):
        if c in seen:
            problems.append(Problem(f"context {show(c)} is given twice (contexts[{seen[c]}] and "
                                    f"contexts[{k}])", path=path, column=f"contexts[{k}]"))
        seen.setdefault(c, k)
    if problems:
        return problems
    for c in contexts:  # a context that is a suffix of another: both match the longer past
        for d in range(len(c)):
            if c[len(c) - d:] in seen:
                problems.append(Problem(
                    f"contexts {show(c[len(c) - d:])} and {show(c)} both match a past ending in "
                    f"{show(c)}: one context may not be a suffix of another", path=path,
                    column=f"contexts[{seen[c]}]"))
    if problems:
        return problems
    # every proper suffix of a context is an inner node; the tree is complete when each inner
    # node's m children (one older symbol prepended) are inner nodes or contexts
    inner = {c[len(c) - d:] for c in contexts for d in range(len(c))}
    for node in sorted(inner, key=lambda c: (len(c), c)):
        for a in range(len(symbols)):
            child = (a,) + node
            if child not in inner and child not in seen:
                problems.append(Problem(f"no context matches a past ending in {show(child)}: the "
                                        "contexts are not a complete context tree", path=path,
                                        column="contexts"))
                if len(problems) >= 5:
                    return problems
    return problems


def _symbol_list(labels: list[str]) -> str:
    """Return "symbol 'a'" or "symbols 'a', 'b'"."""
    return ("symbol " if len(labels) == 1 else "symbols ") + ", ".join(map(repr, labels))


def _toml_error_line(message: str) -> int | None:
    """Return the line that a tomllib error message names ("... (at line 3, column 7)")."""
    match = re.search(r"\(at line (\d+)", message)
    return int(match.group(1)) if match else None
