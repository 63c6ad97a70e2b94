"""The Bayesian context-tree mixture: exact averaging over every context tree of depth <= D.

Prior (Willems, Shtarkov & Tjalkens, 1995 for m = 2 and leaf_prob = 1/2;
Kontoyiannis et al., 2022 for any m): a node shallower than D is a leaf with
probability beta = ``leaf_prob``, otherwise it splits into all m children
(each prepending one older symbol); leaves carry Dirichlet(alpha) estimators.
With P_e(s) the Dirichlet marginal likelihood of what followed node s, the
weighted probability is

    P_w(s) = beta P_e(s) + (1 - beta) prod_a P_w(a s)   (depth < D),   P_w(s) = P_e(s)   (depth D),

and P_w(root) is the mixture's evidence. At trial t only the nodes on the path
of x[:t] change, and the mixture's prediction is, from the bottom up,

    q_D = e_D,   q_d = b_d e_d + (1 - b_d) q_{d+1},   b_d = beta P_e(s_d) / P_w(s_d),

with e_d the node's Dirichlet predictive and b_d its posterior stopping
probability before trial t. log(b/(1-b)) = logit(beta) + log P_e(s_d) -
log prod_a P_w(a s_d) grows by log e_d(x_t) - log q_{d+1}(x_t) at each visit,
so every level is one cumulative sum per node over all trials at once.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy.special import log_expit, logit

from foretell.errors import UsageError
from foretell.labels import context_label
from foretell.params import PARAMS

from .base import (Grouping, Learner, check_depth, check_hyper, check_sequence,
                   dirichlet_log_marginal, suffix_codes)
from .counting import counting_predict, suffix_grouping

MAX_TREE_DEPTH = 12


def default_leaf_prob(n_symbols: int) -> float:
    """Return 1 - 2^-(m-1): 1/2 for two symbols, 3/4 for three (Kontoyiannis et al., 2022)."""
    return 1.0 - 2.0 ** -(n_symbols - 1)


def _context_of_code(code: int, depth: int, n_symbols: int) -> tuple[int, ...]:
    """Return the symbol indices (oldest first) of a depth-``depth`` node code."""
    return tuple(int(code // n_symbols ** (depth - 1 - j)) % n_symbols for j in range(depth))


@dataclass(frozen=True)
class TreePosterior:
    """The posterior over context trees after the data of trials D..trial-1.

    One entry per visited node (``contexts``, oldest-first symbol indices,
    root ``()``, sorted by depth then code): ``n_obs`` how often it was the
    context, ``stop_prob`` the posterior probability of stopping there given
    it is reached (beta P_e/P_w; 1 at depth D), ``leaf_prob`` the posterior
    probability that it is a leaf (stop_prob times prod over ancestors of
    1 - stop_prob). ``map_tree`` lists the leaves of the maximum a posteriori
    tree, a never-visited subtree collapsed into one leaf (so the leaves still
    form a complete tree, and may include unvisited contexts).
    """

    trial: int
    contexts: tuple[tuple[int, ...], ...]
    n_obs: np.ndarray
    stop_prob: np.ndarray
    leaf_prob: np.ndarray
    map_tree: tuple[tuple[int, ...], ...]

    def to_frame(self, symbols: Sequence[str] | None = None):
        """Return a tidy table, one row per visited node.

        Columns: context (labels joined by '-', oldest first; the root is '*'),
        depth, n_obs, stop_prob, leaf_prob, in_map_tree. ``symbols`` are the
        labels of the indices (default: the indices themselves).
        """
        import pandas as pd

        names = symbols if symbols is not None else [str(i) for i in range(max(
            (max(c) for c in self.contexts if c), default=-1) + 1)]

        leaves = set(self.map_tree)
        return pd.DataFrame({
            "context": [context_label(names, c) for c in self.contexts],
            "depth": [len(c) for c in self.contexts],
            "n_obs": self.n_obs,
            "stop_prob": self.stop_prob,
            "leaf_prob": self.leaf_prob,
            "in_map_tree": [c in leaves for c in self.contexts],
        })


@dataclass(frozen=True)
class TreeMixture(Learner):
    """The exact Bayesian mixture over all context trees of depth <= ``max_depth``.

    ``leaf_prob`` None means 1 - 2^-(m-1), resolved when m is known
    (:func:`default_leaf_prob`). Trials t < max_depth are initial context:
    uniform predictions, never counted. See the module docstring for the
    recursion (context-tree weighting, Willems et al., 1995; Bayesian context
    trees, Kontoyiannis et al., 2022).
    """

    max_depth: int
    alpha: float = 0.5
    leaf_prob: float | None = None

    def __post_init__(self) -> None:
        check_depth("TreeMixture max_depth", self.max_depth)
        if self.max_depth > MAX_TREE_DEPTH:
            raise UsageError(f"TreeMixture max_depth must be at most {MAX_TREE_DEPTH}, "
                             f"got {self.max_depth}")
        PARAMS["alpha"].check(self.alpha, "TreeMixture")
        if self.leaf_prob is not None:
            check_hyper("TreeMixture leaf_prob", self.leaf_prob, 0.0, 1.0)

    @property
    def depth(self) -> int:
        """Return the maximal context depth D."""
        return self.max_depth

    def _beta(self, n_symbols: int) -> float:
        return default_leaf_prob(n_symbols) if self.leaf_prob is None else float(self.leaf_prob)

    def _levels(self, x: np.ndarray, n_symbols: int) -> tuple[np.ndarray, np.ndarray]:
        """Return the log predictions (n, m) and the stopping log-odds (D, n) of every trial.

        Bottom-up over depth levels, each level vectorised over all trials
        (see the module docstring). Row d of the log-odds is
        log(b_d / (1 - b_d)) for the depth-d node on the path of x[:t].
        """
        n, D = len(x), self.max_depth
        with np.errstate(divide="ignore"):
            prior_odds = logit(self._beta(n_symbols))
        used = np.arange(D, n)
        odds = np.full((D, n), prior_odds)
        x_bytes = x.tobytes()

        def node_log_predict(d: int) -> tuple[Grouping, np.ndarray]:
            grouping = suffix_grouping(x_bytes, n_symbols, d, D)
            return grouping, np.log(counting_predict(grouping, self.alpha, 0.0))

        q = node_log_predict(D)[1]
        for d in range(D - 1, -1, -1):
            grouping, e = node_log_predict(d)
            gain = np.zeros(n)
            gain[used] = e[used, x[used]] - q[used, x[used]]
            odds[d, grouping.order] += grouping.exclusive_cumsum(gain[grouping.order])
            q = np.logaddexp(log_expit(odds[d])[:, None] + e, log_expit(-odds[d])[:, None] + q)
        return q, odds

    def _log_predict(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        return self._levels(x, n_symbols)[0]

    def depth_posterior(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        """Return (len(x), D+1): the posterior of the depth of the context used at each trial.

        Along the path of x[:t], P(depth = d) = b_d prod_{u<d} (1 - b_u) with
        b_D = 1 (posterior given x[:t]). Rows t < D have no full context yet
        (the prediction is uniform): they put all mass at depth 0.
        """
        x = check_sequence(x, n_symbols)
        _, odds = self._levels(x, int(n_symbols))
        D = self.max_depth
        go_on = np.vstack([np.zeros((1, len(x))), np.cumsum(log_expit(-odds), axis=0)])  # (D+1, n)
        stop = np.vstack([log_expit(odds), np.zeros((1, len(x)))])
        out = np.exp(go_on + stop).T
        out[:D] = 0.0
        out[:D, 0] = 1.0
        return out

    def mean_depth(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        """Return the posterior mean depth of the context used at each trial (0 for t < D)."""
        return self.depth_posterior(x, n_symbols) @ np.arange(self.max_depth + 1)

    def posterior(self, x: np.ndarray, n_symbols: int, at: Sequence[int] | int | None = None,
                  targets: np.ndarray | None = None) -> list[TreePosterior]:
        """Return the posterior over trees at each trial index in ``at`` (default: len(x)).

        The posterior at index a uses trials D..a-1. ``targets`` (same length
        as x, -1 = skip the trial) is the symbol counted at each trial instead
        of x itself, the context still being the past of x: with a
        participant's guesses as targets this gives the "response tree".
        """
        x = check_sequence(x, n_symbols)
        m, n = int(n_symbols), len(x)
        y = x if targets is None else _check_targets(targets, n, m)
        points = [n] if at is None else np.atleast_1d(np.asarray(at)).tolist()
        for a in points:
            if isinstance(a, bool) or not isinstance(a, (int, np.integer)) or not 0 <= a <= n:
                raise UsageError(f"posterior 'at' must hold trial indices in [0, {n}], got {a!r}")
        codes = [suffix_codes(x, m, d, self.max_depth) for d in range(self.max_depth + 1)]
        return [self._posterior_at(codes, y, m, int(a)) for a in points]

    def _posterior_at(self, codes: list[np.ndarray], y: np.ndarray, m: int,
                      a: int) -> TreePosterior:
        """Return the tree posterior from the counts of trials D..a-1 (exact closed forms per node).

        Bottom-up: log P_w (mixture) and log P_m (maximising recursion,
        Willems et al., 1995; Kontoyiannis et al., 2022) per visited node, an
        unvisited subtree at depth d contributing P_w = 1 and its best prior
        mass u_d = max(beta, (1 - beta) u_{d+1}^m), u_D = 1; then top-down
        leaf probabilities and the MAP leaves.
        """
        D, beta = self.max_depth, self._beta(m)
        with np.errstate(divide="ignore"):
            log_b, log_1b = np.log(beta), np.log1p(-beta)
        used = np.zeros(len(y), dtype=bool)
        used[D:a] = True
        used &= y >= 0
        nodes, counts = [], []
        for d in range(D + 1):
            c = codes[d][used]
            uniq, inv = np.unique(c, return_inverse=True)
            if d == 0:
                uniq, inv = np.zeros(1, dtype=np.int64), np.zeros(len(c), dtype=np.int64)
            nodes.append(uniq)
            counts.append(np.bincount(inv * m + y[used], minlength=len(uniq) * m).reshape(-1, m))
        log_pe = [dirichlet_log_marginal(k, self.alpha) for k in counts]
        parent = [None] + [np.searchsorted(nodes[d - 1], nodes[d] % m ** (d - 1))
                           for d in range(1, D + 1)]
        log_pw, log_pm, map_leaf = [None] * (D + 1), [None] * (D + 1), [None] * (D + 1)
        log_pw[D], log_pm[D] = log_pe[D], log_pe[D]
        map_leaf[D] = np.ones(len(nodes[D]), dtype=bool)
        best_unvisited = 0.0  # log u_{d+1}
        for d in range(D - 1, -1, -1):
            k = len(nodes[d])
            kids = np.bincount(parent[d + 1], weights=log_pw[d + 1], minlength=k)
            log_pw[d] = np.logaddexp(log_b + log_pe[d], log_1b + kids)
            n_kids = np.bincount(parent[d + 1], minlength=k)
            split = log_1b + np.bincount(parent[d + 1], weights=log_pm[d + 1], minlength=k) \
                + (m - n_kids) * best_unvisited
            leaf = log_b + log_pe[d]
            map_leaf[d] = leaf >= split
            log_pm[d] = np.maximum(leaf, split)
            best_unvisited = max(log_b, log_1b + m * best_unvisited)
        stop = [np.exp(log_b + log_pe[d] - log_pw[d]) for d in range(D)] + [np.ones(len(nodes[D]))]
        reach, in_map = np.ones(1), np.ones(1, dtype=bool)
        leaf_prob, map_tree = [], []
        for d in range(D + 1):
            leaf_prob.append(reach * stop[d])
            is_map_leaf = in_map & map_leaf[d]
            map_tree += [_context_of_code(c, d, m) for c in nodes[d][is_map_leaf]]
            if d == D:
                break
            splits = in_map & ~map_leaf[d]
            visited_kids = set(nodes[d + 1].tolist())
            for c in nodes[d][splits]:  # children never visited: collapsed leaves of the MAP tree
                map_tree += [_context_of_code(s * m**d + c, d + 1, m) for s in range(m)
                             if s * m**d + c not in visited_kids]
            reach = (reach * (1.0 - stop[d]))[parent[d + 1]]
            in_map = splits[parent[d + 1]]
        contexts = tuple(_context_of_code(c, d, m) for d in range(D + 1) for c in nodes[d])
        return TreePosterior(
            trial=a,
            contexts=contexts,
            n_obs=np.concatenate([k.sum(axis=1) for k in counts]),
            stop_prob=np.concatenate(stop),
            leaf_prob=np.concatenate(leaf_prob),
            map_tree=tuple(sorted(map_tree, key=lambda c: (len(c), c))),
        )


def _check_targets(targets: np.ndarray, n: int, n_symbols: int) -> np.ndarray:
    """Return ``targets`` as int64 after checking its length and values (-1 or a symbol index)."""
    arr = np.asarray(targets)
    if arr.shape != (n,):
        raise UsageError(f"targets must have the length of x ({n}), got shape {arr.shape}")
    arr = arr.astype(np.int64)
    if arr.size and (arr.min() < -1 or arr.max() >= n_symbols):
        raise UsageError(f"targets must hold -1 (skip) or symbol indices in [0, {n_symbols}), "
                         f"got values from {arr.min()} to {arr.max()}")
    return arr
