"""The groups step's contrasts: per-block permutation tests, the summary over blocks, parameters and model use."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd

from foretell.compare import default_families, log_evidence_table
from foretell.curves import METRICS, TREND_SUMMARIES, compared_values, participant_trends
from foretell.params import PARAMS
from foretell.stats.intervals import CI_LEVEL, HDI_PROB, permutation_interval
from foretell.stats.permutation import DEFAULT_PERMUTATIONS, holm, permutation_p
from foretell.stats.selection import family_evidence, groups_differ, rfx_bms
from foretell.tasks import Task
from foretell.validation import child_rng

MIN_GROUP_SIZE = 3
"""Participants a group needs before any inference is made about it (curves are always given)."""


def _compare_values(value: pd.Series, group: pd.Series, contrasts: Sequence[tuple[str, str]],
                    n_permutations: int, seed: int, labels: tuple, interval: bool = False) -> list[dict]:
    """Return one dict per contrast: means, observed difference, permutation p (NaN below the group size).

    With ``interval``, also ``low`` and ``high``: the inverted permutation
    test's interval of the difference (:func:`foretell.stats.intervals.permutation_interval`),
    drawn from ``child_rng(seed, *labels, group, reference, "interval")``.
    """
    out = []
    for g, ref in contrasts:
        a = value[(group == g).to_numpy()].dropna().to_numpy(float)
        b = value[(group == ref).to_numpy()].dropna().to_numpy(float)
        enough = len(a) >= MIN_GROUP_SIZE and len(b) >= MIN_GROUP_SIZE
        p = permutation_p(a, b, n_permutations=n_permutations, rng=child_rng(seed, *labels, g, ref)) \
            if enough else math.nan
        row = {"contrast": f"{g}-{ref}", "group": g, "reference": ref, "n_group": len(a),
               "n_reference": len(b), "mean_group": a.mean() if len(a) else math.nan,
               "mean_reference": b.mean() if len(b) else math.nan,
               "observed_diff": a.mean() - b.mean() if len(a) and len(b) else math.nan, "perm_p": p}
        if interval:
            row["low"], row["high"] = permutation_interval(
                a, b, n_permutations=n_permutations, rng=child_rng(seed, *labels, g, ref, "interval")) \
                if enough else (math.nan, math.nan)
        out.append(row)
    return out


def permutation_effects(curves: pd.DataFrame, contrasts: Sequence[tuple[str, str]], *,
                        n_permutations: int = DEFAULT_PERMUTATIONS, seed: int = 0) -> pd.DataFrame:
    """Return per metric x block x contrast the observed group difference and its permutation p-values.

    The statistic is the difference in participants' mean value (group minus
    reference), on the metric's comparison scale (log values for the log
    metrics of :data:`foretell.curves.METRICS`); ``perm_p`` is its two-sided permutation
    p-value (:func:`foretell.stats.permutation.permutation_p`), ``perm_p_holm`` Holm-adjusted across
    blocks x contrasts within the metric. No test (NaN) where a group has
    fewer than :data:`MIN_GROUP_SIZE` participants with a value.

    Parameters
    ----------
    curves : pandas.DataFrame
        :func:`foretell.curves.learning_curves`.
    contrasts : sequence of (str, str)
        (group, reference) pairs.
    n_permutations : int, default :data:`foretell.stats.permutation.DEFAULT_PERMUTATIONS`
    seed : int, default 0
        The test of a metric, session, block and contrast draws from
        ``child_rng(seed, "curve", metric, session, block, group, reference)``.

    Returns
    -------
    pandas.DataFrame
        Columns contrast, group, reference, session, block, metric, scale,
        n_group, n_reference, observed_diff, perm_p, perm_p_holm.

    References
    ----------
    Holm, S. (1979). A simple sequentially rejective multiple test procedure.
    Scand. J. Statist. 6, 65-70.
    """
    rows = []
    curves = curves.assign(_y=compared_values(curves))
    for (metric, session, block), part in curves.groupby(["metric", "session", "block"], sort=False):
        for row in _compare_values(part["_y"], part["group"], contrasts, n_permutations, seed,
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


def parameter_effects(fits: pd.DataFrame, contrasts: Sequence[tuple[str, str]], *,
                      n_permutations: int = DEFAULT_PERMUTATIONS, seed: int = 0) -> pd.DataFrame:
    """Return per model x parameter x contrast the group difference of fitted parameters, with permutation p.

    Every model is fitted to every participant, so a parameter is compared
    within a model, over the participants whose fit converged. Parameters are
    the choice rule's and the learner's columns of ``fits`` that vary
    across participants (held parameters are left out); log-scale
    parameters (:data:`foretell.params.PARAMS`: inv_temp, lapse, alpha) are
    compared as log values. Holm's correction runs across models x
    parameters x contrasts.

    Parameters
    ----------
    fits : pandas.DataFrame
        The fit's ``fits`` table, with each participant's group.
    contrasts : sequence of (str, str)
    n_permutations : int
    seed : int
        A test draws from ``child_rng(seed, "param", model, parameter, group, reference)``.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`PARAM_COLUMNS` (means on the comparison scale).
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




def model_effects(fits: pd.DataFrame, contrasts: Sequence[tuple[str, str]],
                  task: Task) -> tuple[pd.DataFrame, list[str]]:
    """Return (table, notes): the between-group test of model and family frequencies per contrast.

    Log evidence -BIC/2 (:func:`foretell.compare.log_evidence_table`); a
    participant with an unusable fit of any model is left out (noted).
    Families are :func:`foretell.compare.default_families`, the family
    evidence :func:`foretell.stats.selection.family_evidence`.

    Parameters
    ----------
    fits : pandas.DataFrame
        The fit's ``fits`` table, with each participant's group.
    contrasts : sequence of (str, str)
    task : Task

    Returns
    -------
    (pandas.DataFrame, list of str)
        One row per contrast x level ("model" or "family") x name:
        prob_groups_differ and log_bayes_factor (the contrast's, repeated on
        its rows; :func:`foretell.stats.selection.groups_differ`), each group's
        expected frequency from its own random-effects BMS (freq_group,
        freq_reference), n_group and n_reference (:data:`MODEL_COLUMNS`).

    References
    ----------
    Rigoux, L., Stephan, K. E., Friston, K. J., & Daunizeau, J. (2014).
    Bayesian model selection for group studies - revisited. NeuroImage 84,
    971-985.
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


JOINT_COLUMNS = ["contrast", "group", "reference", "metric", "scale", "summary", "method", "estimate", "low", "high",
                 "level", "prob_positive", "perm_p", "perm_p_holm", "n_group", "n_reference", "n_blocks", "called",
                 "note"]
"""Columns of :func:`joint_effects` (``group_joint.csv``)."""
POSTERIOR = "hierarchical posterior"
PERMUTATION = "permutation over participants"
JOINT_NOTE = ("one interval and one test for all blocks together, so no adjustment for the number of blocks is "
              "needed; perm_p_holm is Holm-adjusted across the metric's summaries and contrasts, the interval is "
              "not")
"""What the joint summary is adjusted for, in words (its ``note``)."""


def joint_effects(curves: pd.DataFrame, contrasts: Sequence[tuple[str, str]], *,
                  posterior: pd.DataFrame | None = None, n_permutations: int = DEFAULT_PERMUTATIONS,
                  seed: int = 0) -> pd.DataFrame:
    """Return per metric x contrast the group difference averaged over blocks and in the learning slope.

    The per-block intervals look at every block on its own, and with many
    blocks some exclude 0 by chance; these two summaries take all blocks
    together. From each participant's curve on the comparison scale,
    :func:`foretell.curves.participant_trends` gives the mean over its blocks
    and its least-squares slope per block. The difference in participants'
    mean summary (group minus reference) has a two-sided permutation p
    (:func:`foretell.stats.permutation.permutation_p`; ``perm_p_holm``
    Holm-adjusted across summaries x contrasts within the metric). The
    estimate and interval come from the hierarchical posterior where the
    group model of the metric passed its gate (``posterior``:
    :func:`foretell.hierarchical.group_model.summarise_joint`; posterior
    mean and :data:`~foretell.stats.intervals.HDI_PROB` HDI), else from the
    participants (their difference, and the interval of shifts the
    permutation test does not reject at
    :data:`~foretell.stats.intervals.CI_LEVEL`:
    :func:`foretell.stats.intervals.permutation_interval`); ``method`` says
    which. No test or interval (NaN) where a group has fewer than
    :data:`MIN_GROUP_SIZE` participants with a value.

    Parameters
    ----------
    curves : pandas.DataFrame
        :func:`foretell.curves.learning_curves`.
    contrasts : sequence of (str, str)
        (group, reference) pairs.
    posterior : pandas.DataFrame, optional
        The group models' joint summaries (contrast, metric, summary,
        estimate, low, high, prob_positive, called).
    n_permutations : int, default :data:`foretell.stats.permutation.DEFAULT_PERMUTATIONS`
        Re-splits of the test and of the interval.
    seed : int, default 0
        A test draws from ``child_rng(seed, "joint", metric, summary, group,
        reference)``, its interval from the same labels and "interval".

    Returns
    -------
    pandas.DataFrame
        Columns :data:`JOINT_COLUMNS`; ``scale`` is the metric's (per block
        for the slope), ``n_blocks`` the metric's blocks, ``called`` whether
        its group model passed the gate (missing when none was fitted),
        ``note`` what is adjusted (:data:`JOINT_NOTE`).

    References
    ----------
    Holm, S. (1979). Scand. J. Statist. 6, 65-70.
    Ernst, M. D. (2004). Permutation methods: a basis for exact inference. Statist. Sci. 19, 676-685.
    """
    trends = participant_trends(curves)
    rows = []
    for (metric, summary), part in trends.groupby(["metric", "summary"], sort=False):
        for row in _compare_values(part["value"], part["group"], contrasts, n_permutations, seed,
                                   ("joint", metric, summary), interval=True):
            scale = METRICS[metric].scale + (" per block" if summary == TREND_SUMMARIES[1] else "")
            rows.append({"metric": metric, "summary": summary, "scale": scale,
                         "n_blocks": int(part["blocks"].iat[0]), **row})
    if not rows:
        return pd.DataFrame(columns=JOINT_COLUMNS)
    out = pd.DataFrame(rows)
    out["perm_p_holm"] = out.groupby("metric", sort=False)["perm_p"].transform(lambda p: holm(p.to_numpy()))
    keys = ["contrast", "metric", "summary"]
    post = posterior if posterior is not None and len(posterior) else pd.DataFrame(
        columns=[*keys, "estimate", "low", "high", "prob_positive", "called"])
    out = out.merge(post[[*keys, "estimate", "low", "high", "prob_positive", "called"]], on=keys, how="left",
                    suffixes=("", "_post"))
    out["called"] = out["called"].astype("boolean")
    use = out["called"].fillna(False).to_numpy(bool)
    out["method"] = np.where(use, POSTERIOR, PERMUTATION)
    out["estimate"] = np.where(use, out["estimate"], out["observed_diff"])
    out["low"], out["high"] = np.where(use, out["low_post"], out["low"]), np.where(use, out["high_post"], out["high"])
    out["prob_positive"] = np.where(use, out["prob_positive"], np.nan)
    out["level"] = np.where(use, HDI_PROB, CI_LEVEL)
    out["note"] = JOINT_NOTE
    return out[JOINT_COLUMNS]
