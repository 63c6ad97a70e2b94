"""The rt step's per-participant fits: every learner and the baseline, with intervals that hold their level."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import t as student

from foretell.compare import strength
from foretell.labels import block_label
from foretell.logs import ValidatedLog
from foretell.measure import BASELINE_MODEL, DROP_REASONS, Designs, Measure, participant_spans
from foretell.models import ModelSpec
from foretell.regressors import regressors as trial_regressors
from foretell.stats.heldout import held_out_loglik, selection_bootstrap, unit_sums
from foretell.stats.regression import gls_ar1, huber, ols
from foretell.tasks import Task
from foretell.validation import child_rng

CI_LEVEL = 0.95
LEAK_BOOTSTRAP = 200
"""Moving-block resamples that repeat a leak chosen on the measure (:func:`honest_leak`)."""
ONE_BLOCK_PARTS = 5
"""A participant with a single block is cut into this many consecutive parts to hold out."""
INTERVALS = {"hac": "hac_hc3_andrews", "bootstrap": "block_bootstrap_leak_choice"}
"""How a slope interval was computed (the ``interval`` column of the fits)."""
BASELINE_NOTE = "baseline: the time-on-task terms, no learner"


@dataclass(frozen=True, eq=False)
class Path:
    """What every batch of participants is fitted with.

    Attributes
    ----------
    task : Task
    specs : tuple of ModelSpec
    fixed : mapping or None
        Held learner values.
    fits : pandas.DataFrame or None
        Fitted learner values (participant, model, leak, alpha).
    seed : int
        The run's seed (the leak bootstrap of participant p and model m draws from
        ``child_rng(seed, "leak", p, m)``).
    bootstrap : int
        :data:`LEAK_BOOTSTRAP` or another count; 0 leaves the interval of a leak chosen on the measure out.
    """

    task: Task
    specs: tuple[ModelSpec, ...]
    fixed: Mapping[str, float] | None
    fits: pd.DataFrame | None
    seed: int
    bootstrap: int


def participant_path(batch: tuple[ValidatedLog, Measure], path: Path
                     ) -> tuple[pd.DataFrame, list[dict[str, object]], list[dict[str, object]]]:
    """Return (regressor table, fits rows, blocks rows) of a batch of whole participants, each on their own.

    Parameters
    ----------
    batch : (ValidatedLog, Measure)
        The participants' rows of the log, and of the measure.
    path : Path

    Returns
    -------
    (pandas.DataFrame, list of dict, list of dict)
    """
    log, chosen = batch
    frame = log.frame
    spans = participant_spans(frame)
    honest: dict[tuple[str, str], tuple[float, int]] = {}

    def score(pid: str, model: str, candidates: Sequence[Mapping[str, np.ndarray]]) -> np.ndarray:
        designs = chosen.design(spans[pid], candidates, within_block=True)
        return honest_leak(designs, len(chosen.columns), path.bootstrap,
                           child_rng(path.seed, "leak", pid, model), honest, (pid, model))

    table = trial_regressors(log, path.task, path.specs, fixed=path.fixed, fits=path.fits, score=score)
    columns = {c: table[c].to_numpy() for c in (*chosen.columns, "leak", "alpha", "params_from")}
    fit_rows, block_rows = [], []
    for pid, rows in spans.items():
        cols, info = chosen.model_columns(columns, rows, len(path.specs))
        part = frame.iloc[rows]
        intervals = {s.model_id: honest[(pid, s.model_id)] for s in path.specs if (pid, s.model_id) in honest}
        fit_rows += participant_fits(chosen, part, rows, cols, path.specs, info, intervals)
        chosen_here = np.array([i["params_from"] == "held_out" for i in info])
        block_rows += participant_blocks(chosen, part, rows, cols, path.specs, chosen_here)
    return table, fit_rows, block_rows


def honest_leak(designs: Designs, n_regressors: int, bootstrap: int, rng: np.random.Generator,
                out: dict, key: tuple[str, str]) -> np.ndarray:
    """Return the held-out score of each candidate leak; store the slope's bootstrap SE that repeats the choice.

    ``designs`` are the within-block designs (:meth:`Measure.design` with
    ``within_block``: the regressors, log trial and, in guess designs,
    prev_correct). The trials are centred within their session x block (its
    level is the block's intercept, not predicted), and each block is
    predicted from the others (:func:`foretell.stats.heldout.held_out_loglik`;
    a participant with one block is cut into :data:`ONE_BLOCK_PARTS`
    consecutive parts). Not the session-wide spline of log trial: fitted
    without a block, its basis functions local to that block are barely
    determined, and their extrapolation would swamp the leak's effect on the
    held-out score.
    The leak with the highest score is used; ``out[key]`` = (the standard
    deviation of the main slope over ``bootstrap`` moving-block resamples
    that choose the leak again, the block length), the block length being
    the chosen design's Andrews lag + 1 (:func:`foretell.stats.heldout.moving_blocks`).

    Parameters
    ----------
    designs : Designs
        One design per candidate leak (:meth:`foretell.measure.Measure.design`).
    n_regressors : int
        Regressor columns after the intercept.
    bootstrap : int
        Resamples; 0 stores nothing.
    rng : numpy.random.Generator
    out : dict
    key : (str, str)
        Participant and model.

    Returns
    -------
    numpy.ndarray
        One score per candidate (-inf for all when too few trials).
    """
    X, y = designs.learners, designs.y
    if len(y) <= X.shape[2] + 1:
        return np.full(X.shape[0], -np.inf)
    keep = np.r_[1: 1 + n_regressors, 1 + n_regressors + designs.dummies: X.shape[2]]
    unit = designs.unit if designs.unit.max(initial=0) > 0 else (np.arange(len(y)) * ONE_BLOCK_PARTS) // len(y)
    centred = _within_units(X[:, :, keep].transpose(0, 2, 1), unit).transpose(0, 2, 1)
    yc = _within_units(y, unit)
    scores = held_out_loglik(*unit_sums(centred, yc, unit, int(unit.max()) + 1))
    if bootstrap:
        best = int(np.argmax(scores))
        length = int(ols(X[best: best + 1], y, designs.times, lags="andrews", hc3=True).lags[0]) + 1
        slopes, _ = selection_bootstrap(centred, yc, unit, length, bootstrap, rng)
        out[key] = (float(np.std(slopes, ddof=1)), length)
    return scores


def _within_units(values: np.ndarray, unit: np.ndarray) -> np.ndarray:
    """Return ``values`` (trials on the last axis) minus the mean of their unit."""
    onehot = (unit[None, :] == np.arange(int(unit.max()) + 1)[:, None]).astype(float)
    means = (values @ onehot.T) / onehot.sum(axis=1)
    return values - means[..., unit]


def _dropped(chosen: Measure, rows: slice, kept: np.ndarray) -> dict[str, int]:
    """Return the counts of trials left out by reason (``n_dropped_<reason>``)."""
    reason = chosen.reason[rows]
    dropped = {f"n_dropped_{r}": int((reason == i).sum()) for i, r in enumerate(DROP_REASONS, 1)}
    dropped["n_dropped_regressor"] = int(((reason == 0) & ~kept).sum())
    return dropped


def participant_fits(chosen: Measure, part: pd.DataFrame, rows: slice, cols: Sequence[Mapping[str, np.ndarray]],
                     specs: Sequence[ModelSpec], info: Sequence[Mapping[str, object]],
                     intervals: Mapping[str, tuple[float, int]]) -> list[dict[str, object]]:
    """Return one fits row per model and one for the baseline, for one participant.

    outcome = b0 + b . regressors + baseline (:meth:`Measure.design`) +
    errors with AR(1) serial dependence (``ar1_rho``), by two-step feasible
    GLS (:func:`foretell.stats.regression.gls_ar1`), and by Huber's
    M-estimator on the outcome itself; the baseline model ``none`` is the
    same without the regressors. ``slope_<unit>`` = 1000 b median(RT) ms per
    bit for log RT (the change at the median RT), with its 95% interval
    b +- t SE, t Student's quantile at ``slope_df`` degrees of freedom
    (:func:`foretell.stats.regression.satterthwaite_df`), SE from
    Newey-West sums of leverage-adjusted (HC3) scores
    of the whitened regression at Andrews' (1991) data-driven lag
    (``hac_lags``), or, for a leak chosen on this measure, from a
    moving-block bootstrap that repeats the choice (``interval``). ``bic`` =
    k ln n - 2 ln L (L the exact Gaussian AR(1) likelihood), k =
    coefficients + residual variance + rho + a leak chosen on the measure;
    ``d_bic_none`` = bic - the baseline's bic and ``evidence``
    its Kass & Raftery (1995) grade (2 ln BF = -d_bic_none) when the learner
    is ahead, "baseline-better" when not. ``block_trend`` is the
    least-squares line through the block intercepts (change per block).
    Hick (1952) and Hyman (1953): RT grows with the information of the choice.

    Parameters
    ----------
    chosen : Measure
    part : pandas.DataFrame
        The participant's rows of the log.
    rows : slice
        Their position in the log.
    cols : sequence of mapping
        Per model, the regressor arrays (:meth:`Measure.model_columns`).
    specs : sequence of ModelSpec
    info : sequence of mapping
        Per model, its learner values and where they came from.
    intervals : mapping of str to (float, int)
        Model -> (bootstrap SE, block length) of a leak chosen on the measure (:func:`honest_leak`).

    Returns
    -------
    list of dict
    """
    d = chosen.design(rows, cols)
    n, p, p0 = len(d.y), d.learners.shape[2], d.baseline.shape[1]
    base = {"participant": part["participant"].iloc[0],
            "group": part["group"].iloc[0] if "group" in part.columns else pd.NA}
    counts = {"n_trials": n, "n_dropped": rows.stop - rows.start - n, **_dropped(chosen, rows, d.kept)}
    ids = [s.model_id for s in specs] + [BASELINE_MODEL]
    if n < p + 2:
        return [{**base, "model": m, **counts, "note": f"too few kept trials ({n})"} for m in ids]
    fit, robust = gls_ar1(d.learners, d.y, d.times, d.runs), huber(d.learners, d.y)
    null = gls_ar1(d.baseline[None], d.y, d.times, d.runs, lags=0)
    bic_none = (p0 + 2) * math.log(n) - 2 * float(null.loglik[0])
    raw = chosen.values[rows][d.kept]
    factor = chosen.slope_factor(raw)
    quantile = student.ppf(0.5 + CI_LEVEL / 2, np.maximum(fit.df, 1.0))
    moves = np.ptp(d.learners[:, :, 1], axis=1) > 1e-12
    trends = _block_trends(fit.coef[:, 1 + len(chosen.columns): 1 + len(chosen.columns) + d.dummies])
    names = (f"slope_{chosen.slope_name}", "slope_low", "slope_high", f"slope_robust_{chosen.slope_name}",
             "b_per_bit", "b_se_hac", "b_se")
    shared = {chosen.median_name: float(np.median(raw))}
    out = []
    for j, spec in enumerate(specs):
        k = p + 2 + int(info[j]["params_from"] == "held_out")
        b, se_hac = fit.coef[j, 1], math.sqrt(max(fit.cov_hac[j, 1, 1], 0.0))
        se, length = intervals.get(spec.model_id, (se_hac, 0))
        how = INTERVALS["bootstrap"] if length else INTERVALS["hac"]
        if info[j]["params_from"] == "held_out" and not length:
            se, how = math.nan, "none: a leak chosen on the measure without the bootstrap (bootstrap=0)"
        z = quantile[j]
        slopes = (factor * b, factor * (b - z * se), factor * (b + z * se), factor * robust[j, 1], b, se_hac, se)
        bic = k * math.log(n) - 2 * float(fit.loglik[j])
        out.append({**base, "model": spec.model_id, **counts, "n_params": k, "loglik": float(fit.loglik[j]),
                    "r2": float(fit.r2[j]), "bic": bic, "d_bic_none": bic - bic_none,
                    "evidence": _grade(bic_none - bic),
                    **dict(zip(names, slopes if moves[j] else (math.nan,) * len(names))),
                    "interval": how if moves[j] else "", "slope_df": float(fit.df[j]) if moves[j] else math.nan,
                    "block_trend": trends[j], "ar1_rho": float(fit.rho[j]),
                    "hac_lags": int(fit.lags[j]),
                    "bootstrap_block": length or math.nan, **shared,
                    "leak": info[j]["leak"], "alpha": info[j]["alpha"], "params_from": info[j]["params_from"],
                    "note": "" if moves[j] else f"{chosen.main} does not vary on the kept trials"})
    out.append({**base, "model": BASELINE_MODEL, **counts, "n_params": p0 + 2, "loglik": float(null.loglik[0]),
                "r2": float(null.r2[0]), "bic": bic_none, "d_bic_none": 0.0, "ar1_rho": float(null.rho[0]),
                **shared, "note": BASELINE_NOTE})
    return out


def _grade(delta: float) -> str:
    """Return the Kass & Raftery grade of 2 ln BF = ``delta`` of a learner over the baseline, or "baseline-better"."""
    return strength(delta) if delta > 0 else "baseline-better"


def _block_trends(dummies: np.ndarray) -> np.ndarray:
    """Return, per design, the least-squares slope of the block intercepts (0 for the first) over block order."""
    if dummies.shape[1] < 1:
        return np.full(len(dummies), math.nan)
    levels = np.concatenate([np.zeros((len(dummies), 1)), dummies], axis=1)
    centred = np.arange(levels.shape[1]) - (levels.shape[1] - 1) / 2.0
    return (levels * centred).sum(axis=1) / (centred * centred).sum()


def participant_blocks(chosen: Measure, part: pd.DataFrame, rows: slice, cols: Sequence[Mapping[str, np.ndarray]],
                       specs: Sequence[ModelSpec], chosen_leak: np.ndarray) -> list[dict[str, object]]:
    """Return one row per block x model (and the baseline) for one participant: per-block BIC and slope.

    Within a block the baseline is an intercept, log trial and (guess
    designs) prev_correct (:attr:`Measure.block_nuisance`); AR(1) errors
    and k as in the fits.

    Parameters
    ----------
    chosen, part, rows, cols, specs
        As :func:`participant_fits`.
    chosen_leak : numpy.ndarray of bool
        Per model, whether its leak was chosen on the measure (one more parameter).

    Returns
    -------
    list of dict
        participant, session, block, model, n_trials, bic, slope.
    """
    d = chosen.design(rows, cols, within_block=True)
    if not len(d.y):
        return []
    keys = part[["session", "block"]].to_numpy()[d.kept]
    raw = chosen.values[rows][d.kept]
    change = np.flatnonzero(d.unit[1:] != d.unit[:-1]) + 1
    ids = [s.model_id for s in specs] + [BASELINE_MODEL]
    out = []
    for a, b in zip(np.r_[0, change], np.r_[change, len(d.y)]):
        n, p, p0 = b - a, d.learners.shape[2], d.baseline.shape[1]
        if n < p + 2:
            continue
        fit = gls_ar1(d.learners[:, a:b], d.y[a:b], d.times[a:b], lags=0, hc3=False)
        null = gls_ar1(d.baseline[None, a:b], d.y[a:b], d.times[a:b], lags=0, hc3=False)
        factor = chosen.slope_factor(raw[a:b])
        moves = np.ptp(d.learners[:, a:b, 1], axis=1) > 1e-12
        k = np.r_[p + 2 + chosen_leak.astype(int), p0 + 2]
        loglik = np.r_[fit.loglik, null.loglik]
        slope = np.r_[np.where(moves, factor * fit.coef[:, 1], math.nan), math.nan]
        out += [{"participant": part["participant"].iloc[0], "session": block_label(keys[a, 0]),
                 "block": block_label(keys[a, 1]), "model": m, "n_trials": n,
                 "bic": float(k[j] * math.log(n) - 2 * loglik[j]), "slope": float(slope[j])}
                for j, m in enumerate(ids)]
    return out
