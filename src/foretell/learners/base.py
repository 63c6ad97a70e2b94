"""The learner contract and the vectorised kernels every learner shares.

A learner turns one session's stimulus sequence ``x`` (ints in [0, m)) into a
predictive distribution for every trial: row t predicts x[t] from x[:t]. The
kernels here group trials by the context (node) they are predicted from and
compute, for every trial at once, the counts each node had seen before it.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
from scipy.signal import lfilter
from scipy.special import gammaln

from foretell.errors import UsageError

MAX_CODE_DEPTH = 20  # and m**depth must stay inside int64 for the base-m context codes
# Leaky counts: up to this many node x symbol streams, one dense linear filter over the whole
# session beats the sparse scan (measured on 100,000 trials: lfilter ~0.6 ms per stream, the
# scan 10-15 ms whatever the depth; benchmarks/learners.py).
DENSE_STREAMS = 12


def check_sequence(x: np.ndarray, n_symbols: int) -> np.ndarray:
    """Return ``x`` as a 1-D int64 array after checking it holds symbol indices in [0, n_symbols)."""
    if isinstance(n_symbols, bool) or not isinstance(n_symbols, (int, np.integer)) or n_symbols < 2:
        raise UsageError(f"n_symbols must be a whole number >= 2, got {n_symbols!r}")
    arr = np.asarray(x)
    if arr.ndim != 1:
        raise UsageError(f"x must be one session as a 1-D sequence of symbol indices, "
                         f"got an array of shape {arr.shape}")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        if not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
            raise UsageError("x must hold whole-number symbol indices")
    arr = arr.astype(np.int64, copy=False)
    if arr.size and (arr.min() < 0 or arr.max() >= n_symbols):
        raise UsageError(f"x must hold symbol indices in [0, {n_symbols}), got values from "
                         f"{arr.min()} to {arr.max()}")
    return arr


def check_hyper(name: str, value: float, low: float, high: float, *, low_open: bool = False,
                high_open: bool = False) -> None:
    """Raise UsageError unless ``value`` is a finite number in the stated interval."""
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)
    ok = ok and np.isfinite(value)
    if ok:
        ok = (value > low if low_open else value >= low) and (value < high if high_open else value <= high)
    if not ok:
        interval = f"{'(' if low_open else '['}{low}, {high}{')' if high_open else ']'}"
        raise UsageError(f"{name} must be a number in {interval}, got {value!r}")


def check_depth(name: str, value: int) -> None:
    """Raise UsageError unless ``value`` is a whole number in [0, MAX_CODE_DEPTH]."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) \
            or not 0 <= value <= MAX_CODE_DEPTH:
        raise UsageError(f"{name} must be a whole number in [0, {MAX_CODE_DEPTH}], got {value!r}")


def suffix_codes(x: np.ndarray, n_symbols: int, depth: int, first: int | None = None) -> np.ndarray:
    """Return, for each trial t, the base-m code of the context x[t-depth:t]; -1 where t < first.

    ``first`` (default and minimum: depth) is the first trial given a code.
    code = sum_j x[t-depth+j] * m**(depth-1-j) (oldest symbol most significant),
    so the code of a context's parent (its newest depth-1 symbols) is
    ``code % m**(depth-1)`` and a child prepending the older symbol a has code
    ``a * m**depth + code``.
    """
    if n_symbols ** depth >= 2**62:
        raise UsageError(f"contexts of depth {depth} over {n_symbols} symbols are too many to "
                         f"code ({n_symbols}**{depth} >= 2**62); use a smaller depth")
    n = len(x)
    first = depth if first is None else max(first, depth)
    codes = np.full(n, -1, dtype=np.int64)
    if n <= first:
        return codes
    acc = np.zeros(n - first, dtype=np.int64)
    for lag in range(depth, 0, -1):  # lag = how many trials back; the oldest lag is most significant
        acc = acc * n_symbols + x[first - lag: n - lag]
    codes[first:] = acc
    return codes


@dataclass(frozen=True, eq=False)
class Grouping:
    """Trials grouped by node: the sort that makes each node's trials contiguous.

    ``order[j]`` is the trial of sorted position j (trials of one node in time
    order), ``first[j]`` the sorted position where that node's run starts,
    ``symbols[j]`` the symbol counted at that trial, ``n_symbols`` the alphabet
    size and ``n_trials`` the length of the session. Only trials with a node
    (key >= 0) and a counted symbol (>= 0) are included.
    """

    order: np.ndarray
    first: np.ndarray
    symbols: np.ndarray
    n_symbols: int
    n_trials: int

    @classmethod
    def build(cls, keys: np.ndarray, symbols: np.ndarray, n_symbols: int) -> "Grouping":
        """Return the grouping of the trials with ``keys >= 0`` and ``symbols >= 0``."""
        used = np.flatnonzero((keys >= 0) & (symbols >= 0))
        node = keys[used]
        if len(node):  # small unsigned keys get numpy's O(n) radix sort for stable sorting
            node = node.astype(np.min_scalar_type(int(node.max())), copy=False)
        order = used[np.argsort(node, kind="stable")]
        sorted_keys = keys[order]
        start = np.ones(len(order), dtype=bool)
        np.not_equal(sorted_keys[1:], sorted_keys[:-1], out=start[1:])
        first = np.maximum.accumulate(np.where(start, np.arange(len(order)), 0))
        sym = symbols[order]
        for arr in (order, first, sym):
            arr.setflags(write=False)
        return cls(order=order, first=first, symbols=sym, n_symbols=n_symbols, n_trials=len(keys))

    def exclusive_cumsum(self, values: np.ndarray) -> np.ndarray:
        """Return, at each sorted position, the sum of 1-D ``values`` over the node's earlier trials.

        ``values`` is in sorted order. Exact for integer-valued input below
        2**53; other floats lose at most a few eps times the running total.
        """
        total = np.cumsum(values)
        total -= values
        return total - total[self.first]

    @cached_property
    def prior_counts(self) -> np.ndarray:
        """Return (n_trials, m) counts of each symbol at the trial's node before it, in trial order.

        Exact (cumulative sums of indicators, one contiguous pass per symbol);
        rows of trials outside the grouping are 0. Computed once, read-only.
        """
        counts = np.zeros((self.n_trials, self.n_symbols))
        in_order = np.empty((len(self.order), self.n_symbols))
        for a in range(self.n_symbols):  # m passes, each vectorised over all trials
            in_order[:, a] = self.exclusive_cumsum((self.symbols == a).astype(float))
        counts[self.order] = in_order
        counts.setflags(write=False)
        return counts

    def leaky_prior_counts(self, leak: float) -> np.ndarray:
        """Return (n_trials, m) exponentially forgotten counts before each trial, in trial order.

        count_t = (1 - leak) count_{t-1} + new_t for every node on every trial,
        so before trial t the observation of trial s weighs (1 - leak)^(t-1-s).
        With few node x symbol streams (<= DENSE_STREAMS) this is one
        first-order linear filter over all streams in session time
        (scipy.signal.lfilter, y_t = (1 - leak) y_{t-1} + new_{t-1}); otherwise
        a sparse scan along each node's own trials (:meth:`_leaky_scan`). Both
        are the plain recursion up to rounding. Rows of trials outside the
        grouping are 0.
        """
        m, n = self.n_symbols, len(self.order)
        counts = np.zeros((self.n_trials, m))
        if n == 0:
            return counts
        node = np.cumsum(self.first == np.arange(n)) - 1  # dense node index of each sorted position
        n_streams = (node[-1] + 1) * m
        if n_streams <= DENSE_STREAMS:
            new = np.zeros((n_streams, self.n_trials))
            new[node * m + self.symbols, self.order] = 1.0
            decayed = lfilter([0.0, 1.0], [1.0, -(1.0 - leak)], new, axis=1)
            counts[self.order] = decayed.reshape(-1, m, self.n_trials)[node, :, self.order]
        else:
            counts[self.order] = self._leaky_scan(leak)
        return counts

    def _leaky_scan(self, leak: float) -> np.ndarray:
        """Return (len(order), m) forgotten counts before each trial, in sorted order, by a scan.

        Along one node's trials t_1 < t_2 < ... the counts obey the first-order
        recursion z_j = g_j z_{j-1} + g_j/(1-leak) e_{y_{j-1}} with
        g_j = (1-leak)^(t_j - t_{j-1}) (g = 0 at a node's first trial), solved
        for all trials at once by a parallel prefix scan over the pairs (g, u)
        (composition (g2, u2) o (g1, u1) = (g2 g1, g2 u1 + u2); Hillis & Steele,
        1986, from memory): ceil(log2 L) vectorised passes, L the longest run
        whose decay has not underflowed to exactly 0, so nothing is truncated.
        """
        r = 1.0 - leak
        n = len(self.order)
        g = np.zeros(n)
        u = np.zeros((n, self.n_symbols))
        cont = np.arange(1, n)[self.first[1:] != np.arange(1, n)]  # positions continuing a run
        gap = self.order[cont] - self.order[cont - 1]
        g[cont] = r ** gap
        u[cont, self.symbols[cont - 1]] = r ** (gap - 1)
        step = 1
        while step < n and g[step:].any():
            u[step:] += g[step:, None] * u[:-step]  # overlapping operands: numpy buffers them
            g[step:] *= g[:-step]
            step *= 2
        return u


def dirichlet_predict(counts: np.ndarray, alpha: float) -> np.ndarray:
    """Return (n_a + alpha) / (n + m alpha) row-wise: the Dirichlet(alpha) posterior predictive.

    alpha = 1/2 is the Krichevsky-Trofimov estimator (Krichevsky & Trofimov,
    1981), alpha = 1 Laplace's rule of succession. Rows of zero counts are
    uniform.
    """
    out = counts + alpha
    out /= out.sum(axis=-1, keepdims=True)  # sum_a (n_a + alpha) = n + m alpha
    return out


def dirichlet_log_marginal(counts: np.ndarray, alpha: float) -> np.ndarray:
    """Return log P_e of the count rows: the sequential Dirichlet(alpha) marginal likelihood.

    P_e = Gamma(m alpha) / Gamma(n + m alpha) * prod_a Gamma(n_a + alpha) / Gamma(alpha)
    (for m = 2, alpha = 1/2 the KT estimate; Willems, Shtarkov & Tjalkens, 1995).
    """
    counts = np.asarray(counts, dtype=float)
    m = counts.shape[-1]
    return (gammaln(m * alpha) - gammaln(counts.sum(axis=-1) + m * alpha)
            + (gammaln(counts + alpha) - gammaln(alpha)).sum(axis=-1))


class Learner:
    """The learner contract: ``depth``, ``log_predict_proba``, ``predict_proba``, ``log_evidence``.

    Subclasses are frozen dataclasses implementing ``depth`` and one of
    ``_predict(x, m)`` or ``_log_predict(x, m)`` (x already checked; each
    defaults to the other); rows t < depth must be uniform.
    """

    @property
    def depth(self) -> int:  # pragma: no cover - every subclass overrides it
        raise NotImplementedError

    def _predict(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        return np.exp(self._log_predict(x, n_symbols))

    def _log_predict(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        with np.errstate(divide="ignore"):
            return np.log(self._predict(x, n_symbols))

    def log_predict_proba(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        """Return log P(x[t] = a | x[:t]) as an array (len(x), m); rows t < depth are log(1/m)."""
        return self._log_predict(check_sequence(x, n_symbols), int(n_symbols))

    def predict_proba(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        """Return P(x[t] = a | x[:t]) as an array (len(x), m); rows t < depth are uniform 1/m."""
        return self._predict(check_sequence(x, n_symbols), int(n_symbols))

    def log_evidence(self, x: np.ndarray, n_symbols: int, start: int | None = None) -> float:
        """Return log P(x[start:] | x[:start]) (natural log); ``start`` defaults to ``depth``.

        The prequential sum: sum over t >= start of log P(x[t] | x[:t]) (Dawid,
        1984). Without leak it is the exact marginal likelihood of the counted
        trials.
        """
        x = check_sequence(x, n_symbols)
        start = self.depth if start is None else start
        if isinstance(start, bool) or not isinstance(start, (int, np.integer)) \
                or not 0 <= start <= len(x):
            raise UsageError(f"start must be a whole number in [0, {len(x)}], got {start!r}")
        logp = self._log_predict(x, int(n_symbols))
        t = np.arange(start, len(x))
        return float(logp[t, x[t]].sum())
