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
# blocked recursion: B Python-level steps over n/B blocks, then a log2(n/B)-pass scan of the
# blocks. Measured on 5,000 and 100,000 trials (m = 3, depths 0-6): divisors 2-8 within timing
# noise of each other, 1 up to 2x slower.
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
        for a in range(self.n_symbols):  # m passes, each vectorised over all trials
            counts[self.order, a] = self.exclusive_cumsum((self.symbols == a).astype(float))
        counts.setflags(write=False)
        return counts

    def leaky_prior_counts(self, leak: float) -> np.ndarray:
        """Return (n_trials, m) exponentially forgotten counts before each trial, in trial order.

        count_t = (1 - leak) count_{t-1} + new_t for every node on every trial,
        so before trial t the observation of trial s weighs r^(t-1-s),
        r = 1 - leak. Along one node's trials t_1 < t_2 < ... (sorted
        positions p) the counts obey the first-order recursion
        z_p = g_p z_{p-1} + h_p e_{y_{p-1}}, h_p = r^(t_p - t_{p-1} - 1),
        g_p = r h_p (g = h = 0 at a node's first trial). It is solved in blocks
        of B consecutive positions (:meth:`_scan_layout`). The count at the
        end of block c obeys Y_c = P_c Y_{c-1} + E_c, with
        P_c = r^(t_end(c) - t_end(c-1)) (0 unless both ends are of one node)
        and E_c = sum r^(t_end(c) - 1 - t_{p-1}) e_{y_{p-1}} over the block's
        positions p in the end's run (a weighted bincount); Y is a parallel prefix
        scan over the blocks (composition (P2, Y2) o (P1, Y1) = (P2 P1, P2 Y1 + Y2);
        Hillis & Steele, 1986, from memory), stopped once every remaining P is
        exactly 0. Each block then starts from Y_{c-1} and the plain recursion
        runs inside every block at once (B vectorised steps). Powers are taken
        from :func:`_power_table` (libm's pow of the exact integer exponents, to
        one ulp). Nothing is truncated: this is the recursion up to a few
        roundings per position.
        When 1 - leak rounds to 1 these are the plain counts. Rows of trials
        outside the grouping are 0; the array is new and writable.
        """
        r = 1.0 - leak
        if r == 1.0 or len(self.order) == 0:
            return np.array(self.prior_counts)
        lay = self._scan_layout
        m, n_blocks = self.n_symbols, lay.step_power.shape[1]
        powers = _power_table(r, lay.largest_power)
        weight = np.take(powers, lay.tail_power, mode="clip")
        carry = np.bincount(lay.tail_slot, weight, minlength=m * n_blocks).reshape(m, n_blocks)
        carry_gain = np.take(powers, lay.end_power, mode="clip")
        step = 1
        while step < n_blocks and carry_gain[step:].any():
            carry[:, step:] += carry_gain[step:] * carry[:, :-step]
            carry_gain[step:] *= carry_gain[:-step]
            step *= 2
        z = np.zeros((lay.block, m, n_blocks))
        gain = np.take(powers, lay.step_power, mode="clip")  # h
        z.ravel()[lay.input_slot] = gain.ravel()  # the inputs h_p e_{y_{p-1}}
        gain *= r  # g
        z[0, :, 1:] += gain[0, 1:] * carry[:, :-1]  # block c starts from Y_{c-1}
        rows, tmp = list(z), np.empty_like(carry)
        for before, row, g in zip(rows, rows[1:], gain[1:]):  # step j of the recursion, all blocks
            np.multiply(before, g, out=tmp)
            row += tmp
        counts = np.zeros((self.n_trials + 1, m))  # the last row takes the padding
        counts.ravel()[lay.destination] = z.ravel()
        return counts[:-1]

    @cached_property
    def _scan_layout(self) -> _ScanLayout:
        """Return the blocked layout of the sorted positions used by :meth:`leaky_prior_counts`.

        Sorted position p = c B + j (padded to B R positions) sits at [j, c] of
        (B, R) arrays, so step j of the recursion is one contiguous row over all
        R blocks. Depends only on the grouping; computed once.
        """
        n, m, order, first = len(self.order), self.n_symbols, self.order, self.first
        block = max(MIN_SCAN_BLOCK, math.isqrt(n) // SCAN_BLOCK_DIVISOR)
        n_blocks = -(-n // block)

        def blocked(values: np.ndarray, pad: int = 0) -> np.ndarray:  # sorted order -> (B, R)
            out = np.full(block * n_blocks, pad, dtype=np.int64)
            out[:n] = values
            return out.reshape(n_blocks, block).T.copy()

        gap = np.zeros(n, dtype=np.int64)  # t_p - t_{p-1}, kept where p continues its node's run
        np.subtract(order[1:], order[:-1], out=gap[1:], where=first[1:] < np.arange(1, n))
        ends = np.minimum(np.arange(block - 1, n_blocks * block, block), n - 1)  # each block's last
        end_of = np.repeat(ends, block)[:n]
        tail = np.where((gap > 0) & (first == first[end_of]), order[end_of] - order + gap, 0)
        end_power = np.zeros(n_blocks, dtype=np.int64)
        end_power[1:] = np.where(first[ends[1:]] <= ends[:-1],
                                 order[ends[1:]] - order[ends[:-1]] + 1, 0)
        step, tail = blocked(gap), blocked(tail)
        prev_symbol, cols = blocked(np.concatenate(([0], self.symbols[:-1]))), np.arange(n_blocks)
        time = blocked(order, self.n_trials)
        return _ScanLayout(
            block=block, step_power=step, tail_power=tail.ravel(), end_power=end_power,
            largest_power=int(max(step.max(), tail.max(), end_power.max())),
            tail_slot=(prev_symbol * n_blocks + cols).ravel(),
            input_slot=((np.arange(block)[:, None] * m + prev_symbol) * n_blocks + cols).ravel(),
            destination=((time * m)[:, None, :] + np.arange(m)[:, None]).ravel())


@dataclass(frozen=True, eq=False)
class _ScanLayout:
    """Index arrays of the blocked leaky-count recursion (see Grouping._scan_layout).

    ``*_power`` are indices into :func:`_power_table`: 1 + the exponent of r,
    0 where the term does not exist. ``step_power`` (B, R): t_p - t_{p-1}
    where p continues its node's run (h_p); ``tail_power`` (B R,), flat:
    t_end(c) - t_{p-1} where p is also of the node of its block's end
    (E_c); ``end_power`` (R,): t_end(c) - t_end(c-1) + 1 where both ends
    are of one node (P_c); ``largest_power``: their maximum. Flat indices:
    ``tail_slot`` of [y_{p-1}, c] in (m, R); ``input_slot`` of
    [j, y_{p-1}, c] in (B, m, R); ``destination`` of each (B, m, R) element
    in (n_trials + 1, m), padding in the last row.
    """

    block: int
    step_power: np.ndarray
    tail_power: np.ndarray
    end_power: np.ndarray
    largest_power: int
    tail_slot: np.ndarray
    input_slot: np.ndarray
    destination: np.ndarray


def _power_table(r: float, largest: int) -> np.ndarray:
    """Return [0, r**0, r**1, ..., r**(k-1), 0], k = min(largest, e0): r**(i-1) at index i.

    Indexed with mode="clip" by i = 1 + exponent (0: no term) it gives every
    power with exponent below ``largest`` and 0 beyond the table. For
    0 < r < 1 and e >= e0 = ceil(1076 / -log2 r), r**e <= 2**-1076 < 2**-1075
    rounds to exactly 0 (below half the smallest subnormal), so the table
    stops there. Entries are libm's pow, except from e = s = floor(1022 / -log2 r)
    on (results near or below the smallest normal, 2**-1022), where pow's
    subnormal path is ~30x slower: there r**(s-1) * r**(e-s+1), a product of
    two pow values, within one unit in the last place of pow.
    """
    log2r = -math.log2(r)
    top = min(largest, math.ceil(1076 / log2r))
    normal = min(top, max(1, int(1022 / log2r)))
    table = np.zeros(top + 2)
    np.power(r, np.arange(normal, dtype=float), out=table[1:normal + 1])
    np.multiply(table[normal], table[2:top - normal + 2], out=table[normal + 1:top + 1])
    return table


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
