"""Learning curves per participant and block, and the comparison of learning between groups.

Learning curves (:func:`learning_curves`): one value per participant x block
and metric (:data:`METRICS`), every non-missed trial counted, warm-up
included, except where a metric says otherwise. Per source context x block,
:func:`context_learning` gives the share of each guess against the source's
next-symbol probabilities.

Group comparison (:func:`compare_groups`), every group against a reference
group (pairwise contrasts "B-A" = group B minus reference A):

- a hierarchical Bayesian model per modelled metric (:func:`build_model`):
  binomial counts with a logit link for the rate metric (``optimal_rate``, or
  ``accuracy`` where the source is not given or the design is a reaction
  task), a Gaussian version for continuous metrics (``gain_bits``, log
  ``median_rt``, ``rt_surprise_slope``); group x block cell means
  (categorical blocks, or a linear trend in block position), participant
  random intercepts and random block slopes, so the group x block contrast is
  not anti-conservative (Barr et al., 2013); centred or non-centred
  participant intercepts by data strength (Betancourt & Girolami, 2015; see
  :func:`foretell.hierarchical.sampling.choose_parameterisation`). Posteriors pass the shared
  diagnostics gate of :mod:`foretell.hierarchical.sampling` or are "not called";
- a permutation test of the group difference per block (Fisher-Pitman, via
  :func:`scipy.stats.permutation_test`) with Holm's (1979) correction across
  blocks x contrasts per metric;
- the between-group test of model frequencies of Rigoux et al. (2014), for
  models and model families (:func:`groups_differ`);
- the fitted learner parameters compared between groups with the same
  permutation machinery (:func:`parameter_effects`).

References
----------
Barr, D. J., Levy, R., Scheepers, C., & Tily, H. J. (2013). Random effects
structure for confirmatory hypothesis testing: keep it maximal. J. Mem. Lang.
68, 255-278.
Betancourt, M., & Girolami, M. (2015). Hamiltonian Monte Carlo for
hierarchical models. In Current Trends in Bayesian Methodology with
Applications, 79-101.
Holm, S. (1979). A simple sequentially rejective multiple test procedure.
Scand. J. Statist. 6, 65-70.
Kruschke, J. K. (2015). Doing Bayesian Data Analysis, 2nd ed. (highest
density intervals).
Penny, W. D., Stephan, K. E., Daunizeau, J., et al. (2010). Comparing
families of dynamic causal models. PLoS Comput. Biol. 6, e1000709.
Rigoux, L., Stephan, K. E., Friston, K. J., & Daunizeau, J. (2014). Bayesian
model selection for group studies - revisited. NeuroImage 84, 971-985.
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from scipy import stats
from scipy.special import expit, logsumexp
from statsmodels.stats.multitest import multipletests

from foretell.steps.guesses import response_tree_depth
from foretell.hierarchical.sampling import Diagnostics, Gate, choose_parameterisation, diagnose, quiet, sample
from foretell.stats.selection import rfx_bms
from foretell.compare import default_families, log_evidence_table, winners as find_winners
from foretell.contexts import context_report
from foretell.errors import UsageError
from foretell.plots.common import colour, new_figure
from foretell.labels import ALL, ROOT, block_label
from foretell.learners import Counting
from foretell.logs import ValidatedLog
from foretell.params import PARAMS
from foretell.tasks import Task

import arviz as az  # noqa: E402  (imported quietly by foretell.hierarchical.sampling first)

HDI_PROB = 0.94
"""Probability mass of the reported highest density intervals (ArviZ's default; Kruschke, 2015)."""

MIN_GROUP_SIZE = 3
"""Participants a group needs before any inference is made about it (curves are always given)."""

DEFAULT_PERMUTATIONS = 9999
"""Random permutations per test (exact enumeration when there are fewer distinct splits)."""

TRENDS = ("categorical", "linear")

GATE = Gate(pareto_k_max=math.inf)
"""The diagnostics gate of every group model: rank-normalised R-hat, bulk ESS per chain, divergences.

The group models are not compared by PSIS-LOO, so no Pareto k limit applies
(k is still computed and reported in ``group_diagnostics``)."""


@dataclass(frozen=True)
class Metric:
    """A learning-curve metric: what it measures, its unit, and how groups are compared on it.

    ``kind`` "rate" (successes / trials, binomial model) or "continuous"
    (Gaussian model); ``log`` metrics are compared (and modelled) as log
    values; ``modelled`` says whether a hierarchical Bayesian model is fitted
    (the rate metric is modelled only when it is the design's main rate,
    see :func:`main_rate`); ``designs`` the task designs it applies to.
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
    """Return the rate the binomial model uses: optimal_rate with a source in a guess design, else accuracy."""
    return "optimal_rate" if task.has_source and task.response == "guess" else "accuracy"


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class GroupResult:
    """Learning curves and group comparisons of a study (see :func:`compare_groups`)."""

    curves: pd.DataFrame
    group_curves: pd.DataFrame
    group_effects: pd.DataFrame
    group_models: pd.DataFrame
    group_params: pd.DataFrame
    group_diagnostics: pd.DataFrame
    context_learning: pd.DataFrame
    notes: tuple[str, ...]
    figures: Mapping[str, object] = field(default_factory=dict)
    settings: Mapping[str, object] = field(default_factory=dict)

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return the output tables by file stem (``curves`` -> curves.csv)."""
        return {"curves": self.curves, "group_curves": self.group_curves,
                "group_effects": self.group_effects, "group_models": self.group_models,
                "group_params": self.group_params, "group_diagnostics": self.group_diagnostics,
                "context_learning": self.context_learning}


# --------------------------------------------------------------------------- learning curves

_CURVE_COLUMNS = ["participant", "group", "session", "block", "metric", "value", "n_trials"]


def _trial_frame(log: ValidatedLog) -> pd.DataFrame:
    """Return the log's trials with group (``all`` when absent) and session, block as labels."""
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


def _per_session(frame: pd.DataFrame, fn) -> np.ndarray:
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

    Krichevsky-Trofimov counting (alpha = 1/2) of depth K, K the task's
    deepest context (1 when the source is not given), restarted at each session.
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
    """Return the metrics that can be computed for this design and these inputs, in :data:`METRICS` order."""
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

    Columns participant, group (``all`` when the log has none), session,
    block (labels), metric, value, n_trials (the trials the value rests on:
    non-missed trials for the rates; screened RTs for the RT metrics; the
    block's scored trials for gain_bits and inv_temp; the counted guesses of
    the response tree for depth). See :data:`METRICS` for each definition.
    ``fits``, ``blocks`` and optionally ``winners`` are the fitter's tables
    (needed for gain_bits and inv_temp); ``contexts`` the response-tree report
    (:func:`foretell.contexts.context_report`, computed when absent, at depth
    ``context_depth``: default the task's deepest context + 1).
    """
    frame = _trial_frame(log)
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
    out = out.assign(_m=out["metric"].map(order), _s=_numeric(out["session"]), _b=_numeric(out["block"]))
    return out.sort_values(["_m", "participant", "_s", "_b"], kind="stable") \
        .drop(columns=["_m", "_s", "_b"]).reset_index(drop=True)[_CURVE_COLUMNS]


def _numeric(labels: pd.Series) -> pd.Series:
    """Return block or session labels as numbers for ordering (non-numbers last)."""
    return pd.to_numeric(labels, errors="coerce").fillna(np.inf)


def context_learning(log: ValidatedLog, task: Task) -> pd.DataFrame:
    """Return, per group x block x source context x symbol, the share of guesses against the source.

    Columns group, session, block, context (the source context, oldest first),
    symbol, guess_share (guesses of the symbol / non-missed guesses made in
    that context, pooled over the group's participants), source_prob (the
    source's probability of the symbol next in that context), n (the guesses
    made in the context), n_participants. Trials whose context is not yet
    determined are left out. Empty without a source or in a reaction design.
    """
    columns = ["group", "session", "block", "context", "symbol", "guess_share", "source_prob", "n",
               "n_participants"]
    if not task.has_source or task.response != "guess":
        return pd.DataFrame(columns=columns)
    frame = _trial_frame(log)
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
    out = out.assign(_s=_numeric(out["session"]), _b=_numeric(out["block"]))
    return out.sort_values(["group", "_s", "_b", "_c", "_y"], kind="stable")[columns].reset_index(drop=True)


# --------------------------------------------------------------------------- permutation tests


def _mean_difference(x: np.ndarray, y: np.ndarray, axis: int) -> np.ndarray:
    return np.mean(x, axis=axis) - np.mean(y, axis=axis)


def _test_rng(seed: int, *labels: object) -> np.random.Generator:
    """Return the Generator of one test: the seed and a hash of its labels, so tests are independent."""
    key = zlib.crc32("|".join(map(str, labels)).encode())
    return np.random.default_rng(np.random.SeedSequence([int(seed), key]))


def permutation_p(values: np.ndarray, reference: np.ndarray, *, n_permutations: int = DEFAULT_PERMUTATIONS,
                  rng: np.random.Generator) -> float:
    """Return the two-sided permutation p-value of mean(values) - mean(reference).

    Fisher-Pitman permutation test of the difference in means between two
    independent samples (:func:`scipy.stats.permutation_test`, exact when
    the number of distinct splits is at most ``n_permutations``).
    """
    res = stats.permutation_test((np.asarray(values, float), np.asarray(reference, float)), _mean_difference,
                                 permutation_type="independent", vectorized=True,
                                 n_resamples=int(n_permutations), alternative="two-sided", rng=rng)
    return float(res.pvalue)


def holm(p: Sequence[float]) -> np.ndarray:
    """Return Holm-adjusted p-values (Holm, 1979); NaN entries stay NaN and do not count as tests."""
    p = np.asarray(p, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    if ok.any():
        out[ok] = multipletests(p[ok], method="holm")[1]
    return out


def _compare_values(value: pd.Series, group: pd.Series, contrasts: Sequence[tuple[str, str]],
                    n_permutations: int, seed: int, labels: tuple) -> list[dict]:
    """Return one dict per contrast: means, observed difference, permutation p (NaN below the group size)."""
    out = []
    for g, ref in contrasts:
        a = value[(group == g).to_numpy()].dropna().to_numpy(float)
        b = value[(group == ref).to_numpy()].dropna().to_numpy(float)
        enough = len(a) >= MIN_GROUP_SIZE and len(b) >= MIN_GROUP_SIZE
        p = permutation_p(a, b, n_permutations=n_permutations, rng=_test_rng(seed, *labels, g, ref)) \
            if enough else math.nan
        out.append({"contrast": f"{g}-{ref}", "group": g, "reference": ref, "n_group": len(a),
                    "n_reference": len(b), "mean_group": a.mean() if len(a) else math.nan,
                    "mean_reference": b.mean() if len(b) else math.nan,
                    "observed_diff": a.mean() - b.mean() if len(a) and len(b) else math.nan,
                    "perm_p": p})
    return out


def permutation_effects(curves: pd.DataFrame, contrasts: Sequence[tuple[str, str]], *,
                        n_permutations: int = DEFAULT_PERMUTATIONS, seed: int = 0) -> pd.DataFrame:
    """Return per metric x block x contrast the observed group difference and its permutation p-values.

    The statistic is the difference in participants' mean value (group minus
    reference), on the metric's comparison scale (log values for the log
    metrics of :data:`METRICS`); ``perm_p`` is its two-sided permutation
    p-value (:func:`permutation_p`), ``perm_p_holm`` Holm-adjusted across
    blocks x contrasts within the metric. No test (NaN) where a group has
    fewer than :data:`MIN_GROUP_SIZE` participants with a value.
    """
    rows = []
    for (metric, session, block), part in curves.groupby(["metric", "session", "block"], sort=False):
        value = part["value"].astype(float)
        if METRICS[metric].log:
            value = np.log(value.where(value > 0))
        for row in _compare_values(value, part["group"], contrasts, n_permutations, seed,
                                   ("curve", metric, session, block)):
            rows.append({"metric": metric, "session": session, "block": block, **row})
    columns = ["contrast", "group", "reference", "session", "block", "metric", "scale", "n_group",
               "n_reference", "observed_diff", "perm_p", "perm_p_holm"]
    if not rows:
        return pd.DataFrame(columns=columns)
    out = pd.DataFrame(rows)
    out["scale"] = out["metric"].map(lambda m: METRICS[m].scale)
    out["perm_p_holm"] = out.groupby("metric", sort=False)["perm_p"].transform(lambda p: holm(p.to_numpy()))
    return out[columns]


PARAM_COLUMNS = ["contrast", "group", "reference", "model", "parameter", "scale", "n_group", "n_reference",
                 "mean_group", "mean_reference", "observed_diff", "perm_p", "perm_p_holm"]
MODEL_COLUMNS = ["contrast", "group", "reference", "level", "name", "prob_groups_differ", "log_bayes_factor",
                 "freq_group", "freq_reference", "n_group", "n_reference"]
DIAGNOSTIC_COLUMNS = ["metric", "likelihood", "trend", "parameterisation", "parameterisation_reason",
                      "n_participants", "n_blocks", "n_observations", "sampler", "chains", "draws", "rhat_max",
                      "ess_bulk_min", "divergences", "pareto_k_max", "ok", "provisional", "reasons",
                      "sampler_messages"]


def parameter_effects(fits: pd.DataFrame, contrasts: Sequence[tuple[str, str]], *,
                      n_permutations: int = DEFAULT_PERMUTATIONS, seed: int = 0) -> pd.DataFrame:
    """Return per model x parameter x contrast the group difference of fitted parameters, with permutation p.

    Every model is fitted to every participant, so a parameter is compared
    within a model, over the participants whose fit converged. Parameters are
    the choice rule's and the learner's columns of ``fits`` that vary
    across participants (held parameters are left out); log-scale
    parameters (:data:`foretell.params.PARAMS`: inv_temp, lapse, alpha) are
    compared as log values. Holm's correction runs across models x
    parameters x contrasts. Columns contrast, group, reference, model,
    parameter, scale, n_group, n_reference, mean_group, mean_reference (on
    the comparison scale), observed_diff, perm_p, perm_p_holm.
    """
    columns = PARAM_COLUMNS
    ok = fits[fits["converged"].astype("boolean").fillna(False).to_numpy(bool)]
    rows = []
    for model, part in ok.groupby("model", sort=False):
        for name, param in PARAMS.items():
            if name not in part.columns:
                continue
            value = part[name].astype(float)
            if value.notna().sum() < 2 or np.nanstd(value.to_numpy()) == 0.0:
                continue
            if param.log_scale:
                value = np.log(value.where(value > 0))
            group = part["group"].astype(str)
            for row in _compare_values(value, group, contrasts, n_permutations, seed, ("param", model, name)):
                rows.append({"model": model, "parameter": name,
                             "scale": f"log {name}" if param.log_scale else name, **row})
    if not rows:
        return pd.DataFrame(columns=columns)
    out = pd.DataFrame(rows)
    out["perm_p_holm"] = holm(out["perm_p"].to_numpy())
    return out[columns]


# --------------------------------------------------------------------------- between-group model test


def family_evidence(log_evidence: np.ndarray, members: Sequence[Sequence[int]]) -> np.ndarray:
    """Return (N, F) family log evidence: ln of the mean of e^L over each family's models.

    L_nf = ln sum_{k in f} e^{L_nk} - ln |f|, the evidence of family f under a
    uniform prior over its members (Penny et al., 2010).
    """
    lme = np.asarray(log_evidence, dtype=float)
    return np.column_stack([logsumexp(lme[:, list(cols)], axis=1) - math.log(len(cols)) for cols in members])


def groups_differ(log_evidence: np.ndarray, reference_evidence: np.ndarray) -> tuple[float, float]:
    """Return (posterior probability that the groups' model frequencies differ, log Bayes factor in nats).

    Rigoux et al. (2014): under "differ" each group has its own frequencies,
    log p(y | differ) = F(group) + F(reference); under "same" one set of
    frequencies generates both, log p(y | same) = F(pooled); F is the free
    energy of random-effects BMS (:func:`foretell.stats.selection.rfx_bms`). With equal
    prior odds, P(differ | y) = 1 / (1 + exp(F(pooled) - F(group) - F(reference))).
    """
    a, b = np.asarray(log_evidence, float), np.asarray(reference_evidence, float)
    if a.ndim != 2 or b.ndim != 2 or a.shape[1] != b.shape[1]:
        raise UsageError(f"the two groups' log evidence must be (participants, models) with the same "
                         f"models; got shapes {a.shape} and {b.shape}")
    log_bf = rfx_bms(a).free_energy + rfx_bms(b).free_energy - rfx_bms(np.vstack([a, b])).free_energy
    return float(expit(log_bf)), float(log_bf)


def model_effects(fits: pd.DataFrame, contrasts: Sequence[tuple[str, str]],
                  task: Task) -> tuple[pd.DataFrame, list[str]]:
    """Return (table, notes): the between-group test of model and family frequencies per contrast.

    Log evidence -BIC/2 (:func:`foretell.compare.log_evidence_table`); a
    participant with an unusable fit of any model is left out (noted).
    Families are :func:`foretell.compare.default_families`, the family
    evidence :func:`family_evidence`. One row per contrast x level ("model"
    or "family") x name: prob_groups_differ and log_bayes_factor (the
    contrast's, repeated on its rows; :func:`groups_differ`), and each
    group's expected frequency of that model or family from its own
    random-effects BMS side by side (freq_group, freq_reference), with
    n_group and n_reference.
    """
    table = log_evidence_table(fits, "bic")
    table = table.assign(participant=table["participant"].astype(str), group=table["group"].astype(str))
    models = list(pd.unique(table["model"]))
    wide = table.pivot(index="participant", columns="model", values="log_evidence").reindex(columns=models)
    notes = []
    bad = wide.index[wide.isna().any(axis=1)]
    if len(bad):
        notes.append("between-group model test: left out (unusable fit of some model): " + ", ".join(bad))
    wide = wide.dropna()
    group_of = table.groupby("participant")["group"].first().reindex(wide.index)
    fams = default_families(models, task_depth=task.max_depth)
    members = [[models.index(m) for m in ms] for ms in fams.values()]
    rows = []
    for g, ref in contrasts:
        ev = {k: wide[(group_of == k).to_numpy()].to_numpy(float) for k in (g, ref)}
        if min(len(ev[g]), len(ev[ref])) < MIN_GROUP_SIZE:
            continue
        levels = [("model", models, ev[g], ev[ref])]
        if len(members) >= 2:
            levels.append(("family", list(fams), family_evidence(ev[g], members),
                           family_evidence(ev[ref], members)))
        for level, names, a, b in levels:
            prob, log_bf = groups_differ(a, b)
            fa, fb = rfx_bms(a).expected_freq, rfx_bms(b).expected_freq
            rows += [{"contrast": f"{g}-{ref}", "group": g, "reference": ref, "level": level, "name": name,
                      "prob_groups_differ": prob, "log_bayes_factor": log_bf, "freq_group": fa[i],
                      "freq_reference": fb[i], "n_group": len(a), "n_reference": len(b)}
                     for i, name in enumerate(names)]
    return pd.DataFrame(rows, columns=MODEL_COLUMNS), notes


# --------------------------------------------------------------------------- hierarchical group model


@dataclass(frozen=True, eq=False)
class GroupModelData:
    """One metric's values ready for the hierarchical model: one entry per observed participant x block.

    ``kind`` "binomial" (``y`` successes out of ``n``) or "gaussian" (``y``
    the values on the comparison scale, standardised: (value - centre) /
    spread); ``participant`` and ``block`` index ``participants`` and
    ``units`` ((session, block) labels in run order); ``group`` indexes
    ``groups`` per participant; ``position`` is each block's position in run
    order, centred and scaled to span 1 from first to last (0 with one block).
    """

    metric: str
    kind: str
    y: np.ndarray
    n: np.ndarray | None
    participant: np.ndarray
    block: np.ndarray
    group: np.ndarray
    position: np.ndarray
    participants: tuple[str, ...]
    units: tuple[tuple[str, str], ...]
    groups: tuple[str, ...]
    centre: float = 0.0
    spread: float = 1.0

    def obs_per_participant(self) -> np.ndarray:
        """Return each participant's observations: trials (binomial) or blocks (Gaussian)."""
        weights = self.n if self.kind == "binomial" else np.ones(len(self.y))
        return np.bincount(self.participant, weights=weights, minlength=len(self.participants))

    def has_cell(self) -> np.ndarray:
        """Return (groups, blocks): whether any participant of the group has a value in the block."""
        out = np.zeros((len(self.groups), len(self.units)), dtype=bool)
        out[self.group[self.participant], self.block] = True
        return out


def model_data(curves: pd.DataFrame, metric: str, groups: Sequence[str]) -> GroupModelData:
    """Return the :class:`GroupModelData` of ``metric`` for the participants of ``groups`` in ``curves``.

    Rows without a value (or with no trials, or a non-positive value of a log
    metric) are left out. Rates become successes = round(value x n_trials).
    """
    spec = METRICS[metric]
    rows = curves[(curves["metric"] == metric) & curves["group"].isin(groups)]
    value = rows["value"].astype(float)
    keep = value.notna() & (rows["n_trials"] > 0) & ((value > 0) if spec.log else True)
    rows, value = rows[keep], value[keep].to_numpy(float)
    units = rows[["session", "block"]].drop_duplicates()
    units = units.assign(_s=_numeric(units["session"]), _b=_numeric(units["block"])) \
        .sort_values(["_s", "_b"], kind="stable")
    unit_list = [tuple(u) for u in units[["session", "block"]].itertuples(index=False)]
    unit_index = {u: i for i, u in enumerate(unit_list)}
    people = list(pd.unique(rows["participant"]))
    person_index = {p: i for i, p in enumerate(people)}
    group_list = [g for g in groups if (rows["group"] == g).any()]
    first_group = rows.groupby("participant", sort=False)["group"].first()
    n_units = len(unit_list)
    position = (np.arange(n_units) - (n_units - 1) / 2) / max(n_units - 1, 1)
    common = dict(metric=metric, participant=rows["participant"].map(person_index).to_numpy(np.int64),
                  block=np.array([unit_index[(s, b)] for s, b in zip(rows["session"], rows["block"])],
                                 dtype=np.int64),
                  group=np.array([group_list.index(first_group[p]) for p in people], dtype=np.int64),
                  position=position, participants=tuple(people), units=tuple(unit_list),
                  groups=tuple(group_list))
    if spec.kind == "rate":
        n = rows["n_trials"].to_numpy(np.int64)
        return GroupModelData(kind="binomial", y=np.rint(value * n).astype(np.int64), n=n, **common)
    y = np.log(value) if spec.log else value
    centre, spread = float(y.mean()), float(y.std()) if len(y) > 1 and y.std() > 0 else 1.0
    return GroupModelData(kind="gaussian", y=(y - centre) / spread, n=None, centre=centre, spread=spread,
                          **common)


@dataclass(frozen=True)
class GroupModelSpec:
    """How the hierarchical group model is built.

    ``trend`` "categorical" (one mean per group x block) or "linear" (per
    group a level and a slope in block position); ``parameterisation``
    "centred" or "non-centred" of the participant intercepts (the block
    slopes are always non-centred, see :func:`build_model`); without
    ``random_effects`` only the fixed group x block core remains.
    ``prior_scale`` is the sd of the Normal priors on the fixed effects
    (default 1.5 on the logit scale, 1 on the standardised Gaussian scale).
    """

    trend: str = "categorical"
    parameterisation: str = "centred"
    random_effects: bool = True
    prior_scale: float | None = None

    def __post_init__(self) -> None:
        if self.trend not in TRENDS:
            raise UsageError(f"trend must be one of {', '.join(TRENDS)}; got {self.trend!r}")
        if self.parameterisation not in ("centred", "non-centred"):
            raise UsageError(f"parameterisation must be 'centred' or 'non-centred'; got {self.parameterisation!r}")


def build_model(data: GroupModelData, spec: GroupModelSpec = GroupModelSpec()):
    """Return the PyMC model of one metric: group x block effects with participant random effects.

    eta_ib = cell[g(i), b] + u_i + v_i t_b, with t_b the block's position
    (:class:`GroupModelData`); binomial y_ib ~ Binomial(n_ib, logistic(eta_ib))
    or Gaussian y_ib ~ Normal(eta_ib, sigma). cell ~ Normal(0, s) per group x
    block ("categorical") or cell[g, b] = level_g + slope_g t_b with level,
    slope ~ Normal(0, s) ("linear"); u_i ~ Normal(0, sd_intercept), v_i ~
    Normal(0, sd_block_slope) (random intercepts and random block slopes;
    Barr et al., 2013), sd_intercept, sd_block_slope, sigma ~ HalfNormal(1).

    Coordinates. The same model is written with each participant's own
    intercept a_i = m_g + u_i and slope b_i = k_g + v_i, centred on the
    group's level m_g = mean_b cell[g, b] and trend k_g = sum_b t_b cell[g, b]
    / sum_b t_b^2: eta_ib = a_i + b_i t_b + (cell[g, b] - m_g - k_g t_b).
    Centred: a_i ~ Normal(m_g, sd_intercept), which removes the ridge between
    the cell means and the mean of the participant effects when data are
    strong; non-centred: a_i = m_g + sd_intercept z_i, z_i ~ Normal(0, 1), for
    weak data (Betancourt & Girolami, 2015). The slopes b_i are always
    non-centred: block positions span only 1, so a participant's data pin
    the slope far less than the intercept, and a small slope spread makes
    the centred form a funnel.
    """
    import pymc as pm

    n_groups, n_blocks, n_people = len(data.groups), len(data.units), len(data.participants)
    scale = spec.prior_scale if spec.prior_scale is not None else (1.5 if data.kind == "binomial" else 1.0)
    obs_group = data.group[data.participant]
    t = data.position[data.block]
    with pm.Model() as model:
        if spec.trend == "categorical":
            cell = pm.Normal("cell", 0.0, scale, shape=(n_groups, n_blocks))
        else:
            level = pm.Normal("level", 0.0, scale, shape=n_groups)
            slope = pm.Normal("slope", 0.0, scale, shape=n_groups)
            cell = pm.Deterministic("cell", level[:, None] + slope[:, None] * data.position[None, :])
        if not spec.random_effects:
            eta = cell[obs_group, data.block]
        else:
            # each participant's own intercept and slope, centred on their group's level and trend
            level = cell.mean(axis=1)
            effects = [("intercept", level, np.ones(len(data.y)))]
            residual = cell - level[:, None]
            if n_blocks > 1:
                trend = (cell * data.position[None, :]).sum(axis=1) / np.sum(data.position ** 2)
                effects.append(("block_slope", trend, t))
                residual = residual - trend[:, None] * data.position[None, :]
            eta = residual[obs_group, data.block]
            for name, centre, covariate in effects:
                sd = pm.HalfNormal(f"sd_{name}", 1.0)
                if spec.parameterisation == "centred" and name == "intercept":
                    effect = pm.Normal(name, centre[data.group], sd, shape=n_people)
                else:
                    z = pm.Normal(f"{name}_z", 0.0, 1.0, shape=n_people)
                    effect = pm.Deterministic(name, centre[data.group] + sd * z)
                eta = eta + effect[data.participant] * covariate
        if data.kind == "binomial":
            pm.Binomial("y", n=data.n, logit_p=eta, observed=data.y)
        else:
            pm.Normal("y", mu=eta, sigma=pm.HalfNormal("sigma", 1.0), observed=data.y)
    return model


def hdi(draws: np.ndarray, prob: float = HDI_PROB) -> tuple[float, float]:
    """Return the highest density interval of ``draws`` (all axes pooled) holding ``prob`` (arviz.hdi)."""
    values = np.asarray(draws, dtype=float).ravel()
    with quiet():
        low, high = az.hdi(values, hdi_prob=prob)
    return float(low), float(high)


@dataclass(frozen=True)
class GroupModelFit:
    """A sampled group model: summaries, diagnostics, how it was built, and the posterior (InferenceData)."""

    metric: str
    group_curves: pd.DataFrame
    effects: pd.DataFrame
    diagnostics: Diagnostics
    parameterisation: str
    parameterisation_reason: str
    spec: GroupModelSpec
    messages: tuple[str, ...]
    posterior: object = None


def _scale_draws(data: GroupModelData, cell: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (curve draws on the metric's own scale, draws on the comparison scale) of the cell means."""
    if data.kind == "binomial":
        rate = expit(cell)
        return rate, rate
    value = cell * data.spread + data.centre
    return (np.exp(value) if METRICS[data.metric].log else value), value


def fit_group_model(data: GroupModelData, contrasts: Sequence[tuple[str, str]], *,
                    trend: str = "categorical", parameterisation: str = "auto", draws: int = 1000,
                    chains: int = 4, tune: int = 1000, seed: int = 0, cores: int = 1,
                    progress: bool = False, gate: Gate = GATE) -> GroupModelFit:
    """Return the sampled hierarchical model of one metric, summarised per group x block and contrast.

    Group curves: per group x block the posterior mean and :data:`HDI_PROB`
    HDI of a typical participant's value (random effects at 0): the rate
    logistic(cell) for a rate, the value (seconds, via exp, for log metrics)
    for a continuous metric. Effects: per contrast x block the posterior of
    the difference group - reference on the comparison scale (rate
    difference; log seconds for median RT), its HDI and P(difference > 0).
    The posterior passes ``gate`` (:func:`foretell.hierarchical.sampling.diagnose`) or every
    summary is NaN with ``called`` False. The parameterisation follows the
    participants' observations (:func:`foretell.hierarchical.sampling.choose_parameterisation`);
    ``cores`` chains run in parallel.
    """
    how, reason = choose_parameterisation(data.obs_per_participant(), parameterisation)
    spec = GroupModelSpec(trend=trend, parameterisation=how)
    model = build_model(data, spec)
    idata, sampler, messages = sample(model, draws=draws, tune=tune, chains=chains, seed=seed,
                                      cores=cores, progress=progress)
    import pymc as pm

    with quiet(), model:
        pm.compute_log_likelihood(idata, progressbar=False)
    diag = diagnose(idata, sampler, gate)
    curves, effects = summarise_group_model(data, idata, contrasts, called=diag.ok)
    return GroupModelFit(data.metric, curves, effects, diag, how, reason, spec, tuple(messages), idata)


def summarise_group_model(data: GroupModelData, idata: object, contrasts: Sequence[tuple[str, str]], *,
                          called: bool) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return (group curves, effects) of a sampled group model; every number NaN when not ``called``.

    See :func:`fit_group_model` for the columns. Only group x block cells
    with data are summarised, and a contrast only in blocks where both
    groups have data.
    """
    cell = idata.posterior["cell"].to_numpy()  # (chain, draw, group, block)
    curve, compared = _scale_draws(data, cell)
    present = data.has_cell()
    curve_rows, effect_rows = [], []
    for b, (session, block) in enumerate(data.units):
        for g, name in enumerate(data.groups):
            if not present[g, b]:
                continue
            low, high = hdi(curve[..., g, b]) if called else (math.nan, math.nan)
            curve_rows.append({"group": name, "session": session, "block": block, "metric": data.metric,
                               "mean": float(curve[..., g, b].mean()) if called else math.nan,
                               "hdi_low": low, "hdi_high": high, "called": called})
        for g_name, ref_name in contrasts:
            if g_name not in data.groups or ref_name not in data.groups:
                continue
            g, r = data.groups.index(g_name), data.groups.index(ref_name)
            if not (present[g, b] and present[r, b]):
                continue
            diff = compared[..., g, b] - compared[..., r, b]
            low, high = hdi(diff) if called else (math.nan, math.nan)
            effect_rows.append({"contrast": f"{g_name}-{ref_name}", "session": session, "block": block,
                                "metric": data.metric, "diff_mean": float(diff.mean()) if called else math.nan,
                                "hdi_low": low, "hdi_high": high,
                                "prob_positive": float((diff > 0).mean()) if called else math.nan,
                                "called": called})
    return pd.DataFrame(curve_rows), pd.DataFrame(effect_rows)


def _diagnostics_row(fit: GroupModelFit, data: GroupModelData) -> dict[str, object]:
    return {"metric": fit.metric, "likelihood": data.kind, "trend": fit.spec.trend,
            "parameterisation": fit.parameterisation, "parameterisation_reason": fit.parameterisation_reason,
            "n_participants": len(data.participants), "n_blocks": len(data.units),
            "n_observations": len(data.y), **fit.diagnostics.row(), "sampler_messages": "; ".join(fit.messages)}


# --------------------------------------------------------------------------- figures


def _unit_order(table: pd.DataFrame) -> list[tuple[str, str]]:
    units = table[["session", "block"]].drop_duplicates()
    units = units.assign(_s=_numeric(units["session"]), _b=_numeric(units["block"])) \
        .sort_values(["_s", "_b"], kind="stable")
    return [tuple(u) for u in units[["session", "block"]].itertuples(index=False)]


def _unit_ticks(ax, units: Sequence[tuple[str, str]]) -> None:
    sessions = {s for s, _ in units}
    labels = [b if len(sessions) == 1 else f"{s}:{b}" for s, b in units]
    ax.set_xticks(range(len(units)), labels)
    ax.set_xlabel("block" if len(sessions) == 1 else "session:block")


def curve_figure(group_curves: pd.DataFrame, metric: str):
    """Return the learning curve of ``metric`` by group: participants' mean, and the model's HDI band.

    Dots joined by a thin line: the mean over the group's participants;
    thick line and band: the hierarchical model's posterior mean and
    :data:`HDI_PROB` HDI of a typical participant, where a model was fitted
    and passed the diagnostics.
    """
    spec = METRICS[metric]
    rows = group_curves[group_curves["metric"] == metric]
    units = _unit_order(rows)
    index = {u: i for i, u in enumerate(units)}
    fig, (ax,) = new_figure(width=max(4.8, 0.45 * len(units) + 3.0))
    for i, (group, part) in enumerate(rows.groupby("group", sort=True)):
        x = np.array([index[(s, b)] for s, b in zip(part["session"], part["block"])])
        order = np.argsort(x)
        x, part = x[order], part.iloc[order]
        ax.plot(x, part["participant_mean"], marker="o", linewidth=0.8, color=colour(i),
                label=f"{group}: mean of participants")
        fitted = part["mean"].notna().to_numpy()
        if fitted.any():
            ax.plot(x[fitted], part["mean"][fitted], linewidth=2.0, color=colour(i),
                    label=f"{group}: model, {HDI_PROB:.0%} HDI")
            ax.fill_between(x[fitted], part["hdi_low"][fitted], part["hdi_high"][fitted], color=colour(i),
                            alpha=0.25, linewidth=0)
    _unit_ticks(ax, units)
    if spec.log:
        ax.set_yscale("log")
    ax.set_ylabel(f"{metric} ({spec.unit})")
    ax.set_title(f"{spec.title} by block")
    ax.legend(fontsize="small")
    return fig


def context_figure(table: pd.DataFrame):
    """Return one panel per source context: share of guesses of its most likely next symbol, by group and block.

    The dashed line is the source's probability of that symbol (where
    probability matching would put the share); 1 is always guessing it.
    Where two symbols tie as most likely, the first in the alphabet is shown.
    Up to four panels per row.
    """
    best = table[table["source_prob"] >= table.groupby("context")["source_prob"].transform("max") - 1e-12]
    best = best.drop_duplicates(["group", "session", "block", "context"])
    contexts = list(dict.fromkeys(best["context"]))
    units = _unit_order(best)
    index = {u: i for i, u in enumerate(units)}
    columns = min(len(contexts), 4)
    rows = -(-len(contexts) // columns)
    fig = Figure(figsize=(columns * max(3.6, 0.3 * len(units) + 2.4), rows * 3.2), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, columns, squeeze=False).ravel()
    for ax in axes[len(contexts):]:
        ax.set_visible(False)
    for ax, context in zip(axes, contexts):
        part = best[best["context"] == context]
        for i, (group, rows) in enumerate(part.groupby("group", sort=True)):
            x = np.array([index[(s, b)] for s, b in zip(rows["session"], rows["block"])])
            order = np.argsort(x)
            ax.plot(x[order], rows["guess_share"].to_numpy()[order], marker="o", color=colour(i), label=group)
        ax.axhline(part["source_prob"].iat[0], color="0.4", linestyle="--", linewidth=1,
                   label="source probability")
        ax.set_ylim(-0.02, 1.02)
        _unit_ticks(ax, units)
        ax.set_ylabel(f"share of guesses of '{part['symbol'].iat[0]}'")
        ax.set_title(f"after {context}")
    if contexts:
        axes[0].legend(fontsize="small")
    fig.suptitle("Guesses of the most likely next symbol, by context")
    return fig


# --------------------------------------------------------------------------- the whole comparison


@dataclass(frozen=True)
class _FitInputs:
    fits: pd.DataFrame | None
    blocks: pd.DataFrame | None
    winners: pd.DataFrame | None
    contexts: pd.DataFrame | None


def _fit_inputs(source: object) -> _FitInputs:
    """Return the fit tables of a FitResult, a FitTables, a mapping of tables, or None."""
    if source is None:
        return _FitInputs(None, None, None, None)
    if isinstance(source, Mapping):
        get = source.get
    else:
        def get(name: str) -> object:
            return getattr(source, name, None)
    fits, blocks = get("fits"), get("blocks")
    if not isinstance(fits, pd.DataFrame) or not isinstance(blocks, pd.DataFrame):
        raise UsageError("the fit results need a fits and a blocks table (a FitResult, FitTables or "
                         "a mapping of tables)")
    return _FitInputs(fits, blocks, get("winners"), get("contexts"))


def _check_whole(name: str, value: object, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise UsageError(f"{name} must be a whole number >= {low}, got {value!r}")
    return int(value)


def _model_seed(seed: int, metric: str) -> int:
    return int(np.random.SeedSequence([int(seed), zlib.crc32(metric.encode())]).generate_state(1)[0])


def _group_curves(curves: pd.DataFrame, fitted: Sequence[pd.DataFrame]) -> pd.DataFrame:
    """Return per group x block x metric the participants' mean and the model's posterior summary."""
    base = curves.groupby(["group", "session", "block", "metric"], sort=False)["value"] \
        .agg(participant_mean="mean", n_participants="count").reset_index()
    post = pd.concat(fitted, ignore_index=True) if fitted else pd.DataFrame(
        columns=["group", "session", "block", "metric", "mean", "hdi_low", "hdi_high", "called"])
    out = base.merge(post, on=["group", "session", "block", "metric"], how="left")
    out["unit"] = out["metric"].map(lambda m: METRICS[m].unit)
    out["called"] = out["called"].astype("boolean")
    columns = ["group", "session", "block", "metric", "unit", "n_participants", "participant_mean", "mean",
               "hdi_low", "hdi_high", "called"]
    order = {m: i for i, m in enumerate(METRICS)}
    out = out.assign(_m=out["metric"].map(order), _s=_numeric(out["session"]), _b=_numeric(out["block"]))
    return out.sort_values(["_m", "group", "_s", "_b"], kind="stable")[columns].reset_index(drop=True)


def _group_effects(perm: pd.DataFrame, fitted: Sequence[pd.DataFrame]) -> pd.DataFrame:
    keys = ["contrast", "session", "block", "metric"]
    post = pd.concat(fitted, ignore_index=True) if fitted else pd.DataFrame(
        columns=[*keys, "diff_mean", "hdi_low", "hdi_high", "prob_positive", "called"])
    out = perm.merge(post, on=keys, how="left")
    out["called"] = out["called"].astype("boolean")
    return out


def compare_groups(log: ValidatedLog, task: Task, fit_result_or_tables: object = None, *,
                   reference: str | None = None, metrics: Sequence[str] | None = None,
                   trend: str = "categorical", draws: int = 1000, chains: int = 4, tune: int = 1000,
                   seed: int = 0, bayes: bool = True, n_permutations: int = DEFAULT_PERMUTATIONS,
                   parameterisation: str = "auto", cores: int = 1, progress: bool | None = None) -> GroupResult:
    """Return the learning curves and the group comparisons of a study (:class:`GroupResult`).

    ``log`` a validated log; ``fit_result_or_tables`` the result of
    :func:`foretell.fit`, the fitter's :class:`foretell.fitting.participants.FitTables`, a
    mapping of tables (fits, blocks, optionally winners, contexts) or None
    (then no gain_bits, inv_temp, model or parameter comparison). Groups are
    compared pairwise with ``reference`` (default: the first group in sorted
    order); a group with fewer than :data:`MIN_GROUP_SIZE` participants gets
    curves only. ``metrics`` default to every metric the design and inputs
    allow (:func:`available_metrics`). ``trend``, ``parameterisation``,
    ``draws``, ``chains``, ``tune``, ``seed``, ``cores``: the hierarchical
    models (:func:`fit_group_model`; ``bayes=False`` skips them);
    ``n_permutations`` the permutation tests; ``seed`` also seeds those.

    Tables: ``curves`` (:func:`learning_curves`); ``group_curves`` (group,
    session, block, metric, unit, n_participants, participant_mean = the
    mean over participants' values, and the model's posterior mean, hdi_low,
    hdi_high of a typical participant with ``called``); ``group_effects``
    (:func:`permutation_effects` joined with the model's diff_mean, hdi_low,
    hdi_high, prob_positive and called, on the same scale); ``group_models``
    (:func:`model_effects`); ``group_params`` (:func:`parameter_effects`);
    ``group_diagnostics`` (one row per model: how it was built, the gate's
    findings); ``context_learning`` (:func:`context_learning`); ``notes``.
    """
    if trend not in TRENDS:
        raise UsageError(f"trend must be one of {', '.join(TRENDS)}; got {trend!r}")
    n_permutations = _check_whole("n_permutations", n_permutations, 1)
    seed = _check_whole("seed", seed, 0)
    if bayes:
        for name, value, low in (("draws", draws, 1), ("chains", chains, 2), ("tune", tune, 0)):
            _check_whole(name, value, low)
    inputs = _fit_inputs(fit_result_or_tables)
    frame = _trial_frame(log)
    group_of = frame.groupby("participant")["group"].first()
    fits = None if inputs.fits is None else inputs.fits.assign(
        group=inputs.fits["participant"].astype(str).map(group_of))  # the log's groups rule
    has_rt = "rt" in frame.columns and bool(frame["rt_ok"].astype(bool).any())
    allowed = available_metrics(task, inputs.fits is not None, has_rt)
    if metrics is None:
        metrics = allowed
    else:
        metrics = [metrics] if isinstance(metrics, str) else list(metrics)
        wrong = [m for m in metrics if m not in allowed]
        if wrong:
            raise UsageError(f"metric(s) {', '.join(map(repr, wrong))} not available here; available: "
                             f"{', '.join(allowed)}")
    groups = sorted(frame["group"].unique())
    if reference is None:
        reference = groups[0]
    elif reference not in groups:
        raise UsageError(f"reference group {reference!r} is not in the log; groups: {', '.join(groups)}")
    sizes = frame.groupby("group")["participant"].nunique()
    small = [g for g in groups if sizes[g] < MIN_GROUP_SIZE]
    notes = []
    if len(groups) == 1:
        notes.append(f"one group ({groups[0]}): learning curves only, no group inference was made")
    for g in small:
        if len(groups) > 1:
            notes.append(f"group {g} has {sizes[g]} participant(s), fewer than {MIN_GROUP_SIZE}: "
                         "curves only, no inference about it")
    contrasts = [] if reference in small else [(g, reference) for g in groups if g != reference and g not in small]
    if len(groups) > 1 and reference in small:
        notes.append(f"the reference group {reference} is too small: no group inference was made")
    if task.response == "guess" and not task.has_source:
        notes.append("no optimal_rate: the task gives no source, so the rate modelled is accuracy")

    curves = learning_curves(log, task, metrics, fits=inputs.fits, blocks=inputs.blocks, winners=inputs.winners,
                             contexts=inputs.contexts)
    perm = permutation_effects(curves, contrasts, n_permutations=n_permutations, seed=seed)
    fitted_curves, fitted_effects, diagnostics = [], [], []
    modelled = [m for m in metrics if METRICS[m].modelled and (METRICS[m].kind != "rate" or m == main_rate(task))]
    if contrasts and bayes:
        inferred = [g for g in groups if g not in small]
        for metric in modelled:
            data = model_data(curves, metric, inferred)
            if len(data.groups) < 2:
                notes.append(f"{metric}: no hierarchical model (fewer than two groups with values)")
                continue
            fit = fit_group_model(data, contrasts, trend=trend, parameterisation=parameterisation, draws=draws,
                                  chains=chains, tune=tune, seed=_model_seed(seed, metric), cores=cores,
                                  progress=bool(progress))
            fitted_curves.append(fit.group_curves)
            fitted_effects.append(fit.effects)
            diagnostics.append(_diagnostics_row(fit, data))
            if not fit.diagnostics.ok:
                notes.append(f"{metric}: hierarchical model not called ({'; '.join(fit.diagnostics.reasons)})")
            elif fit.diagnostics.provisional:
                notes.append(f"{metric}: hierarchical model provisional (fewer chains or draws than the full "
                             f"run of {GATE.full_chains} x {GATE.full_draws})")
    elif contrasts:
        notes.append("hierarchical models not run (bayes=False): permutation tests only")

    group_models, model_notes = (model_effects(fits, contrasts, task) if fits is not None and contrasts
                                 else (pd.DataFrame(columns=MODEL_COLUMNS), []))
    notes += model_notes
    group_params = (parameter_effects(fits, contrasts, n_permutations=n_permutations, seed=seed)
                    if fits is not None and contrasts else pd.DataFrame(columns=PARAM_COLUMNS))
    if fits is None:
        notes.append("no fit results given: no gain_bits, inv_temp, model-frequency or parameter comparison")
    group_curves = _group_curves(curves, fitted_curves)
    learning = context_learning(log, task)
    figures = {f"curve_{m}": curve_figure(group_curves, m) for m in metrics
               if (group_curves["metric"] == m).any()}
    if len(learning):
        figures["context_learning"] = context_figure(learning)
    return GroupResult(
        curves=curves, group_curves=group_curves, group_effects=_group_effects(perm, fitted_effects),
        group_models=group_models, group_params=group_params,
        group_diagnostics=pd.DataFrame(diagnostics, columns=DIAGNOSTIC_COLUMNS),
        context_learning=learning, notes=tuple(notes), figures=figures,
        settings={"reference": reference, "contrasts": [f"{g}-{r}" for g, r in contrasts],
                  "metrics": list(metrics), "trend": trend, "draws": draws, "chains": chains, "tune": tune,
                  "seed": seed, "bayes": bayes, "n_permutations": n_permutations, "hdi_prob": HDI_PROB})
