"""Response trees: which stimulus contexts a participant's guesses depend on, learner-free, and their check.

The Bayesian context-tree posterior is applied to (stimulus past -> guess)
pairs (:func:`context_report`) and checked against guesses simulated from
each participant's winning model (:func:`context_agreement`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from foretell.choice import choice_proba, sample_choices
from foretell.errors import UsageError
from foretell.labels import ALL, block_label, parse_context
from foretell.learners import TreeMixture
from foretell.learners.base import Learner
from foretell.learners.mixture import MAX_TREE_DEPTH, TreePosterior
from foretell.models import normalise_model_id, parse_model
from foretell.params import CHOICE_PARAMS, LEARNER_PARAMS, PARAMS
from foretell.tasks import Task
from foretell.validation import check_count, check_seed, child_rng

STATUS_KEYS = {"distinguished": "distinguished", "merged into shorter": "merged",
               "split into longer": "split_deeper", "not visited": "unvisited"}
"""Each status of a source context in a response tree (the words of the ``status`` column) -> the key
of the columns that count it (``expected_<key>`` of the contexts table; the report's shares)."""
STATUSES = tuple(STATUS_KEYS)

DEFAULT_REPLICATES = 20
"""Replicate guess sequences simulated per participant from the winning model."""

BEYOND_LEVEL = 0.05
"""beyond_model is True when the observed status occurs in fewer than this share of the replicates."""

_EXPECTED_SHARES = {status: f"expected_{key}" for status, key in STATUS_KEYS.items() if status != "not visited"}
_REPORT_COLUMNS = ["participant", "group", "session", "block", "context", "depth", "n_obs",
                   "stop_prob", "leaf_prob", "in_map_tree", "in_source_tree", "model",
                   "n_replicates", "expected_leaf_prob", *_EXPECTED_SHARES.values()]
_AGREEMENT_COLUMNS = ["participant", "group", "session", "block", "source_context", "depth",
                      "status", "response_leaf", "n_obs", "leaf_prob", "model", "n_replicates",
                      "expected_status_share", "expected_leaf_prob", "beyond_model"]


@dataclass(frozen=True)
class _Winner:
    """A participant's winning model at its fitted parameters: what the replicates are drawn from."""

    model: str
    learner: Learner
    inv_temp: float
    lapse: float


def _pooled_sequence(trials: pd.DataFrame, max_depth: int) -> tuple[np.ndarray, np.ndarray]:
    """Return stimuli x and guesses y (-1 = not counted), sessions end to end.

    Trials sorted by session, block and trial; the first ``max_depth`` trials of every
    session are not counted (the mixture already skips those of the first).
    """
    x = trials["stimulus_idx"].to_numpy(dtype=np.int64)
    y = trials["response_idx"].to_numpy(dtype=np.int64).copy()
    if "missed" in trials.columns:
        y[trials["missed"].to_numpy(dtype=bool)] = -1
    position = trials.groupby("session", sort=False).cumcount().to_numpy()
    y[position < max_depth] = -1
    return x, y


def _report_rows(post: TreePosterior, task: Task, source: frozenset[tuple[int, ...]]) -> pd.DataFrame:
    """Return the posterior's table (every node, visited or not) with in_source_tree."""
    frame = post.to_frame(task.symbols)
    frame["in_source_tree"] = [c in source for c in post.contexts]
    return frame


def _map_statuses(post: TreePosterior) -> np.ndarray:
    """Return the status of every node of ``post`` in its MAP tree: 0 a leaf, 1 merged, 2 split deeper.

    A node is merged when a shorter context on its path (a suffix) is a MAP
    leaf, split deeper when neither it nor any such suffix is.
    """
    leaves = set(post.map_tree)
    covered: dict[tuple[int, ...], bool] = {}
    status = np.empty(len(post.contexts), dtype=np.int64)
    for i, c in enumerate(post.contexts):  # sorted by depth: a node's parent c[1:] comes first
        above = bool(c) and covered[c[1:]]
        covered[c] = above or c in leaves
        status[i] = 1 if above else (0 if c in leaves else 2)
    return status


def _replicate_columns(tree: TreeMixture, x: np.ndarray, targets: np.ndarray, m: int,
                       keep: np.ndarray) -> dict[str, np.ndarray]:
    """Return the mean leaf_prob and the share of each MAP status over replicate ``targets`` (R, n).

    Every replicate counts the same trials as the observed guesses, so its
    posterior has the same nodes in the same order; ``keep`` selects the
    visited ones, as in the observed report.
    """
    leaf = np.zeros(int(keep.sum()))
    counts = np.zeros((3, len(leaf)), dtype=np.int64)
    for y in targets:
        post = tree.posterior(x, m, targets=y)[0]
        leaf += post.leaf_prob[keep]
        counts[_map_statuses(post)[keep], np.arange(len(leaf))] += 1
    n = len(targets)
    return {"expected_leaf_prob": leaf / n,
            **{name: counts[k] / n for k, name in enumerate(_EXPECTED_SHARES.values())}}


def _winners(fits: pd.DataFrame, winners: pd.DataFrame, task: Task) -> dict[object, _Winner]:
    """Return each participant's winning model (block ``all``) with the learner at its fitted values.

    A participant is left out when it has no winner, or when the winner's row
    of ``fits`` is missing or has no usable inv_temp or lapse; learner
    parameters absent or NaN take the model's defaults.
    """
    for name, table, needed in (("fits", fits, ["participant", "model", *CHOICE_PARAMS]),
                                ("winners", winners, ["participant", "block", "best_model"])):
        if not isinstance(table, pd.DataFrame):
            raise UsageError(f"{name} must be a table (pandas DataFrame), got {type(table).__name__}")
        missing = [c for c in needed if c not in table.columns]
        if missing:
            raise UsageError(f"{name} lacks the column(s) {', '.join(missing)}")
    overall = winners[(winners["block"].astype("string") == ALL) & winners["best_model"].notna()]
    fitted = fits.assign(_model=fits["model"].map(lambda s: normalise_model_id(str(s))))
    found: dict[object, _Winner] = {}
    for participant, best in zip(overall["participant"], overall["best_model"]):
        model = normalise_model_id(str(best))
        rows = fitted[(fitted["participant"] == participant) & (fitted["_model"] == model)]
        if rows.empty:
            continue
        row = rows.iloc[0]
        choice = {p: row[p] for p in CHOICE_PARAMS}
        if not all(PARAMS[p].contains(_number(v)) for p, v in choice.items()):
            continue
        spec = parse_model(model, task)
        learned = {p: _number(row[p]) for p in LEARNER_PARAMS if p in row.index}
        learner = spec.learner(**{p: v for p, v in learned.items() if math.isfinite(v)})
        found[participant] = _Winner(model, learner, *(float(choice[p]) for p in CHOICE_PARAMS))
    return found


def _number(value: object) -> float:
    """Return ``value`` as a float (NaN when it is missing or not a number)."""
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _replicate_guesses(winner: _Winner, x: np.ndarray, session: np.ndarray, counted: np.ndarray,
                       m: int, n_replicates: int, rng: np.random.Generator) -> np.ndarray:
    """Return (n_replicates, n) guesses drawn from the winning model (-1 where not ``counted``).

    The learner restarts at each session and sees the participant's own
    stimuli; guesses follow P(guess = a) = (1 - lapse) softmax(inv_temp log p)_a
    + lapse / m (:func:`foretell.choice.choice_proba`), drawn by inverting the
    cumulative distribution with one uniform per trial and replicate.
    """
    starts = np.flatnonzero(np.r_[True, session[1:] != session[:-1]])
    pred = np.concatenate([winner.learner.next_proba(s, m) for s in np.split(x, starts[1:])])
    guesses = sample_choices(choice_proba(pred, winner.inv_temp, winner.lapse),
                             rng.random((n_replicates, len(x))))
    return np.where(counted, guesses, -1)


def response_tree_depth(task: Task, depth: int | None = None) -> int:
    """Return the depth of the response trees: ``depth``, or the task's deepest context + 1 within the limit.

    Parameters
    ----------
    task : Task
    depth : int, optional
        An explicit depth, from 0 to :data:`foretell.learners.mixture.MAX_TREE_DEPTH`.

    Returns
    -------
    int
        One more than the task's deepest context by default, so that a
        response tree deeper than the source can show, within the tree
        mixture's limit.

    Raises
    ------
    UsageError
        For an explicit depth that is not a whole number in range (raised
        before any fitting).
    """
    if depth is None:
        return min(task.max_depth + 1, MAX_TREE_DEPTH)
    depth = check_count("the response-tree depth", depth, 0)
    if depth > MAX_TREE_DEPTH:
        raise UsageError(f"the response-tree depth must be at most {MAX_TREE_DEPTH} (the tree mixture's "
                         f"limit), got {depth}")
    return depth


def context_report(log: pd.DataFrame, task: Task, max_depth: int | None = None,
                   blocks: bool = True, alpha: float = 0.5, leaf_prob: float | None = None, *,
                   fits: pd.DataFrame | None = None, winners: pd.DataFrame | None = None,
                   n_replicates: int = DEFAULT_REPLICATES, seed: int = 0) -> pd.DataFrame:
    """Return the response tree of every participant (and block): one row per visited context.

    Parameters
    ----------
    log : pandas.DataFrame
        participant, session, block, trial, stimulus_idx, response_idx (-1 =
        missed); group and missed are used when present.
    task : Task
    max_depth : int, optional
        The trees' depth (:func:`response_tree_depth`).
    blocks : bool, default True
        Add each block's tree to the whole-session one.
    alpha, leaf_prob : float
        The tree prior's (:class:`foretell.learners.TreeMixture`).
    fits, winners : pandas.DataFrame, optional
        Both or neither: the fits (participant, model, inv_temp, lapse, and
        leak / alpha where fitted; absent or NaN learner parameters take the
        model's defaults) and winners (participant, block, best_model; the
        block ``all`` rows are used) from which the winning model's baseline
        is simulated.
    n_replicates : int, default 20
        Guess sequences simulated per participant from the winning model.
    seed : int or numpy.random.Generator, default 0
        A participant's replicates come from ``child_rng(seed, "replicates", participant)``:
        they do not depend on the other participants or their order.

    Returns
    -------
    pandas.DataFrame
        participant, group, session, block, context ('-'-joined labels,
        oldest first; the root '*'), depth, n_obs (guesses counted there),
        stop_prob (the posterior probability of stopping at s given s is
        reached), leaf_prob = stop_prob(s) prod_{ancestors u} (1 - stop_prob(u))
        (the posterior probability that s is a leaf of the response tree),
        in_map_tree, in_source_tree (s is a context of the task's tree), model
        (the winning model), n_replicates, expected_leaf_prob (mean leaf_prob
        over the replicates), expected_distinguished / expected_merged /
        expected_split_deeper (share of replicates in which s is a MAP leaf /
        lies inside a shorter MAP leaf / is split deeper; they sum to 1).
        Without a baseline for a participant, model is missing, n_replicates
        is 0 and the expected columns are NaN.

    Raises
    ------
    UsageError
        For only one of fits and winners, or bad counts.

    Notes
    -----
    The Bayesian context-tree machinery (Willems, Shtarkov & Tjalkens, 1995;
    Kontoyiannis et al., 2022) is applied to (stimulus past -> guess) pairs:
    the symbol counted at each node is the participant's guess, so the tree
    says which pasts the guesses distinguish, whatever learner produced them.
    Recency is not context use: a leaky learner's guesses depend on the last
    few stimuli even when it counts no context, so the replicates of the
    winning model (on the participant's own stimuli, sessions and missed
    trials) are the baseline that :func:`context_agreement` checks against.
    Sessions are pooled by summing node statistics (the first ``max_depth``
    trials of every session are not counted, their context reaching into the
    previous session); rows with block ``all`` pool every trial, a block's
    rows count that block's guesses, the context still being the stimuli
    that preceded each trial in its session.
    """
    depth = response_tree_depth(task, max_depth)
    tree = TreeMixture(max_depth=depth, alpha=alpha, leaf_prob=leaf_prob)
    if (fits is None) != (winners is None):
        raise UsageError("give both fits= and winners= (or neither) for the winning model's baseline")
    n_replicates = check_count("n_replicates", n_replicates)
    seed = check_seed(seed)
    baseline = {} if fits is None else _winners(fits, winners, task)
    data = log if "session" in log.columns else log.assign(session=1)
    data = data.sort_values(["participant", "session", "block", "trial"], kind="stable")
    parts = [_participant_report(tree, participant, trials, task, baseline.get(participant), blocks,
                                 n_replicates, seed)
             for participant, trials in data.groupby("participant", sort=True)]
    if not parts:
        return pd.DataFrame(columns=_REPORT_COLUMNS)
    out = pd.concat(parts, ignore_index=True)[_REPORT_COLUMNS]
    out["group"] = out["group"].astype("string")
    out["model"] = out["model"].astype("string")
    return out


def _participant_report(tree: TreeMixture, participant: object, trials: pd.DataFrame, task: Task,
                        winner: _Winner | None, blocks: bool, n_replicates: int, seed: int) -> pd.DataFrame:
    """Return one participant's rows of :func:`context_report`: whole session, then each block."""
    m = task.n_symbols
    group = trials["group"].iloc[0] if "group" in trials.columns else pd.NA
    x, y = _pooled_sequence(trials, tree.max_depth)
    replicates = None if winner is None else _replicate_guesses(
        winner, x, trials["session"].to_numpy(), y >= 0, m, n_replicates, child_rng(seed, "replicates", participant))
    units = [((ALL, ALL), np.ones(len(trials), dtype=bool))]
    if blocks:
        pairs = trials[["session", "block"]].drop_duplicates().itertuples(index=False)
        units += [((block_label(s), block_label(b)),
                   ((trials["session"] == s) & (trials["block"] == b)).to_numpy()) for s, b in pairs]
    source = frozenset(task.contexts)
    parts = []
    for (session, block), mask in units:
        post = tree.posterior(x, m, targets=np.where(mask, y, -1))[0]
        keep = post.n_obs > 0
        rows = _report_rows(post, task, source)[keep]
        if winner is None:
            rows = rows.assign(model=None, n_replicates=0, expected_leaf_prob=np.nan,
                               **{name: np.nan for name in _EXPECTED_SHARES.values()})
        else:
            rows = rows.assign(model=winner.model, n_replicates=n_replicates,
                               **_replicate_columns(tree, x, np.where(mask, replicates, -1), m, keep))
        parts.append(rows.assign(participant=participant, group=group, session=session, block=block))
    return pd.concat(parts, ignore_index=True)


def _parse(label: str, task: Task) -> tuple[int, ...]:
    return parse_context(label, task.symbols)


def _status(context: tuple[int, ...], visited: set[tuple[int, ...]],
            map_leaves: set[tuple[int, ...]]) -> tuple[str, tuple[int, ...] | None]:
    """Return a source context's status in a response tree and the MAP leaf covering it (None if split)."""
    if context not in visited:
        return "not visited", None
    if context in map_leaves:
        return "distinguished", context
    for d in range(len(context) - 1, -1, -1):  # nodes prepend older symbols: ancestors are suffixes
        if context[len(context) - d:] in map_leaves:
            return "merged into shorter", context[len(context) - d:]
    return "split into longer", None


def context_agreement(report: pd.DataFrame, task: Task, *, level: float = BEYOND_LEVEL) -> pd.DataFrame:
    """Return each source context's status in every response tree, checked against the winning model.

    Parameters
    ----------
    report : pandas.DataFrame
        The output of :func:`context_report`.
    task : Task
    level : float, default 0.05
        ``beyond_model`` is True when the observed status occurs in fewer
        than this share of the winning model's replicates.

    Returns
    -------
    pandas.DataFrame
        participant, group, session, block, source_context, depth, status,
        response_leaf (the covering MAP leaf; '' when split or unvisited),
        n_obs and leaf_prob of s (0 and NaN when unvisited), model,
        n_replicates, expected_status_share (share of replicates in which s
        has the observed status; 1 for unvisited), expected_leaf_prob,
        beyond_model (missing, with model and the expected columns, when the
        report has no replicates for the participant).

    Raises
    ------
    UsageError
        For ``level`` outside (0, 1).

    Notes
    -----
    Status of a source context s in the MAP response tree: "distinguished"
    (s is itself a leaf: the guesses depend on exactly that past), "merged
    into shorter" (a shorter context, a suffix of s, is the leaf), "split
    into longer" (the response tree splits s further: the guesses depend on
    an older symbol than the source does), "not visited" (no guess was
    counted in s; also when s is deeper than the report's depth). Recency
    alone splits trees deeper,
    so each status is set against the replicates of the participant's
    winning model, a posterior predictive check (Gelman, Meng & Stern, 1996)
    with the fitted parameters as a plug-in estimate (their uncertainty is
    ignored, which makes the check somewhat quicker to flag). With 20
    replicates and level 0.05, beyond_model means "in none of them"; it is a
    per-context screen, not a corrected test: about ``level`` of the contexts
    are flagged by chance when the winning model is right.
    """
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not 0.0 < level < 1.0:
        raise UsageError(f"level must be a number in (0, 1), got {level!r}")
    rows = []
    keys = ["participant", "group", "session", "block"]
    for labels, unit in report.groupby(keys, sort=False, dropna=False):
        nodes = [_parse(c, task) for c in unit["context"]]
        visited = set(nodes)
        map_leaves = {c for c, leaf in zip(nodes, unit["in_map_tree"]) if leaf}
        stats = dict(zip(nodes, unit.to_dict("records")))
        n_rep = int(unit["n_replicates"].iloc[0])
        model = unit["model"].iloc[0] if n_rep > 0 else pd.NA
        for context in task.contexts:
            status, leaf = _status(context, visited, map_leaves)
            row = stats.get(context)
            if n_rep == 0:
                share = expected_leaf = np.nan
            elif row is None:
                share, expected_leaf = 1.0, np.nan
            else:
                share, expected_leaf = row[_EXPECTED_SHARES[status]], row["expected_leaf_prob"]
            rows.append({**dict(zip(keys, labels)), "source_context": task.context_label(context),
                         "depth": len(context), "status": status,
                         "response_leaf": task.context_label(leaf) if leaf is not None else "",
                         "n_obs": row["n_obs"] if row is not None else 0,
                         "leaf_prob": row["leaf_prob"] if row is not None else np.nan,
                         "model": model, "n_replicates": n_rep, "expected_status_share": share,
                         "expected_leaf_prob": expected_leaf,
                         "beyond_model": bool(share < level) if n_rep > 0 else pd.NA})
    out = pd.DataFrame(rows, columns=_AGREEMENT_COLUMNS)
    out["model"] = out["model"].astype("string")
    out["beyond_model"] = out["beyond_model"].astype("boolean")
    return out


__all__ = ["BEYOND_LEVEL", "DEFAULT_REPLICATES", "STATUSES", "STATUS_KEYS", "context_agreement", "context_report",
           "response_tree_depth"]
