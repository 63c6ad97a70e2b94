"""The context report: which stimulus contexts a participant's guesses depend on, learner-free.

The Bayesian context-tree machinery (:class:`foretell.learners.TreeMixture`,
Willems, Shtarkov & Tjalkens, 1995; Kontoyiannis et al., 2022) is applied to
(stimulus past -> guess) pairs: the context of trial t is the stimuli before
it, and the symbol counted at each node is the participant's guess. The
posterior probability that a context is a leaf, and the MAP "response tree",
say which pasts the guesses distinguish, whatever learner produced them.

Sessions and blocks. A participant's sessions are pooled by summing the node
statistics: the sessions are laid end to end and the first ``max_depth``
trials of every session are skipped (their context would reach into the
previous session), exactly as the mixture skips the first ``max_depth``
trials of a sequence; so the pooled counts are the sums of the per-session
counts. Rows with block ``all`` (and session ``all``) pool every trial of the
participant; a block's rows (labelled by its session and block, as strings)
count the guesses of that block only, the context still being the stimuli
that preceded each trial in its session. Missed guesses are not counted.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from foretell.labels import ALL, block_label, parse_context
from foretell.learners import TreeMixture
from foretell.tasks import Task

STATUSES = ("distinguished", "merged", "split-deeper", "unvisited")

_REPORT_COLUMNS = ["participant", "group", "session", "block", "context", "depth", "n_obs",
                   "stop_prob", "leaf_prob", "in_map_tree", "in_source_tree"]


def _pooled_sequence(trials: pd.DataFrame, max_depth: int) -> tuple[np.ndarray, np.ndarray]:
    """Return stimuli x and guesses y (-1 = not counted), sessions end to end.

    Trials sorted by session and trial; the first ``max_depth`` trials of every
    session are not counted (the mixture already skips those of the first).
    """
    x = trials["stimulus_idx"].to_numpy(dtype=np.int64)
    y = trials["response_idx"].to_numpy(dtype=np.int64).copy()
    if "missed" in trials.columns:
        y[trials["missed"].to_numpy(dtype=bool)] = -1
    position = trials.groupby("session", sort=False).cumcount().to_numpy()
    y[position < max_depth] = -1
    return x, y


def _report_rows(tree: TreeMixture, x: np.ndarray, y: np.ndarray, task: Task,
                 source: frozenset[tuple[int, ...]]) -> pd.DataFrame:
    post = tree.posterior(x, task.n_symbols, targets=y)[0]
    frame = post.to_frame(task.symbols)
    frame["in_source_tree"] = [c in source for c in post.contexts]
    return frame[frame["n_obs"] > 0]


def context_report(log: pd.DataFrame, task: Task, max_depth: int | None = None,
                   blocks: bool = True, alpha: float = 0.5, leaf_prob: float | None = None) -> pd.DataFrame:
    """Return the response tree of every participant (and block): one row per visited context.

    For the (stimulus past -> guess) pairs, the tree-mixture posterior gives
    for each context s: ``n_obs`` (guesses counted there), ``stop_prob`` (the
    posterior probability of stopping at s given s is reached), ``leaf_prob``
    = stop_prob(s) prod_{ancestors u} (1 - stop_prob(u)) (the posterior
    probability that s is a leaf of the response tree), ``in_map_tree`` (s is
    a leaf of the MAP response tree), and ``in_source_tree`` (s is a context,
    i.e. a leaf, of the task's true tree). Columns participant, group,
    session, block, context ('-'-joined labels, oldest first; the root '*'),
    depth, n_obs, stop_prob, leaf_prob, in_map_tree, in_source_tree.

    ``max_depth`` defaults to one more than the task's deepest context, so
    that a response tree deeper than the source can show. ``alpha`` and
    ``leaf_prob`` are the tree prior's (:class:`TreeMixture`). ``log`` needs
    participant, session, block, trial, stimulus_idx, response_idx (-1 =
    missed); group and missed are used when present. See the module
    docstring for how sessions and blocks are pooled.
    """
    depth = task.max_depth + 1 if max_depth is None else int(max_depth)
    tree = TreeMixture(max_depth=depth, alpha=alpha, leaf_prob=leaf_prob)
    source = frozenset(task.contexts)
    data = log if "session" in log.columns else log.assign(session=1)
    data = data.sort_values(["participant", "session", "trial"], kind="stable")
    parts = []
    for participant, trials in data.groupby("participant", sort=True):
        group = trials["group"].iloc[0] if "group" in trials.columns else pd.NA
        x, y = _pooled_sequence(trials, depth)
        units = [((ALL, ALL), np.ones(len(trials), dtype=bool))]
        if blocks:
            pairs = trials[["session", "block"]].drop_duplicates().itertuples(index=False)
            units += [((block_label(s), block_label(b)),
                       ((trials["session"] == s) & (trials["block"] == b)).to_numpy()) for s, b in pairs]
        for (session, block), mask in units:
            rows = _report_rows(tree, x, np.where(mask, y, -1), task, source)
            parts.append(rows.assign(participant=participant, group=group, session=session, block=block))
    if not parts:
        return pd.DataFrame(columns=_REPORT_COLUMNS)
    out = pd.concat(parts, ignore_index=True)[_REPORT_COLUMNS]
    out["group"] = out["group"].astype("string")
    return out


def _parse(label: str, task: Task) -> tuple[int, ...]:
    return parse_context(label, task.symbols)


def _status(context: tuple[int, ...], visited: set[tuple[int, ...]],
            map_leaves: set[tuple[int, ...]]) -> tuple[str, tuple[int, ...] | None]:
    """Return a source context's status in a response tree and the MAP leaf covering it (None if split)."""
    if context not in visited:
        return "unvisited", None
    if context in map_leaves:
        return "distinguished", context
    for d in range(len(context) - 1, -1, -1):  # nodes prepend older symbols: ancestors are suffixes
        if context[len(context) - d:] in map_leaves:
            return "merged", context[len(context) - d:]
    return "split-deeper", None


def context_agreement(report: pd.DataFrame, task: Task) -> pd.DataFrame:
    """Return, per participant and block, how the response tree treats each context of the source.

    Status of a source context s (a leaf of the task's true tree) in the MAP
    response tree of :func:`context_report`: "distinguished" (s is itself a
    leaf: the guesses depend on exactly that past), "merged" (a shorter
    context, a suffix of s, is the leaf: the guesses do not tell s from its
    siblings), "split-deeper" (the response tree splits s further: the guesses
    depend on an older symbol than the source does), "unvisited" (no guess
    was counted in s; also when s is deeper than the report's max_depth).
    Columns participant, group, session, block, source_context, depth,
    status, response_leaf (the covering MAP leaf; '' when split or
    unvisited), n_obs and leaf_prob of s (0 and NaN when unvisited).
    """
    rows = []
    keys = ["participant", "group", "session", "block"]
    for labels, unit in report.groupby(keys, sort=False, dropna=False):
        nodes = [_parse(c, task) for c in unit["context"]]
        visited = set(nodes)
        map_leaves = {c for c, leaf in zip(nodes, unit["in_map_tree"]) if leaf}
        stats = dict(zip(nodes, zip(unit["n_obs"], unit["leaf_prob"])))
        for context in task.contexts:
            status, leaf = _status(context, visited, map_leaves)
            n_obs, leaf_prob = stats.get(context, (0, np.nan))
            rows.append({**dict(zip(keys, labels)), "source_context": task.context_label(context),
                         "depth": len(context), "status": status,
                         "response_leaf": task.context_label(leaf) if leaf is not None else "",
                         "n_obs": n_obs, "leaf_prob": leaf_prob})
    return pd.DataFrame(rows, columns=[*keys, "source_context", "depth", "status", "response_leaf",
                                       "n_obs", "leaf_prob"])


__all__ = ["STATUSES", "context_agreement", "context_report"]
