"""The learner contract and the vectorised kernels every learner shares.

A learner turns one session's stimulus sequence ``x`` (ints in [0, m)) into a
predictive distribution for every trial: row t predicts x[t] from x[:t]. The
kernels here group trials by the context (node) they are predicted from and
compute, for every trial at once, the counts each node had seen before it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from scipy.special import gammaln

from foretell.errors import UsageError

MAX_CODE_DEPTH = 20  # and m**depth must stay inside int64 for the base-m context codes
# Leaky counts: block length B = max(MIN_SCAN_BLOCK, isqrt(n) // SCAN_BLOCK_DIVISOR) of the
# blocked recursion (B Python-level steps of n/B elements; measured, benchmarks/learners.py).
MIN_SCAN_BLOCK = 8
SCAN_BLOCK_DIVISOR = 4


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
        Along one node's trials t_1 < t_2 < ... (sorted positions p) the counts
        obey the first-order recursion z_p = g_p z_{p-1} + h_p e_{y_{p-1}},
        h_p = r^(t_p - t_{p-1} - 1), g_p = r h_p, r = 1 - leak (g = h = 0 at a
        node's first trial). It is solved blockwise (:meth:`_scan_layout`):
        the plain recursion inside blocks of B positions, run for all blocks
        at once; the carried count Y_c at the end of block c,
        Y_c = P_c Y_{c-1} + (block c's own end count) with P the exact power
        r^(t_end(c) - t_end(c-1)) (0 across nodes), by a parallel prefix scan
        over the blocks (composition (P2, Y2) o (P1, Y1) = (P2 P1, P2 Y1 + Y2);
        Hillis & Steele, 1986, from memory), stopped once every remaining P is
        exactly 0; then z_p += r^(t_p - t_end(c-1)) Y_{c-1}. Nothing is
        truncated: the result is the recursion up to a few roundings per
        position. When 1 - leak rounds to 1 these are the plain counts. Rows of
        trials outside the grouping are 0; the array is new and writable.
        """
        r = 1.0 - leak
        if r == 1.0 or len(self.order) == 0:
            return np.array(self.prior_counts)
        lay = self._scan_layout
        m, n_blocks = self.n_symbols, lay.step_exponent.shape[1]
        h = np.power(r, lay.step_exponent)  # (B, R): exponent inf -> h = 0 where no predecessor
        g = h * r
        z = np.zeros((lay.block, m, n_blocks))
        z.ravel()[lay.previous_symbol_slot] = h.ravel()  # b_p = h_p e_{y_{p-1}}
        tmp = np.empty((m, n_blocks))
        for j in range(1, lay.block):  # the plain recursion, all blocks at once
            np.multiply(z[j - 1], g[j], out=tmp)
            z[j] += tmp
        reach = np.power(r, lay.reach_exponent)  # r^(t_p - t_end(c-1)) within the node, else 0
        carry_gain, carry = reach[-1].copy(), z[-1].copy()
        step = 1
        while step < n_blocks and carry_gain[step:].any():
            carry[:, step:] += carry_gain[step:] * carry[:, :-step]
            carry_gain[step:] *= carry_gain[:-step]
            step *= 2
        z[:, :, 1:] += reach[:, None, 1:] * carry[None, :, :-1]
        counts = np.zeros(self.n_trials * m + 1)  # the last slot takes the padding
        counts[lay.destination] = z.ravel()
        return counts[:-1].reshape(self.n_trials, m)

    @cached_property
    def _scan_layout(self) -> "_ScanLayout":
        """Return the blocked layout of the sorted positions used by :meth:`leaky_prior_counts`.

        Sorted position p = c B + j (padded to B R positions) sits at [j, c] of
        (B, R) arrays, so step j of the recursion is one contiguous row for all
        R blocks. Depends only on the grouping; computed once.
        """
        n, m = len(self.order), self.n_symbols
        block = max(MIN_SCAN_BLOCK, math.isqrt(n) // SCAN_BLOCK_DIVISOR)
        n_blocks = -(-n // block)
        pos = np.arange(block * n_blocks)
        real = pos < n
        pad = np.zeros(len(pos), dtype=np.int64)
        time = pad.copy()
        time[:n] = self.order
        start = pad.copy()
        start[:n] = self.first
        prev_sym = pad.copy()
        prev_sym[1:n] = self.symbols[:-1]
        cont = real & (start < pos)  # p continues its node's run
        step = np.full(len(pos), np.inf)
        step[cont] = time[cont] - time[pos[cont] - 1] - 1
        end_prev = (pos // block) * block - 1  # last position of the previous block
        within = real & (end_prev >= 0) & (start <= end_prev)
        reach = np.full(len(pos), np.inf)
        reach[within] = time[within] - time[end_prev[within]]
        j, c = pos % block, pos // block
        slot = (j * m + prev_sym) * n_blocks + c
        dest = time[:, None] * m + np.arange(m)
        dest[~real] = self.n_trials * m
        return _ScanLayout(
            block=block,
            step_exponent=step.reshape(n_blocks, block).T.copy(),
            reach_exponent=reach.reshape(n_blocks, block).T.copy(),
            previous_symbol_slot=slot.reshape(n_blocks, block).T.ravel(),
            destination=dest.reshape(n_blocks, block, m).transpose(1, 2, 0).ravel())


@dataclass(frozen=True, eq=False)
class _ScanLayout:
    """Index arrays of the blocked leaky-count recursion (see Grouping._scan_layout).

    ``step_exponent`` (B, R): t_p - t_{p-1} - 1, inf where p has no earlier
    trial of its node (or is padding); ``reach_exponent`` (B, R):
    t_p - t_end(c-1), inf unless that position is of p's node;
    ``previous_symbol_slot``: flat index of [j, y_{p-1}, c] in a (B, m, R)
    array; ``destination``: flat index in (n_trials, m) + 1 of each (B, m, R)
    element (padding goes to the extra last slot).
    """

    block: int
    step_exponent: np.ndarray
    reach_exponent: np.ndarray
    previous_symbol_slot: np.ndarray
    destination: np.ndarray


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
