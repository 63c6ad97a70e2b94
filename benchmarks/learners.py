"""Benchmark the learners against plain per-trial Python loops (run by hand: python benchmarks/learners.py).

Prints, for n = 5,000 and 100,000 symbols (m = 3): the time of Counting
(depths 0-6, with and without leak) and TreeMixture(D=6), the time of a plain
per-trial loop written here, their ratio, the largest difference between the
two, and the peak memory of the vectorised call (tracemalloc). The loops on
100,000 symbols are timed on the first ``LOOP_N`` symbols and scaled linearly
(they are O(n)); this is said in the output. Targets (issue 3): Counting >= 30x
the loop; TreeMixture(D=6) on 100,000 symbols under 2 s on one core. The last
lines say whether each target is met and how peak memory grows with n.
"""

from __future__ import annotations

import argparse
import math
import time
import tracemalloc

import numpy as np

from foretell.learners import Counting, TreeMixture
from foretell.learners.counting import suffix_grouping
from foretell.learners.mixture import default_leaf_prob

LOOP_N = 20_000


def loop_counting(x: np.ndarray, m: int, depth: int, alpha: float, leak: float) -> np.ndarray:
    """Return Counting's predictions by a plain per-trial loop over a dense count table."""
    table = np.zeros((m**depth, m))
    out = np.full((len(x), m), 1.0 / m)
    code, top = 0, m ** max(depth - 1, 0)
    r = 1.0 - leak
    for t in range(len(x)):
        if t >= depth:
            row = table[code]
            out[t] = (row + alpha) / (row.sum() + m * alpha)
            if leak:
                table *= r
            row[x[t]] += 1.0
        if depth:
            code = (code % top) * m + int(x[t])
    return out


def loop_mixture(x: np.ndarray, m: int, depth: int, alpha: float) -> np.ndarray:
    """Return TreeMixture's predictions by the sequential per-trial update along the path.

    Per node: counts, log P_e and log P_w (Willems, Shtarkov & Tjalkens, 1995);
    at each trial the prediction is computed bottom-up along the current path,
    then the path's nodes are updated with the observed symbol.
    """
    beta = default_leaf_prob(m)
    lb, l1b = math.log(beta), math.log1p(-beta)
    nodes: dict[tuple[int, ...], list] = {}  # context -> [counts, log_pe, log_pw, log_kids]
    out = np.full((len(x), m), 1.0 / m)
    for t in range(depth, len(x)):
        path = [tuple(int(v) for v in x[t - d:t]) for d in range(depth + 1)]
        stats = [nodes.setdefault(s, [[0] * m, 0.0, 0.0, 0.0]) for s in path]
        q = None
        for d in range(depth, -1, -1):
            counts, lpe, lpw, lkids = stats[d]
            tot = sum(counts)
            e = [(c + alpha) / (tot + m * alpha) for c in counts]
            if d == depth:
                q = e
            else:
                b = math.exp(lb + lpe - lpw)
                q = [b * ei + (1 - b) * qi for ei, qi in zip(e, q)]
        out[t] = q
        a = int(x[t])
        new_pw = old_child_pw = 0.0  # both set at d = depth before they are read
        for d in range(depth, -1, -1):
            st = stats[d]
            counts = st[0]
            st[1] += math.log((counts[a] + alpha) / (sum(counts) + m * alpha))
            counts[a] += 1
            if d == depth:
                new_pw = st[1]
            else:
                st[3] += new_pw - old_child_pw
                new_pw = float(np.logaddexp(lb + st[1], l1b + st[3]))
            old_child_pw = st[2]
            st[2] = new_pw
    return out


def timed(fn, repeat: int = 5, budget: float = 0.2) -> tuple[float, object]:
    """Return the best wall time of calls of ``fn`` and its last result.

    At least ``repeat`` calls, and more until ``budget`` seconds are spent, so
    that sub-millisecond calls are not judged on a few samples that a burst of
    other load can spoil.
    """
    best, result, calls, start = math.inf, None, 0, time.perf_counter()
    while calls < repeat or time.perf_counter() - start < budget:
        t0 = time.perf_counter()
        result = fn()
        best = min(best, time.perf_counter() - t0)
        calls += 1
    return best, result


def peak_mb(fn) -> float:
    """Return the peak memory (MiB) traced by tracemalloc during one call of ``fn``."""
    tracemalloc.start()
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak / 2**20


def verdict(ok: bool) -> str:
    """Return "PASS" or "FAIL"."""
    return "PASS" if ok else "FAIL"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[5_000, 100_000])
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    m = 3
    print(f"m = {m}; seconds, best of >= 5 calls (and >= 0.2 s of calls). "
          "cold = first call on a session (encoding cache cleared); "
          "warm = a repeated call on the same session (the fitter's case); ratio = loop / cold. "
          f"Loop refs on more than {LOOP_N} symbols are timed on the first {LOOP_N} and scaled by "
          f"n/{LOOP_N}. peak MB: tracemalloc, cold call.")
    print(f"{'model':<28}{'n':>8}{'cold s':>9}{'warm s':>9}{'loop s':>9}{'ratio':>8}"
          f"{'max |diff|':>11}{'peak MB':>9}")
    rng = np.random.default_rng(args.seed)
    ratios: dict[tuple[str, int], float] = {}  # Counting rows
    mixture_s: dict[int, float] = {}
    peaks: dict[tuple[str, int], float] = {}
    for n in args.sizes:
        x = rng.integers(0, m, n)
        x[2::5] = (x[:-2:5] + 1) % m  # a little structure
        sub = min(n, LOOP_N)
        cases = [(f"Counting(depth={k}{', leak=0.2' if leak else ''})",
                  Counting(depth=k, leak=leak),
                  lambda k=k, leak=leak: loop_counting(x[:sub], m, k, 0.5, leak))
                 for leak in (0.0, 0.2) for k in range(7)]
        cases.append(("TreeMixture(max_depth=6)", TreeMixture(max_depth=6),
                      lambda: loop_mixture(x[:sub], m, 6, 0.5)))
        for name, model, loop in cases:
            def cold(model=model):
                suffix_grouping.cache_clear()
                return model.next_proba(x, m)

            cold_s, pred = timed(cold)
            warm_s, _ = timed(lambda: model.next_proba(x, m))
            loop_s, ref = timed(loop)
            loop_s *= n / sub
            diff = float(np.abs(pred[:sub] - ref).max())
            peaks[name, n] = mem = peak_mb(cold)
            if isinstance(model, Counting):
                ratios[name, n] = loop_s / cold_s
            else:
                mixture_s[n] = cold_s
            print(f"{name:<28}{n:>8}{cold_s:>9.4f}{warm_s:>9.4f}{loop_s:>9.3f}"
                  f"{loop_s / cold_s:>8.1f}{diff:>11.1e}{mem:>9.1f}")
    (name, n), low = min(ratios.items(), key=lambda item: item[1])
    print(f"Counting >= 30x the loop: min ratio {low:.1f} ({verdict(low >= 30)}), "
          f"{name} at n = {n:,}")
    if 100_000 in mixture_s:
        print(f"TreeMixture(D=6), 100,000 symbols < 2 s: {mixture_s[100_000]:.3f} s "
              f"({verdict(mixture_s[100_000] < 2)})")
    else:
        print("TreeMixture(D=6), 100,000 symbols < 2 s: not run (add 100000 to --sizes)")
    small, large = min(args.sizes), max(args.sizes)
    if small < large:
        growth = {name: peaks[name, large] / peaks[name, small]
                  for name, size in peaks if size == small}
        worst = max(growth, key=growth.get)
        print(f"peak memory growth from n = {small:,} to {large:,} (linear: {large / small:.0f}x): "
              f"{min(growth.values()):.1f}x to {growth[worst]:.1f}x ({worst})")


if __name__ == "__main__":
    main()
