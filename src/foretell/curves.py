"""Learning curves: one value per participant x block and metric, and guesses against the source by context."""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from foretell.compare import winners as find_winners
from foretell.contexts import context_report, response_tree_depth
from foretell.errors import UsageError
from foretell.labels import ALL, ROOT, block_label
from foretell.learners import Counting
from foretell.logs import ValidatedLog
from foretell.tasks import Task


@dataclass(frozen=True)
class Metric:
    """A learning-curve metric: what it measures, its unit, and how groups are compared on it.

    Attributes
    ----------
    name, title, unit, meaning : str
        Its column value, a figure title, its unit, and its definition in words.
    kind : {"rate", "continuous"}
        Successes / trials (binomial group model) or a value (Gaussian model).
    log : bool
        Compared (and modelled) as log values.
    modelled : bool
        Whether a hierarchical group model is fitted (the rate metric only
        when it is the design's main rate, :func:`main_rate`).
    designs : tuple of str
        The task designs it applies to.
    """

    name: str
    title: str
    unit: str
    kind: str
    log: bool
    modelled: bool
    designs: tuple[str, ...]
    meaning: str

    @property
    def scale(self) -> str:
        """Return the scale of group differences: the unit, or log of it."""
        return f"log {self.unit}" if self.log else self.unit

    @property
    def likelihood(self) -> str:
        """Return the group model's likelihood: "binomial" for a rate, else "gaussian"."""
        return "binomial" if self.kind == "rate" else "gaussian"


METRICS: dict[str, Metric] = {m.name: m for m in (
    Metric("accuracy", "Correct guesses", "share of trials", "rate", False, True, ("guess", "reaction"),
           "response == stimulus, over non-missed trials"),
    Metric("optimal_rate", "Guesses of the most likely next symbol", "share of trials", "rate", False, True,
           ("guess",), "guess == a most probable next symbol of the source in the true current context, "
           "over non-missed trials whose context is determined"),
    Metric("gain_bits", "Gain of the best learner over chance", "bits per trial", "continuous", False, True,
           ("guess",), "(loglik_session + n ln m) / (n ln 2) of the whole-session winning model, over the "
           "block's scored trials at the whole-session estimate"),
    Metric("inv_temp", "Choice determinism", "inverse temperature", "continuous", True, False, ("guess",),
           "inv_temp_block of the whole-session winning model, refitted on the block"),
    Metric("median_rt", "Median reaction time", "seconds", "continuous", True, True, ("guess", "reaction"),
           "median RT over the non-missed trials the RT screen keeps"),
    Metric("depth", "Context depth of the guesses", "symbols back", "continuous", False, False, ("guess",),
           "posterior mean context depth of the block's response tree, over its counted guesses"),
    Metric("rt_surprise_slope", "RT cost of surprise", "log seconds per bit", "continuous", False, True,
           ("reaction",), "least-squares slope of log RT on the surprise -log2 p(stimulus) of a "
           "Krichevsky-Trofimov counting learner of the task's depth, over screened RTs"),
)}


def main_rate(task: Task) -> str:
    """Return the rate the binomial model uses: "optimal_rate" with a source in a guess design, else "accuracy".

    Parameters
    ----------
    task : Task

    Returns
    -------
    str
    """
    return "optimal_rate" if task.has_source and task.response == "guess" else "accuracy"



_CURVE_COLUMNS = ["participant", "group", "session", "block", "metric", "value", "n_trials"]


def trial_frame(log: ValidatedLog) -> pd.DataFrame:
    """Return the log's trials with group (``all`` when absent) and session, block as labels.

    Parameters
    ----------
    log : ValidatedLog

    Returns
    -------
    pandas.DataFrame
        The log's frame with participant and group as strings, ``_session``
        and ``_block`` labels, sorted by participant, session and trial.

    Raises
    ------
    UsageError
        When ``log`` is not a validated log.
    """
    if not isinstance(log, ValidatedLog):
        raise UsageError("group comparisons take a validated log (foretell.logs.load_log or validate_log)")
    out = log.frame.copy()
    if "group" not in out.columns:
        out["group"] = ALL
    out["group"] = out["group"].astype(str)
    out["participant"] = out["participant"].astype(str)
    out["_session"] = out["session"].map(block_label)
    out["_block"] = out["block"].map(block_label)
    return out.sort_values(["participant", "session", "trial"], kind="stable").reset_index(drop=True)


def _per_session(frame: pd.DataFrame, fn: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
    """Return fn(stimulus indices of one session), one number per trial, laid back over the frame's trials."""
    x = frame["stimulus_idx"].to_numpy(np.int64)
    out = np.zeros(len(frame))
    for idx in frame.groupby(["participant", "_session"], sort=False).indices.values():
        out[idx] = fn(x[idx])
    return out


def _rate_rows(frame: pd.DataFrame, name: str, hit: np.ndarray, counted: np.ndarray) -> pd.DataFrame:
    """Return curve rows of a rate: hits / counted trials per participant x block."""
    data = frame[["participant", "group", "_session", "_block"]].assign(
        _hit=hit & counted, _n=counted)
    agg = data.groupby(["participant", "group", "_session", "_block"], sort=False)[["_hit", "_n"]].sum()
    agg = agg.reset_index()
    value = np.where(agg["_n"] > 0, agg["_hit"] / agg["_n"].where(agg["_n"] > 0, 1), np.nan)
    return _rows(agg, name, value, agg["_n"])


def _rows(agg: pd.DataFrame, name: str, value, n) -> pd.DataFrame:
    return pd.DataFrame({"participant": agg["participant"].to_numpy(), "group": agg["group"].to_numpy(),
                         "session": agg["_session"].to_numpy(), "block": agg["_block"].to_numpy(),
                         "metric": name, "value": np.asarray(value, dtype=float),
                         "n_trials": np.asarray(n, dtype=np.int64)})


def _optimal(frame: pd.DataFrame, task: Task) -> tuple[np.ndarray, np.ndarray]:
    """Return (guess is a most probable next symbol, context determined) per trial."""
    ctx = _per_session(frame, task.context_indices).astype(np.int64)
    probs = task.next_probs[np.maximum(ctx, 0)]
    guess = np.maximum(frame["response_idx"].to_numpy(np.int64), 0)
    best = probs[np.arange(len(frame)), guess] >= probs.max(axis=1) - 1e-12
    return best, ctx >= 0


def _median_rt(frame: pd.DataFrame) -> pd.DataFrame:
    data = frame[["participant", "group", "_session", "_block"]].assign(
        _rt=frame["rt"].where(frame["rt_ok"].astype(bool) & ~frame["missed"].astype(bool)))
    agg = data.groupby(["participant", "group", "_session", "_block"], sort=False)["_rt"] \
        .agg(["median", "count"]).reset_index()
    return _rows(agg, "median_rt", agg["median"], agg["count"])


def surprise_learner(task: Task) -> Counting:
    """Return the simple learner whose surprise drives ``rt_surprise_slope``.

    Krichevsky-Trofimov counting (alpha = 1/2; Krichevsky & Trofimov, 1981)
    of depth K, K the task's deepest context (1 when the source is not
    given), restarted at each session.

    Parameters
    ----------
    task : Task

    Returns
    -------
    Counting
    """
    return Counting(depth=task.max_depth if task.has_source else 1, alpha=0.5)


def _surprise_slope(frame: pd.DataFrame, task: Task) -> pd.DataFrame:
    """Return per block the least-squares slope of log RT on surprise in bits (NaN below 3 RTs or no spread)."""
    learner, m = surprise_learner(task), task.n_symbols

    def surprise(x: np.ndarray) -> np.ndarray:
        return -np.log2(learner.next_proba(x, m)[np.arange(len(x)), x])

    s = _per_session(frame, surprise)
    ok = frame["rt_ok"].astype(bool).to_numpy() & ~frame["missed"].astype(bool).to_numpy()
    y = np.log(frame["rt"].to_numpy(float), where=ok, out=np.zeros(len(frame)))
    data = frame[["participant", "group", "_session", "_block"]].assign(
        n=ok.astype(float), s=np.where(ok, s, 0.0), y=np.where(ok, y, 0.0))
    data = data.assign(ss=data["s"] ** 2, sy=data["s"] * data["y"])
    agg = data.groupby(["participant", "group", "_session", "_block"], sort=False)[
        ["n", "s", "y", "ss", "sy"]].sum().reset_index()
    n = agg["n"].to_numpy()
    sxx = agg["ss"] - agg["s"] ** 2 / np.where(n > 0, n, 1)
    sxy = agg["sy"] - agg["s"] * agg["y"] / np.where(n > 0, n, 1)
    usable = (n >= 3) & (sxx > 1e-12 * np.maximum(agg["ss"], 1.0))
    slope = np.where(usable, sxy / np.where(usable, sxx, 1.0), np.nan)
    return _rows(agg, "rt_surprise_slope", slope, n)


def _winner_rows(fits: pd.DataFrame, blocks: pd.DataFrame, winners: pd.DataFrame | None) -> pd.DataFrame:
    """Return the blocks rows of each participant's whole-session winning model."""
    missing = [c for c in ("participant", "session", "block", "model", "n_trials", "loglik_session",
                           "inv_temp_block", "converged") if c not in blocks.columns]
    if missing:
        raise UsageError(f"the blocks table lacks the column(s) {', '.join(missing)}")
    if winners is None:
        winners = find_winners(fits, blocks)
    best = winners.loc[winners["block"].astype(str) == ALL, ["participant", "best_model"]].dropna()
    best = best.assign(participant=best["participant"].astype(str))
    rows = blocks.assign(participant=blocks["participant"].astype(str)).merge(
        best, left_on=["participant", "model"], right_on=["participant", "best_model"])
    return rows.assign(_session=rows["session"].map(block_label), _block=rows["block"].map(block_label))


def _fit_metric_rows(frame: pd.DataFrame, task: Task, rows: pd.DataFrame) -> list[pd.DataFrame]:
    """Return gain_bits and inv_temp curve rows from the winning model's block rows."""
    group = frame.groupby("participant")["group"].first()
    rows = rows.assign(group=rows["participant"].map(group))
    n = rows["n_trials"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        gain = np.where(n > 0, (rows["loglik_session"].to_numpy(float) + n * math.log(task.n_symbols))
                        / (n * math.log(2.0)), np.nan)
    inv_temp = rows["inv_temp_block"].to_numpy(float)
    inv_temp = np.where(rows["converged"].astype("boolean").fillna(False).to_numpy(bool), inv_temp, np.nan)
    return [_rows(rows, "gain_bits", gain, n), _rows(rows, "inv_temp", inv_temp, n)]


def _depth_rows(frame: pd.DataFrame, contexts: pd.DataFrame) -> pd.DataFrame:
    """Return per block the mean context depth of the response tree over its counted guesses.

    Each counted guess passes through one node per depth along its past, so
    sum_s depth(s) leaf_prob(s) n_obs(s) / n_obs(root) is the mean over the
    block's guesses of the posterior expected depth of the leaf they reach.
    """
    ctx = contexts[contexts["block"].astype(str) != ALL]
    ctx = ctx.assign(participant=ctx["participant"].astype(str), _session=ctx["session"].map(block_label),
                     _block=ctx["block"].map(block_label),
                     _w=ctx["depth"].astype(float) * ctx["leaf_prob"].astype(float) * ctx["n_obs"].astype(float),
                     _root=np.where(ctx["context"].astype(str) == ROOT, ctx["n_obs"].astype(float), 0.0))
    agg = ctx.groupby(["participant", "_session", "_block"], sort=False)[["_w", "_root"]].sum().reset_index()
    group = frame.groupby("participant")["group"].first()
    agg = agg.assign(group=agg["participant"].map(group))
    depth = np.where(agg["_root"] > 0, agg["_w"] / agg["_root"].where(agg["_root"] > 0, 1.0), np.nan)
    return _rows(agg, "depth", depth, agg["_root"])


def available_metrics(task: Task, has_fits: bool, has_rt: bool) -> list[str]:
    """Return the metrics that can be computed for this design and these inputs, in :data:`METRICS` order.

    Parameters
    ----------
    task : Task
    has_fits : bool
        Fit tables are given (gain_bits and inv_temp need them).
    has_rt : bool
        The log has usable RTs.

    Returns
    -------
    list of str
    """
    out = []
    for name, metric in METRICS.items():
        if task.response not in metric.designs:
            continue
        if name == "optimal_rate" and not task.has_source:
            continue
        if name in ("gain_bits", "inv_temp") and not has_fits:
            continue
        if name in ("median_rt", "rt_surprise_slope") and not has_rt:
            continue
        out.append(name)
    return out


def learning_curves(log: ValidatedLog, task: Task, metrics: Sequence[str], *,
                    fits: pd.DataFrame | None = None, blocks: pd.DataFrame | None = None,
                    winners: pd.DataFrame | None = None, contexts: pd.DataFrame | None = None,
                    context_depth: int | None = None) -> pd.DataFrame:
    """Return the learning curves: one row per participant x block x metric.

    Every non-missed trial counts, warm-up included, except where a metric
    says otherwise (:data:`METRICS` holds each definition).

    Parameters
    ----------
    log : ValidatedLog
    task : Task
    metrics : sequence of str
        Names of :data:`METRICS`.
    fits, blocks, winners : pandas.DataFrame, optional
        The fit's tables (fits and blocks needed for gain_bits and inv_temp;
        winners found from them when absent).
    contexts : pandas.DataFrame, optional
        The response-tree report (:func:`foretell.contexts.context_report`),
        computed when absent, at depth ``context_depth`` (default the task's
        deepest context + 1).
    context_depth : int, optional

    Returns
    -------
    pandas.DataFrame
        Columns participant, group (``all`` when the log has none), session,
        block (labels), metric, value, n_trials (the trials the value rests
        on: non-missed trials for the rates; screened RTs for the RT metrics;
        the block's scored trials for gain_bits and inv_temp; the counted
        guesses of the response tree for depth).

    Raises
    ------
    UsageError
        When gain_bits or inv_temp are asked for without the fit tables.
    """
    frame = trial_frame(log)
    made = ~frame["missed"].astype(bool).to_numpy()
    parts = []
    if "accuracy" in metrics:
        hit = (frame["response_idx"] == frame["stimulus_idx"]).to_numpy()
        parts.append(_rate_rows(frame, "accuracy", hit, made))
    if "optimal_rate" in metrics:
        best, known = _optimal(frame, task)
        parts.append(_rate_rows(frame, "optimal_rate", best, made & known))
    if "gain_bits" in metrics or "inv_temp" in metrics:
        if fits is None or blocks is None:
            raise UsageError("gain_bits and inv_temp need the fit tables (fits and blocks)")
        rows = _fit_metric_rows(frame, task, _winner_rows(fits, blocks, winners))
        parts += [r for r, name in zip(rows, ("gain_bits", "inv_temp")) if name in metrics]
    if "median_rt" in metrics:
        parts.append(_median_rt(frame))
    if "depth" in metrics:
        if contexts is None:
            contexts = context_report(frame, task, max_depth=response_tree_depth(task, context_depth))
        parts.append(_depth_rows(frame, contexts))
    if "rt_surprise_slope" in metrics:
        parts.append(_surprise_slope(frame, task))
    if not parts:
        return pd.DataFrame(columns=_CURVE_COLUMNS)
    out = pd.concat(parts, ignore_index=True)
    order = {m: i for i, m in enumerate(METRICS)}
    out = out.assign(_m=out["metric"].map(order), _s=label_order(out["session"]), _b=label_order(out["block"]))
    return out.sort_values(["_m", "participant", "_s", "_b"], kind="stable") \
        .drop(columns=["_m", "_s", "_b"]).reset_index(drop=True)[_CURVE_COLUMNS]


def compared_values(curves: pd.DataFrame) -> pd.Series:
    """Return the curves' values on their metric's comparison scale: the log for log metrics (NaN at or below 0).

    Parameters
    ----------
    curves : pandas.DataFrame
        :func:`learning_curves` (metric and value columns).

    Returns
    -------
    pandas.Series
        Aligned with ``curves``.
    """
    value = curves["value"].astype(float)
    logged = curves["metric"].map(lambda m: METRICS[m].log).astype(bool).to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        return value.where(~logged, np.log(value.where(value > 0)))


TREND_SUMMARIES = ("mean over blocks", "learning slope")
"""The per-participant summaries of a learning curve (:func:`participant_trends`)."""


def participant_trends(curves: pd.DataFrame) -> pd.DataFrame:
    """Return per participant x metric the mean of its block values and its learning slope, on the comparison scale.

    Values are :func:`compared_values`; blocks without one are left out.
    The blocks of a metric are numbered x = 0, 1, ... in run order
    (session, then block) over every block in which any participant has a
    value. "mean over blocks" is the mean of the participant's values;
    "learning slope" the least-squares slope of its values on x,
    sum (x - mean x)(y - mean y) / sum (x - mean x)^2: the change per block
    (NaN with fewer than two blocks).

    Parameters
    ----------
    curves : pandas.DataFrame
        :func:`learning_curves`.

    Returns
    -------
    pandas.DataFrame
        Columns participant, group, metric, summary (:data:`TREND_SUMMARIES`),
        value, n_blocks (the participant's blocks with a value), blocks (the
        metric's blocks).
    """
    data = curves.assign(_y=compared_values(curves)).dropna(subset=["_y"])
    units = data[["metric", "session", "block"]].drop_duplicates()
    units = units.assign(_s=label_order(units["session"]), _b=label_order(units["block"])) \
        .sort_values(["metric", "_s", "_b"], kind="stable")
    units["_x"] = units.groupby("metric", sort=False).cumcount().astype(float)
    data = data.merge(units[["metric", "session", "block", "_x"]], on=["metric", "session", "block"])
    data = data.assign(_n=1.0, _xx=data["_x"] ** 2, _xy=data["_x"] * data["_y"])
    agg = data.groupby(["participant", "group", "metric"], sort=False)[["_n", "_x", "_y", "_xx", "_xy"]] \
        .sum().reset_index()
    n = agg["_n"].to_numpy()
    sxx = agg["_xx"] - agg["_x"] ** 2 / n
    sxy = agg["_xy"] - agg["_x"] * agg["_y"] / n
    usable = (n >= 2) & (sxx > 1e-12)
    blocks = agg["metric"].map(units.groupby("metric")["_x"].size())
    base = agg[["participant", "group", "metric"]].assign(n_blocks=n.astype(np.int64),
                                                          blocks=blocks.to_numpy(np.int64))
    mean = base.assign(summary=TREND_SUMMARIES[0], value=agg["_y"] / n)
    slope = base.assign(summary=TREND_SUMMARIES[1], value=np.where(usable, sxy / np.where(usable, sxx, 1.0), np.nan))
    columns = ["participant", "group", "metric", "summary", "value", "n_blocks", "blocks"]
    return pd.concat([mean, slope], ignore_index=True)[columns]


def label_order(labels: pd.Series) -> pd.Series:
    """Return block or session labels as numbers to order them by (labels that are not numbers last).

    Parameters
    ----------
    labels : pandas.Series

    Returns
    -------
    pandas.Series
    """
    return pd.to_numeric(labels, errors="coerce").fillna(np.inf)


def context_learning(log: ValidatedLog, task: Task) -> pd.DataFrame:
    """Return, per group x block x source context x symbol, the share of guesses against the source.

    Trials whose context is not yet determined are left out.

    Parameters
    ----------
    log : ValidatedLog
    task : Task

    Returns
    -------
    pandas.DataFrame
        Columns group, session, block, context (the source context, oldest
        first), symbol, guess_share (guesses of the symbol / non-missed
        guesses made in that context, pooled over the group's participants),
        source_prob (the source's probability of the symbol next in that
        context), n (the guesses made in the context), n_participants. Empty
        without a source or in a reaction design.
    """
    columns = ["group", "session", "block", "context", "symbol", "guess_share", "source_prob", "n",
               "n_participants"]
    if not task.has_source or task.response != "guess":
        return pd.DataFrame(columns=columns)
    frame = trial_frame(log)
    ctx = _per_session(frame, task.context_indices).astype(np.int64)
    keep = (ctx >= 0) & ~frame["missed"].astype(bool).to_numpy()
    data = frame.loc[keep, ["participant", "group", "_session", "_block", "response_idx"]].assign(_ctx=ctx[keep])
    keys = ["group", "_session", "_block", "_ctx"]
    counts = data.groupby([*keys, "response_idx"]).size().unstack(fill_value=0) \
        .reindex(columns=range(task.n_symbols), fill_value=0)
    people = data.groupby(keys)["participant"].nunique()
    n = counts.sum(axis=1)
    long = counts.stack().rename("count").reset_index()
    long = long.merge(n.rename("n").reset_index(), on=keys).merge(people.rename("n_participants").reset_index(),
                                                                  on=keys)
    sym = long["response_idx"].to_numpy(np.int64)
    cid = long["_ctx"].to_numpy(np.int64)
    out = pd.DataFrame({"group": long["group"], "session": long["_session"], "block": long["_block"],
                        "context": [task.context_label(task.contexts[c]) for c in cid],
                        "symbol": [task.symbols[s] for s in sym],
                        "guess_share": long["count"] / long["n"],
                        "source_prob": task.next_probs[cid, sym], "n": long["n"].astype(np.int64),
                        "n_participants": long["n_participants"].astype(np.int64), "_c": cid, "_y": sym})
    out = out.assign(_s=label_order(out["session"]), _b=label_order(out["block"]))
    return out.sort_values(["group", "_s", "_b", "_c", "_y"], kind="stable")[columns].reset_index(drop=True)
