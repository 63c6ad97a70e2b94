"""The learner contract and the vectorised kernels every learner shares.

A learner turns one session's stimulus sequence ``x`` (ints in [0, m)) into a
predictive distribution for every trial: row t predicts x[t] from x[:t]. The
kernels here group trials by the context (node) they are predicted from and
compute, for every trial at once, the counts each node had seen before it.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numba
import numpy as np
from scipy.special import gammaln

from foretell.errors import UsageError

MAX_CODE_DEPTH = 20  # and m**depth must stay inside int64 for the base-m context codes


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
        for a in range(self.n_symbols):  # m passes, each vectorised over all trials
            counts[self.order, a] = self.exclusive_cumsum((self.symbols == a).astype(float))
        counts.setflags(write=False)
        return counts

    def leaky_prior_counts(self, leak: float) -> np.ndarray:
        """Return (n_trials, m) exponentially forgotten counts before each trial, in trial order.

        count_t = (1 - leak) count_{t-1} + new_t for every node on every trial,
        so before trial t the observation of trial s weighs r^(t-1-s),
        r = 1 - leak. Along one node's trials t_1 < t_2 < ... the counts obey
        the first-order recursion z_p = r^(t_p - t_{p-1}) z_{p-1} +
        r^(t_p - t_{p-1} - 1) e_{y_{p-1}} (z = 0 at a node's first trial),
        run in one compiled pass over the sorted positions (O(n m); powers by
        libm's pow of the exact integer gaps). Nothing is truncated. When
        1 - leak rounds to 1 these are the plain counts. Rows of trials
        outside the grouping are 0; the array is new and writable.
        """
        r = 1.0 - leak
        if r == 1.0 or len(self.order) == 0:
            return np.array(self.prior_counts)
        counts = np.zeros((self.n_trials, self.n_symbols))
        _leaky_pass(self.order, self.first, self.symbols, r, counts)
        return counts


@numba.njit(cache=True)
def _leaky_pass(order, first, symbols, r, counts):  # pragma: no cover - compiled
    z = np.zeros(counts.shape[1])
    for j in range(order.shape[0]):
        t = order[j]
        if first[j] == j:
            z[:] = 0.0
        else:
            h = r ** (t - order[j - 1] - 1)
            g = r * h
            for a in range(z.shape[0]):
                z[a] *= g
            z[symbols[j - 1]] += h
        counts[t, :] = z


def dirichlet_predict(counts: np.ndarray, alpha: float, out: np.ndarray | None = None) -> np.ndarray:
    """Return (n_a + alpha) / (n + m alpha) row-wise: the Dirichlet(alpha) posterior predictive.

    alpha = 1/2 is the Krichevsky-Trofimov estimator (Krichevsky & Trofimov,
    1981), alpha = 1 Laplace's rule of succession. Rows of zero counts are
    uniform. ``out`` (may be ``counts`` itself) receives the result.
    """
    out = np.add(counts, alpha, out=out)
    total = out[..., 0] + out[..., 1]  # sum_a (n_a + alpha) = n + m alpha, one symbol at a time
    for a in range(2, out.shape[-1]):
        total += out[..., a]
    for a in range(out.shape[-1]):
        out[..., a] /= total
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
    """The learner contract: ``depth``, ``log_next_proba``, ``next_proba``, ``log_evidence``.

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

    def log_next_proba(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        """Return log P(x[t] = a | x[:t]) as an array (len(x), m); rows t < depth are log(1/m)."""
        return self._log_predict(check_sequence(x, n_symbols), int(n_symbols))

    def next_proba(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
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
