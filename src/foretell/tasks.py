"""Tasks: the stimulus source of an experiment as a context tree, and where task files are found."""

from __future__ import annotations

import importlib.resources
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable, Sequence

import numpy as np
from scipy import sparse

from .entropy import EntropyRate, chain_entropy_rate, entropy_bits, stationary_mean
from .errors import TaskError, UsageError
from .labels import context_label
from .taskfile import RESPONSES, TaskFields, check_task_data, read_task_file
from .text import number, plural
from .validation import check_count, check_seed

if TYPE_CHECKING:
    import pandas as pd

MAX_CHAIN_STATES = 2_000_000
"""The most pasts of maximal depth that the entropy-rate chain may hold."""


@dataclass(frozen=True, eq=False)
class Task:
    """A stimulus source: a complete context tree over an ordered alphabet.

    Use :func:`load_task` or :meth:`from_dict` to build one: both validate.

    Attributes
    ----------
    name : str
    symbols : tuple of str
        The alphabet, in the order of the symbol indices 0..m-1.
    contexts : tuple of tuple of int
        Each context as symbol indices, oldest first (``()`` is the root of a
        memoryless source). Empty when the task gives only the alphabet (the
        source is not given, e.g. every participant saw their own sequence):
        then ``has_source`` is False, ``max_depth`` is 0, and the methods that
        need the source raise TaskError.
    next_probs : numpy.ndarray
        Row i is the next-symbol distribution of ``contexts[i]`` (read-only).
    description : str
    block_length : int or None
        Trials per block, when the task file gives it.
    path : str or None
        The task file it was read from.
    response : str
        The design (see :data:`foretell.taskfile.RESPONSES`): "guess" (the
        default) or "reaction".
    notes : tuple of str
        What a reader should know of where the task came from (e.g. that a
        file in the current folder was used instead of the shipped task of the
        same name).

    Examples
    --------
    >>> task = Task.from_dict({"name": "coin", "symbols": ["h", "t"],
    ...                        "contexts": [{"past": [], "next": {"h": 0.5, "t": 0.5}}]})
    >>> task.n_symbols, task.max_depth
    (2, 0)
    """

    name: str
    symbols: tuple[str, ...]
    contexts: tuple[tuple[int, ...], ...]
    next_probs: np.ndarray
    description: str = ""
    block_length: int | None = None
    path: str | None = None
    response: str = "guess"
    notes: tuple[str, ...] = ()
    _lookup: dict[tuple[int, ...], int] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_lookup", {c: i for i, c in enumerate(self.contexts)})
        probs = np.array(self.next_probs, dtype=float).reshape(len(self.contexts), len(self.symbols))
        probs += 0.0  # a negative zero prints as "-0.0"
        probs.setflags(write=False)
        object.__setattr__(self, "next_probs", probs)

    # -- construction -------------------------------------------------------------
    @classmethod
    def from_dict(cls, data: Mapping[str, Any], path: str | None = None) -> "Task":
        """Return a validated task from a parsed task-file mapping (see tasks/ for examples).

        Parameters
        ----------
        data : mapping
            The keys of a task file (:data:`foretell.taskfile.KEYS`).
        path : str, optional
            Where the mapping came from, for messages.

        Returns
        -------
        Task

        Raises
        ------
        TaskError
            Listing every problem (see :func:`foretell.taskfile.check_task_data`).
        """
        return _build(check_task_data(data, path), path)

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
        """Return the index of a symbol label.

        Raises
        ------
        TaskError
            When ``symbol`` is not in the alphabet.
        """
        try:
            return self.symbols.index(symbol)
        except ValueError:
            raise TaskError(f"unknown symbol {symbol!r}; the task's symbols are "
                            f"{', '.join(self.symbols)}", path=self.path) from None

    def encode(self, labels: Iterable[str]) -> np.ndarray:
        """Return the symbol indices (int64) of a sequence of labels.

        Raises
        ------
        TaskError
            At the first label that is not in the alphabet.
        """
        if isinstance(labels, str):
            raise UsageError(f"encode takes a sequence of symbol labels, not one string ({labels!r})")
        return np.array([self.index_of(s) for s in labels], dtype=np.int64)

    def decode(self, indices: Iterable[int]) -> list[str]:
        """Return the labels of a sequence of symbol indices.

        Raises
        ------
        UsageError
            When an index is not a whole number in 0..m-1.
        """
        return [self.symbols[i] for i in self._indices(list(indices), "indices")]

    def _indices(self, x: object, name: str = "x") -> np.ndarray:
        """Return ``x`` as a 1-D int64 array of symbol indices; UsageError unless every entry is in 0..m-1."""
        arr = np.asarray(x)
        whole = arr.size == 0 or np.issubdtype(arr.dtype, np.integer) or (
            np.issubdtype(arr.dtype, np.floating) and np.isfinite(arr).all() and (arr == np.round(arr)).all())
        if arr.ndim != 1 or not whole or (arr.size and (arr.min() < 0 or arr.max() >= self.n_symbols)):
            raise UsageError(f"{name} must be a 1-D sequence of symbol indices, whole numbers in "
                             f"0..{self.n_symbols - 1} (task {self.name!r})")
        return arr.astype(np.int64)

    def context_label(self, context: Sequence[int]) -> str:
        """Return a context as labels joined by '-', oldest first; the root is '*'."""
        return context_label(self.symbols, context)

    # -- the source ---------------------------------------------------------------
    def context_of(self, past: Sequence[int] | Sequence[str]) -> int:
        """Return the index of the context that is a suffix of ``past``.

        Parameters
        ----------
        past : sequence of str or int
            Symbol labels or indices, oldest first.

        Returns
        -------
        int

        Raises
        ------
        TaskError
            When the task gives no source, or ``past`` is too short to
            determine a context.
        """
        self._require_source("finding the context of a past")
        idx = [self.index_of(s) if isinstance(s, str) else int(s) for s in past]
        idx = self._indices(idx, "past").tolist()
        for d in range(min(len(idx), self.max_depth) + 1):
            key = tuple(idx[len(idx) - d:])
            if key in self._lookup:
                return self._lookup[key]
        raise TaskError(f"the past {self.decode(idx)} is too short to determine a context "
                        f"of task {self.name!r} (longest context {self.max_depth})", path=self.path)

    def context_indices(self, x: np.ndarray) -> np.ndarray:
        """Return, for each trial t, the context index used to predict x[t] from x[:t].

        Parameters
        ----------
        x : array of int
            One sequence of symbol indices.

        Returns
        -------
        numpy.ndarray of int64
            Entry t is -1 where x[:t] is too short to determine a context.

        Raises
        ------
        TaskError
            When the task gives no source.
        UsageError
            When ``x`` holds anything but symbol indices.
        """
        self._require_source("the context of each trial")
        x = self._indices(x)
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
        """Return the true probabilities of x[t] given x[:t], shape (len(x), m); 1/m rows where undetermined.

        Raises
        ------
        TaskError
            When the task gives no source.
        UsageError
            When ``x`` holds anything but symbol indices.
        """
        self._require_source("the true next-symbol probabilities")
        ctx = self.context_indices(x)
        out = np.full((len(ctx), self.n_symbols), 1.0 / self.n_symbols)
        known = ctx >= 0
        out[known] = self.next_probs[ctx[known]]
        return out

    def impossible(self, x: np.ndarray) -> np.ndarray:
        """Return the trials t at which x[t] cannot occur after x[:t]: its probability under the source is 0.

        Trials whose context is not yet determined are never impossible.

        Parameters
        ----------
        x : array of int
            One sequence of symbol indices.

        Returns
        -------
        numpy.ndarray of int64
            The positions, ascending.

        Raises
        ------
        TaskError
            When the task gives no source.

        Examples
        --------
        >>> task = Task.from_dict({"name": "alternate", "symbols": ["a", "b"], "contexts": [
        ...     {"past": ["a"], "next": {"a": 0.0, "b": 1.0}},
        ...     {"past": ["b"], "next": {"a": 1.0, "b": 0.0}}]})
        >>> task.impossible(task.encode(["a", "b", "b", "a"])).tolist()
        [2]
        """
        x = self._indices(x)
        ctx = self.context_indices(x)
        t = np.flatnonzero(ctx >= 0)
        return t[self.next_probs[ctx[t], x[t]] == 0]

    def sample(self, n: int, seed: int | np.random.Generator | None = None,
               initial: Sequence[int] | None = None) -> np.ndarray:
        """Return a stimulus sequence of ``n`` symbol indices drawn from the source.

        Parameters
        ----------
        n : int
            How many symbols (>= 0).
        seed : int, numpy.random.Generator or None
            A seed (whole number >= 0), a Generator (used as it is), or None
            for fresh, unrepeatable randomness.
        initial : sequence of int, optional
            The past before the first symbol (at least ``max_depth`` symbol
            indices, oldest first). By default it is drawn from the stationary
            distribution over pasts of maximal depth (the recurrent class is
            drawn uniformly when there are several).

        Returns
        -------
        numpy.ndarray of int64

        Raises
        ------
        TaskError
            When the task gives no source.
        UsageError
            When ``n``, ``seed`` or ``initial`` is not as described.

        Examples
        --------
        >>> load_task("tide-gauge").sample(5, seed=1).shape
        (5,)
        """
        self._require_source("sampling a stimulus sequence")
        n = check_count("n", n, 0)
        rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(
            None if seed is None else check_seed(seed))
        d = self.max_depth
        if initial is None:
            initial = self._draw_initial(rng)
        past = self._indices(list(initial), "initial").tolist()[-d:] if d else []
        if len(past) < d:
            raise UsageError(f"initial must hold at least {d} symbol indices (the longest context), "
                             f"got {len(past)}")
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
        """Return the exact entropy rate in bits per symbol (see :func:`foretell.entropy.chain_entropy_rate`).

        Returns
        -------
        EntropyRate
            One rate when the chain on pasts of maximal depth has a single
            recurrent class, else each class with its own rate.

        Raises
        ------
        TaskError
            When the task gives no source, or the chain would have more than
            :data:`MAX_CHAIN_STATES` states.
        """
        self._require_source("the entropy rate")
        states, trans = self._past_chain()
        return chain_entropy_rate(states, trans, entropy_bits(self.next_probs)[self._state_contexts()])

    def accuracy_ceiling(self) -> float:
        """Return the long-run share of correct guesses of an observer who knows the source.

        sum_s pi(s) max_a P(a | s) over pasts s of maximal depth, pi their
        stationary distribution (:func:`foretell.entropy.stationary_mean`):
        always guessing the most likely next symbol (the Bayes decision
        rule). ``nan`` when the chain has more than one recurrent class.

        Returns
        -------
        float
        """
        self._require_source("the accuracy ceiling")
        _, trans = self._past_chain()
        return stationary_mean(trans, self.next_probs.max(axis=1)[self._state_contexts()])

    def to_frame(self) -> "pd.DataFrame":
        """Return the tree as a tidy table: one row per context, columns context, depth, p_<symbol>.

        Returns
        -------
        pandas.DataFrame
            Empty when the task gives no source.
        """
        import pandas as pd

        table = pd.DataFrame({"context": [self.context_label(c) for c in self.contexts],
                              "depth": [len(c) for c in self.contexts]})
        for j, s in enumerate(self.symbols):
            table[f"p_{s}"] = self.next_probs[:, j]
        return table

    def describe(self) -> str:
        """Return a short plain-text account of the task.

        Returns
        -------
        str
            The alphabet, the notes on where the task came from, the response
            design, the contexts with their probabilities and the entropy rate.
        """
        source = (f"{plural(len(self.contexts), 'context')}, longest {self.max_depth}"
                  if self.has_source else "source not given")
        lines = [f"task {self.name!r}: {plural(self.n_symbols, 'symbol')} "
                 f"({', '.join(self.symbols)}), {source}"
                 + (f", {self.block_length} trials per block" if self.block_length else "")]
        if self.description:
            lines.append(self.description)
        lines += [f"note: {note}" for note in self.notes]
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

    Parameters
    ----------
    path : str or pathlib.Path
        A task file, or the name of a task shipped with foretell (e.g.
        ``"lantern-relay"``, see :func:`shipped_tasks`). A bare name is the
        shipped task unless a file of that name is in the current folder; a
        folder of that name never hides it. When both exist, the task's
        ``notes`` say which was used.

    Returns
    -------
    Task

    Raises
    ------
    TaskError
        When the file is missing, unreadable or invalid; every problem names
        the file, the key and, where it can be found, the line and character.
    UsageError
        When ``path`` is not a path or a name.

    Examples
    --------
    >>> load_task("tide-gauge").symbols
    ('up', 'down')
    """
    file, notes = _locate(path)
    data, text = read_task_file(file)
    return _build(check_task_data(data, str(file), text), str(file), notes)


def _locate(path: object) -> tuple[Path, tuple[str, ...]]:
    """Return the task file that ``path`` names, and a note when a shipped task of that name was not it."""
    if not isinstance(path, (str, Path)) or not str(path).strip():
        raise UsageError(f"task must be a task file (TOML) or the name of a shipped task, got {path!r}")
    p = Path(path)
    shipped = shipped_tasks()
    own = shipped.get(p.stem) if p.parent == Path(".") else None
    if own is not None and p.is_dir():
        return own, (f"'{p}' in this folder is a folder, so the task shipped with foretell under "
                     "that name was used",)
    if own is not None and p.is_file() and p.resolve() != own.resolve():
        return p, (f"task file '{p}' in this folder was used, not the task shipped with foretell "
                   "under the same name",)
    if own is not None and not p.exists():
        return own, ()
    if p.is_dir():
        raise TaskError("is a folder, not a task file", path=str(p))
    if not p.exists():
        raise TaskError(f"task file not found (tasks shipped with foretell: {', '.join(shipped) or 'none'})",
                        path=str(p))
    return p, ()


def _build(fields: TaskFields, path: str | None, notes: tuple[str, ...] = ()) -> Task:
    """Return the Task of checked task-file fields."""
    return Task(name=fields.name, symbols=fields.symbols, contexts=fields.contexts,
                next_probs=np.array(fields.rows, dtype=float).reshape(len(fields.rows), len(fields.symbols)),
                description=fields.description, block_length=fields.block_length, path=path,
                response=fields.response, notes=notes)


# -- small numerical helpers ---------------------------------------------------------
def _suffix_code(context: Sequence[int], m: int) -> int:
    """Return a unique integer for a suffix: sum over lag j (1 = newest) of (s+1)(m+1)^(j-1)."""
    return sum((s + 1) * (m + 1) ** j for j, s in enumerate(reversed(context)))
