"""Task files: the stimulus source of an experiment as a context tree."""

from __future__ import annotations

import importlib.resources
import math
import re
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable, Sequence

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components
from scipy.sparse.linalg import spsolve

from .errors import Problem, TaskError
from .labels import context_label, symbol_label_problem
from .text import number, plural

if TYPE_CHECKING:
    import pandas as pd

PROB_TOL = 1e-9
MAX_CHAIN_STATES = 2_000_000  # pasts of maximal depth the entropy-rate chain may hold
RESPONSES = {
    "guess": "a guess of the next symbol before it is shown, RT from the guess prompt",
    "reaction": "a press of the key of the symbol just shown (serial reaction time), "
                "RT from stimulus onset",
}
"""The response designs a task file may declare with ``response = ...``, and what each means."""


@dataclass(frozen=True)
class RecurrentClass:
    """One closed class of the chain on pasts of maximal depth and its entropy rate.

    ``pasts`` are the states (index tuples, oldest first), ``stationary`` their
    stationary probabilities within the class.
    """

    pasts: tuple[tuple[int, ...], ...]
    stationary: np.ndarray
    entropy_rate_bits: float


@dataclass(frozen=True)
class EntropyRate:
    """Entropy rate of a task's source, in bits per symbol.

    ``bits`` is the rate when the chain on pasts has a single recurrent class
    (the rate then does not depend on the start); otherwise it is ``nan`` and
    ``classes`` lists each recurrent class with its own rate.
    """

    bits: float
    classes: tuple[RecurrentClass, ...]

    @property
    def irreducible(self) -> bool:
        """True when the source has one recurrent class."""
        return len(self.classes) == 1


@dataclass(frozen=True, eq=False)
class Task:
    """A stimulus source: a complete context tree over an ordered alphabet.

    ``contexts[i]`` is a context as symbol indices, oldest first (``()`` is
    the root of a memoryless source) and ``next_probs[i]`` its next-symbol
    distribution. A task without contexts gives only the alphabet (the source
    is not given, e.g. every participant saw their own sequence): then
    ``has_source`` is False, ``max_depth`` is 0, and the methods that need the
    source raise TaskError. ``response`` is the design (see :data:`RESPONSES`):
    "guess" (the default) or "reaction". Use :func:`load_task` or
    :meth:`from_dict` to build one: both validate.
    """

    name: str
    symbols: tuple[str, ...]
    contexts: tuple[tuple[int, ...], ...]
    next_probs: np.ndarray
    description: str = ""
    block_length: int | None = None
    path: str | None = None
    response: str = "guess"
    _lookup: dict[tuple[int, ...], int] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_lookup", {c: i for i, c in enumerate(self.contexts)})
        probs = np.array(self.next_probs, dtype=float).reshape(len(self.contexts), len(self.symbols))
        probs += 0.0  # a negative zero prints as "-0.0"
        probs.setflags(write=False)
        object.__setattr__(self, "next_probs", probs)

    # -- construction -------------------------------------------------------------
    @classmethod
    def from_dict(cls, data: dict[str, Any], path: str | None = None) -> "Task":
        """Return a validated task from a parsed task-file mapping (see tasks/ for examples)."""
        return _parse_task(data, path)

    # -- alphabet -----------------------------------------------------------------
    @property
    def n_symbols(self) -> int:
        """Return the alphabet size m."""
        return len(self.symbols)

    @property
    def has_source(self) -> bool:
        """Return whether the task gives the source's contexts and probabilities."""
        return len(self.contexts) > 0

    @property
    def max_depth(self) -> int:
        """Return the length of the longest context (0 when the source is not given)."""
        return max((len(c) for c in self.contexts), default=0)

    def _require_source(self, what: str) -> None:
        """Raise TaskError when the task gives no source, saying what needed it."""
        if not self.has_source:
            raise TaskError(f"task {self.name!r} gives no source: {what} needs its [[contexts]]",
                            path=self.path)

    def index_of(self, symbol: str) -> int:
        """Return the index of a symbol label; raise TaskError if it is not in the alphabet."""
        try:
            return self.symbols.index(symbol)
        except ValueError:
            raise TaskError(f"unknown symbol {symbol!r}; the task's symbols are "
                            f"{', '.join(self.symbols)}", path=self.path) from None

    def encode(self, labels: Iterable[str]) -> np.ndarray:
        """Return the symbol indices of a sequence of labels."""
        return np.array([self.index_of(s) for s in labels], dtype=np.int64)

    def decode(self, indices: Iterable[int]) -> list[str]:
        """Return the labels of a sequence of symbol indices."""
        return [self.symbols[int(i)] for i in indices]

    def context_label(self, context: Sequence[int]) -> str:
        """Return a context as labels joined by '-', oldest first; the root is '*'."""
        return context_label(self.symbols, context)

    # -- the source ---------------------------------------------------------------
    def context_of(self, past: Sequence[int] | Sequence[str]) -> int:
        """Return the index of the context that is a suffix of ``past`` (oldest first)."""
        self._require_source("finding the context of a past")
        idx = [self.index_of(s) if isinstance(s, str) else int(s) for s in past]
        for d in range(min(len(idx), self.max_depth) + 1):
            key = tuple(idx[len(idx) - d:])
            if key in self._lookup:
                return self._lookup[key]
        raise TaskError(f"the past {self.decode(idx)} is too short to determine a context "
                        f"of task {self.name!r} (longest context {self.max_depth})", path=self.path)

    def context_indices(self, x: np.ndarray) -> np.ndarray:
        """Return, for each trial t, the context index used to predict x[t] from x[:t].

        Entry t is -1 where x[:t] is too short to determine a context.
        """
        self._require_source("the context of each trial")
        x = np.asarray(x, dtype=np.int64)
        n, d = len(x), self.max_depth
        lagged = np.full((n, d), -1, dtype=np.int64)  # column j: the symbol j+1 trials back
        for j in range(d):
            lagged[j + 1:, j] = x[: n - j - 1]
        return self._contexts_of_lagged(lagged)

    def _contexts_of_lagged(self, lagged: np.ndarray) -> np.ndarray:
        """Return the context index of each row of lags (column j = symbol j+1 back, -1 = none).

        Walks the tree one depth level at a time, vectorised over rows: the
        suffix of length d is coded as sum_j (s_j + 1)(m+1)^j, unique over all
        depths, and matched against the contexts' codes.
        """
        n = lagged.shape[0]
        m = self.n_symbols
        out = np.full(n, -1, dtype=np.int64)
        code = np.zeros(n, dtype=np.int64)
        undecided = np.ones(n, dtype=bool)
        by_depth: dict[int, list[tuple[int, int]]] = {}
        for i, c in enumerate(self.contexts):
            by_depth.setdefault(len(c), []).append((_suffix_code(c, m), i))
        for d in range(self.max_depth + 1):
            if d > 0:
                lag = lagged[:, d - 1]
                undecided &= lag >= 0
                code = code + (lag + 1) * (m + 1) ** (d - 1)
            if d not in by_depth:
                continue
            keys, vals = np.array(sorted(by_depth[d])).T
            pos = np.clip(np.searchsorted(keys, code), 0, len(keys) - 1)
            hit = undecided & (keys[pos] == code)
            out[hit] = vals[pos[hit]]
            undecided &= ~hit
        return out

    def next_proba(self, x: np.ndarray) -> np.ndarray:
        """Return the true probabilities of x[t] given x[:t], shape (len(x), m); 1/m rows where undetermined."""
        self._require_source("the true next-symbol probabilities")
        ctx = self.context_indices(x)
        out = np.full((len(ctx), self.n_symbols), 1.0 / self.n_symbols)
        known = ctx >= 0
        out[known] = self.next_probs[ctx[known]]
        return out

    def sample(self, n: int, seed: int | np.random.Generator | None = None,
               initial: Sequence[int] | None = None) -> np.ndarray:
        """Return a stimulus sequence of ``n`` symbol indices drawn from the source.

        The first ``max_depth`` symbols come from ``initial`` when given, else
        from the stationary distribution over pasts of maximal depth (chosen
        among recurrent classes in proportion to nothing: the class is drawn
        uniformly when there are several).
        """
        self._require_source("sampling a stimulus sequence")
        rng = np.random.default_rng(seed)
        d = self.max_depth
        if initial is None:
            initial = self._draw_initial(rng)
        past = [int(s) for s in initial][-d:] if d else []
        if len(past) < d:
            raise TaskError(f"initial past must hold {d} symbols, got {len(past)}", path=self.path)
        x = np.empty(n + d, dtype=np.int64)
        x[:d] = past
        table = self._state_contexts()  # context of every full past, coded oldest-first base m
        cum = np.cumsum(self.next_probs, axis=1)
        u = rng.random(n)
        m, top = self.n_symbols, self.n_symbols ** max(d - 1, 0)
        state = int(sum(v * m ** (d - 1 - j) for j, v in enumerate(past)))
        for t in range(d, n + d):  # sequential by nature: each draw sets the next context
            row = cum[table[state]]
            x[t] = min(int(np.searchsorted(row, u[t - d], side="right")), m - 1)
            if d:
                state = (state % top) * m + int(x[t])
        return x[d:]

    def entropy_rate(self) -> EntropyRate:
        """Return the exact entropy rate in bits per symbol.

        H = sum_s pi(s) H(P(. | s)) over pasts s of maximal depth D, with pi the
        stationary distribution of the chain s -> s[1:] + a (Cover & Thomas,
        2006, Theorem 4.2.4, applied to the D-th order chain). Recurrent classes
        are the strongly connected components with no edge leaving them.
        """
        self._require_source("the entropy rate")
        states, trans = self._past_chain()
        n_comp, labels = connected_components(trans, directed=True, connection="strong")
        coo = trans.tocoo()
        leaving = np.zeros(n_comp, dtype=bool)
        cross = labels[coo.row] != labels[coo.col]
        leaving[labels[coo.row[cross]]] = True
        h_state = _entropy_bits(self.next_probs)[self._state_contexts()]
        classes = []
        for comp in np.flatnonzero(~leaving):
            members = np.flatnonzero(labels == comp)
            pi = _stationary(trans[members][:, members])
            classes.append(RecurrentClass(
                pasts=tuple(tuple(int(v) for v in states[i]) for i in members),
                stationary=pi,
                entropy_rate_bits=float(pi @ h_state[members]),
            ))
        bits = classes[0].entropy_rate_bits if len(classes) == 1 else math.nan
        return EntropyRate(bits=bits, classes=tuple(classes))

    def to_frame(self) -> "pd.DataFrame":
        """Return the tree as a tidy table: one row per context, columns context, depth, p_<symbol>."""
        import pandas as pd

        table = pd.DataFrame({"context": [self.context_label(c) for c in self.contexts],
                              "depth": [len(c) for c in self.contexts]})
        for j, s in enumerate(self.symbols):
            table[f"p_{s}"] = self.next_probs[:, j]
        return table

    def describe(self) -> str:
        """Return a short plain-text account of the task: alphabet, response, contexts, entropy rate."""
        source = (f"{plural(len(self.contexts), 'context')}, longest {self.max_depth}"
                  if self.has_source else "source not given")
        lines = [f"task {self.name!r}: {plural(self.n_symbols, 'symbol')} "
                 f"({', '.join(self.symbols)}), {source}"
                 + (f", {self.block_length} trials per block" if self.block_length else "")]
        if self.description:
            lines.append(self.description)
        lines.append(f"response: {self.response}, {RESPONSES[self.response]}")
        if not self.has_source:
            return "\n".join(lines)
        table = self.to_frame()
        probs = [f"p_{s}" for s in self.symbols]
        table[probs] = table[probs].map(lambda v: number(v, "g"))
        lines += ["", table.to_string(index=False), ""]
        try:
            rate = self.entropy_rate()
        except TaskError as err:
            lines.append(f"entropy rate not computed: {err}")
            return "\n".join(lines)
        if rate.irreducible:
            lines.append(f"entropy rate: {number(rate.bits)} bits per symbol "
                         f"(maximum {number(math.log2(self.n_symbols))})")
        else:
            lines.append(f"the source has {len(rate.classes)} recurrent classes; the entropy "
                         "rate depends on where it starts:")
            for c in rate.classes:
                pasts = ", ".join(self.context_label(p) for p in c.pasts[:6])
                more = " ..." if len(c.pasts) > 6 else ""
                lines.append(f"  pasts {pasts}{more}: {number(c.entropy_rate_bits)} bits per symbol")
        return "\n".join(lines)

    # -- helpers ------------------------------------------------------------------
    def _pasts(self) -> np.ndarray:
        """Return every past of maximal depth D as rows (oldest first), in base-m code order."""
        m, d = self.n_symbols, self.max_depth
        n_states = m**d
        if n_states > MAX_CHAIN_STATES:
            raise TaskError(f"the chain on pasts of depth {d} over {m} symbols has {n_states} "
                            f"states, more than {MAX_CHAIN_STATES}", path=self.path)
        codes = np.arange(n_states)
        return np.stack([(codes // m ** (d - 1 - j)) % m for j in range(d)], axis=1) \
            if d else np.zeros((1, 0), dtype=np.int64)

    def _state_contexts(self) -> np.ndarray:
        """Return the context index of every past of maximal depth, in base-m code order."""
        return self._contexts_of_lagged(self._pasts()[:, ::-1])

    def _past_chain(self) -> tuple[np.ndarray, sparse.csr_matrix]:
        """Return the pasts of depth D and the sparse transition matrix s -> s[1:] + a."""
        m = self.n_symbols
        states = self._pasts()
        n_states = len(states)
        codes = np.arange(n_states)
        probs = self.next_probs[self._state_contexts()]
        rows = np.repeat(codes, m)
        cols = ((codes * m) % n_states)[:, None] + np.arange(m)[None, :] if self.max_depth \
            else np.zeros((1, m), dtype=np.int64)
        vals = probs.ravel()
        keep = vals > 0
        trans = sparse.csr_matrix((vals[keep], (rows[keep], cols.ravel()[keep])),
                                  shape=(n_states, n_states))
        return states, trans

    def _draw_initial(self, rng: np.random.Generator) -> list[int]:
        if self.max_depth == 0:
            return []
        classes = self.entropy_rate().classes
        cls = classes[int(rng.integers(len(classes)))]
        i = int(rng.choice(len(cls.pasts), p=cls.stationary))
        return list(cls.pasts[i])


def shipped_tasks() -> dict[str, Path]:
    """Return the task files shipped with foretell, by name (the file stem).

    Installed, they are package data (``foretell/tasks``); in a source
    checkout they are the repository's ``tasks/`` folder.
    """
    for folder in (Path(str(importlib.resources.files("foretell"))) / "tasks",
                   Path(__file__).resolve().parents[2] / "tasks"):
        if folder.is_dir():
            return {p.stem: p for p in sorted(folder.glob("*.toml"))}
    return {}


def load_task(path: str | Path) -> Task:
    """Return the validated task described by a TOML task file.

    ``path`` is a file, or the name of a task shipped with foretell (e.g.
    ``"lantern-relay"``, see :func:`shipped_tasks`) when no such file exists.
    Problems name the file, the key and, where it can be found, the line.
    """
    p = Path(path)
    if not p.exists() and p.parent == Path(".") and p.stem in shipped_tasks():
        p = shipped_tasks()[p.stem]
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        names = ", ".join(shipped_tasks()) or "none"
        raise TaskError(f"task file not found (tasks shipped with foretell: {names})",
                        path=str(p)) from None
    except OSError as exc:
        raise TaskError(f"cannot read the task file: {exc.strerror or exc}", path=str(p)) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise TaskError("not UTF-8 text: a task file is TOML; save it as UTF-8", path=str(p),
                        line=raw[:exc.start].count(b"\n") + 1) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise TaskError(f"not valid TOML: {exc}", path=str(p),
                        line=_toml_error_line(str(exc))) from None
    return _parse_task(data, str(p), text)


# -- validation ---------------------------------------------------------------------
def _parse_task(data: dict[str, Any], path: str | None, text: str | None = None) -> Task:
    """Return the task of a parsed task file, or raise TaskError with every problem found.

    ``text`` is the file's text, used to name the line of each problem.
    """
    problems: list[Problem] = []
    line_of = _KeyLines(text)

    def bad(msg: str, key: str | None = None) -> None:
        problems.append(Problem(msg, path=path, line=line_of(key), column=key))

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
        bad(f"'response' must be one of {', '.join(map(repr, RESPONSES))}, got {response!r}",
            "response")
        response = "guess"
    symbols = data.get("symbols")
    if not isinstance(symbols, list) or len(symbols) < 2:
        bad("'symbols' must be a list of at least two labels", "symbols")
        raise TaskError(problems)
    if not all(isinstance(s, str) for s in symbols):
        bad(f"'symbols' must be a list of text labels, e.g. [\"up\", \"down\"]; got {symbols!r}",
            "symbols")
        raise TaskError(problems)
    for s in symbols:
        if (why := symbol_label_problem(s)) is not None:
            bad(why, "symbols")
    if problems:
        raise TaskError(problems)
    if len(set(symbols)) != len(symbols):
        dupes = sorted({s for s in symbols if symbols.count(s) > 1})
        bad(f"symbol labels must be unique; repeated: {', '.join(dupes)}", "symbols")
    raw_contexts = data.get("contexts", [])
    if "contexts" in data and (not isinstance(raw_contexts, list) or not raw_contexts):
        bad("'contexts' must be one or more [[contexts]] tables; leave it out when the task "
            "does not give the source", "contexts")
    if problems:
        raise TaskError(problems)

    index = {s: i for i, s in enumerate(symbols)}
    contexts: list[tuple[int, ...]] = []
    rows: list[list[float]] = []
    for k, ctx in enumerate(raw_contexts, start=1):
        key = f"contexts[{k}]"
        if not isinstance(ctx, dict):
            bad("must be a table with 'past' and 'next'", key)
            continue
        past, nxt = ctx.get("past"), ctx.get("next")
        label = f"{key} (past = {past!r})"
        if not isinstance(past, list) or not all(isinstance(s, str) for s in past):
            bad(f"{label}: 'past' must be a list of symbol labels (oldest first)", f"{key}.past")
            continue
        unknown = [s for s in past if s not in index]
        if unknown:
            bad(f"{label}: unknown {_symbols(unknown)} in 'past'", f"{key}.past")
            continue
        if not isinstance(nxt, dict):
            bad(f"{label}: 'next' must be a table of symbol = probability", f"{key}.next")
            continue
        unknown = [s for s in nxt if s not in index]
        missing = [s for s in symbols if s not in nxt]
        if unknown:
            bad(f"{label}: unknown {_symbols(unknown)} in 'next'", f"{key}.next")
        if missing:
            bad(f"{label}: 'next' gives no probability for {', '.join(map(repr, missing))}",
                f"{key}.next")
        if unknown or missing:
            continue
        vals = [nxt[s] for s in symbols]
        if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals):
            bad(f"{label}: probabilities must be numbers", f"{key}.next")
            continue
        outside = [f"{s} = {v!r}" for s, v in zip(symbols, vals)
                   if not (math.isfinite(v) and 0 <= v <= 1)]
        if outside:
            negative = " (negative probability)" if any(v < 0 for v in vals) else ""
            bad(f"{label}: {', '.join(outside)}{negative}: every probability must be a finite "
                "number in [0, 1]", f"{key}.next")
            continue
        if abs(sum(vals) - 1.0) > PROB_TOL:
            bad(f"{label}: probabilities sum to {sum(vals):.12g}, not 1 (tolerance {PROB_TOL})",
                f"{key}.next")
            continue
        contexts.append(tuple(index[s] for s in past))
        rows.append([float(v) for v in vals])
    if problems:
        raise TaskError(problems)
    problems.extend(replace(p, line=line_of(p.column)) for p in _tree_problems(contexts, symbols, path))
    if problems:
        raise TaskError(problems)
    return Task(name=name, symbols=tuple(symbols), contexts=tuple(contexts),
                next_probs=np.array(rows, dtype=float).reshape(len(rows), len(symbols)),
                description=description, block_length=block_length, path=path,
                response=response)


class _KeyLines:
    """The line of a task-file key in the file's text: best effort, None when not found.

    Keys are top-level names ("symbols"), "contexts[k]" (the k-th
    ``[[contexts]]`` table) or "contexts[k].past" / "contexts[k].next".
    """

    _TABLE = re.compile(r"\s*\[")
    _CONTEXTS = re.compile(r"\s*\[\[\s*contexts\s*\]\]")

    def __init__(self, text: str | None) -> None:
        self.lines = text.splitlines() if text else []

    def __call__(self, key: str | None) -> int | None:
        if key is None or not self.lines:
            return None
        match = re.fullmatch(r"contexts\[(\d+)\](?:\.(\w+))?", key)
        if match is None:
            return self._assignment(key.split(".", 1)[0], 0)
        tables = [i for i, line in enumerate(self.lines) if self._CONTEXTS.match(line)]
        k = int(match.group(1))
        if len(tables) < k:  # contexts written as an inline array: the line of 'contexts ='
            return self._assignment("contexts", 0)
        start = tables[k - 1]
        inner = self._assignment(match.group(2), start + 1) if match.group(2) else None
        return inner or start + 1

    def _assignment(self, key: str, start: int) -> int | None:
        """Return the line of ``key = ...`` in the table that begins at line index ``start``."""
        pattern = re.compile(rf"\s*(?:{re.escape(key)}|\"{re.escape(key)}\")\s*=")
        for i in range(start, len(self.lines)):
            if self._TABLE.match(self.lines[i]):
                return None
            if pattern.match(self.lines[i]):
                return i + 1
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


# -- small numerical helpers ---------------------------------------------------------
def _suffix_code(context: Sequence[int], m: int) -> int:
    """Return a unique integer for a suffix: sum over lag j (1 = newest) of (s+1)(m+1)^(j-1)."""
    return sum((s + 1) * (m + 1) ** j for j, s in enumerate(reversed(context)))


def _entropy_bits(probs: np.ndarray) -> np.ndarray:
    """Return the Shannon entropy in bits of each row (0 log 0 = 0)."""
    p = np.asarray(probs, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(p > 0, -p * np.log2(p), 0.0)
    return terms.sum(axis=-1) + 0.0  # -p log p of p = 1 is a negative zero


def _stationary(trans: sparse.csr_matrix) -> np.ndarray:
    """Return the stationary distribution of an irreducible stochastic matrix.

    Solves pi (P - I) = 0 with one balance equation replaced by sum(pi) = 1
    (a standard way to make the system non-singular; common practice).
    """
    n = trans.shape[0]
    if n == 1:
        return np.ones(1)
    a = (trans.T - sparse.identity(n, format="csr")).tolil()
    a[n - 1, :] = np.ones(n)
    b = np.zeros(n)
    b[-1] = 1.0
    pi = spsolve(a.tocsc(), b)
    pi = np.clip(np.atleast_1d(pi), 0.0, None)
    return pi / pi.sum()


def _symbols(labels: list[str]) -> str:
    """Return "symbol 'a'" or "symbols 'a', 'b'"."""
    return ("symbol " if len(labels) == 1 else "symbols ") + ", ".join(map(repr, labels))


def _toml_error_line(message: str) -> int | None:
    marker = "(at line "
    if marker in message:
        tail = message.split(marker, 1)[1]
        digits = tail.split(",", 1)[0]
        if digits.isdigit():
            return int(digits)
    return None
