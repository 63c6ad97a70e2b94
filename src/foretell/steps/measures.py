"""Reaction times and other per-trial measures explained by learner models' uncertainty and surprise.

Per participant and learner model, the (log) measure is regressed on the
learner's per-trial regressor (entropy of the prediction in guess designs,
surprise of the stimulus in reaction designs; Hick, 1952; Hyman, 1953) plus
a block trend, by ordinary least squares with Newey-West standard errors and
by a Huber M-estimator; models are ranked by summed BIC, block by block, and
optionally by PSIS-LOO of a hierarchical Bayesian model over participants.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from scipy.stats import norm

from foretell.hierarchical.sampling import (PARAMETERISATIONS, Diagnostics, Gate, choose_by_strength, compare_loo,
                            diagnose, exact_units, psis_loo, sample)
from foretell.cluster import batches, job_count, workers_stopped
from foretell.errors import UsageError
from foretell.labels import block_label
from foretell.logs import ValidatedLog
from foretell.models import ModelSpec, model_specs
from foretell.regressors import IN_BITS, REGRESSORS, design, regressors as trial_regressors, stack_tables
from foretell.tasks import Task

BLOCK_START_DROP = 2
"""Trials dropped at the start of each block in reaction designs (common practice: the first
responses after a break are slow for reasons the learner does not model)."""
HUBER_T = 1.345
"""Huber's tuning constant: 95% efficiency under normal errors (Huber, 1981; statsmodels' default)."""
MAD_NORMAL = 0.6744897501960817
"""Phi^-1(3/4): median |z| of a standard normal, turning a MAD into a standard deviation."""
CI_LEVEL = 0.95
KASS_RAFTERY_VERY_STRONG = 10.0
"""A BIC margin (2 ln Bayes factor) above 10 is "very strong" evidence (Kass & Raftery, 1995)."""
LOCKS = ("guess", "reveal")
LOO_REFITS = 10
"""Most exact leave-one-unit-out refits per model when PSIS-LOO's Pareto k is too high (each is a
full MCMC run; Vehtari, Gelman & Gabry, 2017, advise refitting when only a few units are affected)."""
_IRLS_MAX_ITER = 50
_BATCH_TRIALS = 200_000  # most trials per batch of participants on the per-participant path
_IRLS_TOL = 1e-10


# -- batched linear-model kernels --------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class LinearFits:
    """OLS fits of one outcome on several designs at once (leading axis: design).

    ``coef`` (M, p); ``cov_hac`` (M, p, p) the Newey-West covariance;
    ``loglik`` (M,) the Gaussian log-likelihood at the MLE of the variance;
    ``r2`` (M,); ``n_obs``; ``lags`` the Newey-West lag truncation.
    """

    coef: np.ndarray
    cov_hac: np.ndarray
    loglik: np.ndarray
    r2: np.ndarray
    n_obs: int
    lags: int


def newey_west_lags(n_obs: int) -> int:
    """Return floor(4 (n/100)^(2/9)), the usual Newey-West lag truncation (Newey & West, 1994)."""
    return int(math.floor(4.0 * (n_obs / 100.0) ** (2.0 / 9.0)))


def ols(X: np.ndarray, y: np.ndarray, times: np.ndarray | None = None,
        lags: int | None = None) -> LinearFits:
    """Return the OLS fits (:class:`LinearFits`) of ``y`` (n,) on each design of ``X`` (M, n, p).

    coef = (X'X)^-1 X'y (the pseudo-inverse when X'X is singular, e.g. a
    regressor without variation, which then gets no weight instead of an error). Gaussian log-likelihood at the MLE
    sigma^2 = RSS/n: -n/2 (log 2 pi + log(RSS/n) + 1); R^2 = 1 - RSS/TSS.
    Newey-West covariance (Newey & West, 1987): (X'X)^-1 S (X'X)^-1 n/(n-p),
    S = G_0 + sum_{l=1..L} (1 - l/(L+1)) (G_l + G_l'), G_l = sum_t u_t u_{t-l}
    x_t x_{t-l}' (Bartlett weights; the n/(n-p) small-sample factor as
    statsmodels' ``use_correction``). ``times`` (n,) are the observations'
    positions on the trial axis: lags count trials, and a trial left out is a
    zero in the sums (the amplitude-modulated estimator of Datta & Du, 2012,
    from memory); default 0..n-1. ``lags`` defaults to :func:`newey_west_lags`.
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    n, p = X.shape[1], X.shape[2]
    times = np.arange(n) if times is None else np.asarray(times, dtype=np.int64)
    lags = newey_west_lags(n) if lags is None else int(lags)
    Xt = X.transpose(0, 2, 1)
    bread = _inverse(Xt @ X)
    coef = (bread @ (Xt @ y)[..., None])[..., 0]
    resid = y - (X @ coef[..., None])[..., 0]
    rss = (resid * resid).sum(axis=1)
    tss = float(((y - y.mean()) ** 2).sum())
    loglik = -0.5 * n * (math.log(2 * math.pi) + np.log(rss / n) + 1.0)
    if lags:
        scores = np.zeros((X.shape[0], int(times.max()) + 1 if n else 0, p))
        scores[:, times] = resid[..., None] * X
    else:
        scores = resid[..., None] * X
    meat = scores.transpose(0, 2, 1) @ scores
    for lag in range(1, lags + 1):
        gamma = scores[:, lag:].transpose(0, 2, 1) @ scores[:, :-lag]
        meat += (1.0 - lag / (lags + 1.0)) * (gamma + gamma.transpose(0, 2, 1))
    cov = bread @ meat @ bread * (n / (n - p))
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = 1.0 - rss / tss
    return LinearFits(coef, cov, loglik, r2, n, lags)


def _inverse(gram: np.ndarray) -> np.ndarray:
    """Return the inverses of a stack of Gram matrices; the pseudo-inverse where one is singular."""
    try:
        return np.linalg.inv(gram)
    except np.linalg.LinAlgError:
        return np.linalg.pinv(gram, hermitian=True)


def huber(X: np.ndarray, y: np.ndarray, t: float = HUBER_T) -> np.ndarray:
    """Return (M, p): Huber M-estimates of ``y`` on each design of ``X`` (M, n, p).

    Iteratively reweighted least squares from the OLS fit: weights
    w = min(1, t / |r / s|), scale s = median |r| / Phi^-1(3/4) re-estimated
    at each step (Huber, 1981; as statsmodels' RLM with HuberT and
    scale_est="mad"), until the coefficients move less than 1e-10 (relative).
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    coef = ols(X, y, lags=0).coef
    resid = y - (X @ coef[..., None])[..., 0]
    scale = np.median(np.abs(resid), axis=1) / MAD_NORMAL
    for _ in range(_IRLS_MAX_ITER):
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.abs(resid) / scale[:, None]
            w = np.where(z > t, t / z, 1.0)
        w = np.where(scale[:, None] > 0, w, 1.0)
        Xw = (X * w[..., None]).transpose(0, 2, 1)
        new = (_inverse(Xw @ X) @ (Xw @ y)[..., None])[..., 0]
        resid = y - (X @ new[..., None])[..., 0]
        scale = np.median(np.abs(resid), axis=1) / MAD_NORMAL
        done = np.all(np.abs(new - coef) <= _IRLS_TOL * (1.0 + np.abs(coef)))
        coef = new
        if done:
            break
    return coef


# -- the result ----------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class RTResult:
    """The analysis of a per-trial measure: tables, posteriors and plain-words notes.

    ``fits``: participant x model (OLS and Huber on the kept trials).
    ``compare``: model ranking (by ELPD when the Bayesian model ran, else by
    summed BIC). ``blocks``: session x block x model (summed per-block BIC,
    rank, median per-block slope). ``diagnostics``: model (parameterisation and why,
    sampler, gate). ``regressors``: trial x model (see :func:`foretell.regressors.regressors`).
    ``posteriors``: model -> ArviZ InferenceData. ``measure``: the measure's name.
    """

    measure: str
    fits: pd.DataFrame
    compare: pd.DataFrame
    blocks: pd.DataFrame
    diagnostics: pd.DataFrame
    regressors: pd.DataFrame
    posteriors: Mapping[str, object] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    def tables(self, prefix: str | None = None) -> dict[str, pd.DataFrame]:
        """Return the tables by output name: {prefix}_fits, _compare, _blocks, _diagnostics, regressors.

        ``prefix`` defaults to the measure's name ("rt" for reaction times).
        """
        prefix = self.measure if prefix is None else prefix
        return {f"{prefix}_fits": self.fits, f"{prefix}_compare": self.compare,
                f"{prefix}_blocks": self.blocks, f"{prefix}_diagnostics": self.diagnostics,
                "regressors": self.regressors}


DIAGNOSTIC_COLUMNS = ("model", "sampler", "intercept_form", "slope_form", "form_reason", "chains",
                      "draws", "rhat_max", "ess_bulk_min", "divergences", "pareto_k_max",
                      "loo_refits", "ok",
                      "provisional", "reasons")
COMPARE_COLUMNS = ("model", "rank", "criterion", "bic_sum", "d_bic_sum", "elpd", "se", "d_elpd",
                   "dse", "p_loo", "weight", "called", "provisional")
DROP_REASONS = ("screen", "warmup", "error", "after_error", "block_start", "regressor")


@dataclass(frozen=True, eq=False)
class _Measure:
    """The measure to explain and how: values, transform, regressors, trials kept."""

    name: str
    values: np.ndarray  # per log row, raw
    log_transform: bool
    main: str
    extra: tuple[str, ...]
    reason: np.ndarray  # per log row: index into DROP_REASONS + 1, 0 = kept (before regressors)
    block_order: np.ndarray  # per log row: ordinal of its session x block within the participant

    @property
    def columns(self) -> tuple[str, ...]:
        return (self.main,) + self.extra

    def outcome(self, rows: slice) -> np.ndarray:
        v = self.values[rows]
        if not self.log_transform:
            return v
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.log(v)

    @property
    def median_name(self) -> str:
        return "median_rt_s" if self.name == "rt" else f"median_{self.name}"

    @property
    def slope_name(self) -> str:
        return "ms_per_bit" if self.name == "rt" else "per_bit"

    def slope_factor(self, raw: np.ndarray) -> float:
        """Return the factor turning a slope on the outcome into the reported slope per bit.

        Log outcome: b * median(measure) (the change at the median); times
        1000 for RTs in seconds (ms per bit).
        """
        factor = float(np.median(raw)) if self.log_transform else 1.0
        return factor * (1000.0 if self.name == "rt" else 1.0)


def analyse_rt(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None, *,
               measure: str | pd.Series | np.ndarray = "rt", locked: str | None = None,
               regressors: Sequence[str] | None = None, fits: pd.DataFrame | None = None,
               fixed: Mapping[str, float] | None = None, bayes: bool = True, draws: int = 1000,
               chains: int = 4, tune: int = 1000, seed: int = 0,
               parameterisation: str | Mapping[str, str] = "auto",
               n_jobs: int = 1, progress: bool | None = None, log_transform: bool | None = None,
               block_start: int | None = None, gate: Gate = Gate(), refits: int | None = None
               ) -> RTResult:
    """Return the :class:`RTResult` of explaining a per-trial measure by each learner model.

    ``measure``: "rt" (seconds, the default), the name of a numeric column of
    ``log.frame``, or a Series / array aligned with ``log.frame`` (one value
    per trial, e.g. a single-trial EEG amplitude; the result is then named
    "measure"). ``locked``: "guess" (measured before the stimulus: the main
    regressor is the entropy of the prediction) or "reveal" (after it: the
    surprise of the stimulus); default "guess" in guess designs, "reveal" in
    reaction designs. ``regressors``: the regressors of
    :data:`foretell.regressors.REGRESSORS` to use, the first (in bits) being
    the one whose slope is reported; default the main one.
    ``log_transform``: model log(measure); default True for rt, else False.

    Trials used, the same for every model (counted per reason in ``fits``):
    RTs the log's screen kept (``rt_ok``; for other measures, finite values);
    not the first K trials of a session (K = the largest model depth:
    warm-up); in reaction designs not error trials (response != stimulus,
    or missed), not the trial after an error, and not the first
    ``block_start`` trials of a block (default :data:`BLOCK_START_DROP`;
    common practice); and trials whose regressors exist.

    Per participant x model: outcome = b0 + b . regressors + c * block order
    (the block trend, when the participant has kept trials in more than one
    block) by OLS, with Newey-West standard errors (lag rule
    :func:`newey_west_lags` on the kept trials; trials in log order, sessions
    end to end) and by Huber's M-estimator. ``slope_<unit>`` = 1000 b median(RT)
    ms per bit for log RT (the change at the median RT), with its 95% HAC
    interval (normal quantiles); ``bic`` = k ln n - 2 ln L, k = coefficients +
    residual variance + a leak chosen on this measure. Learner parameters:
    see :func:`foretell.regressors.regressors` (``fits``, ``fixed``, else the
    leak that maximises this OLS likelihood on a grid). Participants are
    computed on their own, in batches on ``n_jobs`` joblib workers (or on a
    Dask cluster inside :func:`foretell.cluster.job_backend`); the tables
    do not depend on where they ran.

    With ``bayes``, one hierarchical model per learner model (see
    :func:`hierarchical_model`), sampled with ``chains`` x ``draws`` after
    ``tune`` (``n_jobs`` chains in parallel), checked by ``gate`` and compared
    by PSIS-LOO over participant x block units (:func:`foretell.hierarchical.sampling.compare_loo`).
    Units whose Pareto k exceeds ``gate.pareto_k_max`` are left out one at a
    time and the model refitted without them (exact leave-one-out; at most
    ``refits`` per model, default :data:`LOO_REFITS`, else the gate fails on
    k): see :func:`leave_out`.
    ``parameterisation``: "auto" (decide per parameter from the strength of
    the data, :func:`parameterisations`), "centred", "non-centred", or a
    mapping of "intercept" and "slope" to one of them.
    """
    if not isinstance(log, ValidatedLog):
        raise UsageError("analyse_rt needs a validated log: use load_log or validate_log first")
    forms = _requested_forms(parameterisation)
    specs = model_specs(models, task)
    chosen = _measure(log, task, specs, measure, locked, regressors, log_transform, block_start)
    frame = log.frame
    spans = _participant_spans(frame)
    edges = [r.start for r in spans.values()] + [len(frame)]
    workers = job_count(n_jobs)
    ranges = batches(np.diff(edges), workers, _BATCH_TRIALS)
    jobs = (delayed(_participant_path)(_rows_of(log, chosen, edges[a], edges[b]), task, specs, fixed,
                                       fits) for a, b in ranges)
    with workers_stopped(n_jobs):
        done = Parallel(n_jobs=workers)(jobs)
    table = stack_tables([t for t, _, _ in done])
    fit_rows = [row for _, f, _ in done for row in f]
    block_rows = [row for _, _, b in done for row in b]
    del done
    columns = {c: table[c].to_numpy() for c in (*chosen.columns, "leak", "alpha", "params_from")}
    notes = _drop_notes(chosen, frame)
    fits_table = pd.DataFrame(fit_rows)
    blocks_table = _rank_blocks(pd.DataFrame(block_rows), chosen)
    compare, more = _compare_bic(fits_table)
    notes += more
    notes += _slope_notes(fits_table, chosen)
    diagnostics = pd.DataFrame(columns=DIAGNOSTIC_COLUMNS)
    posteriors: dict[str, object] = {}
    if bayes:
        posteriors, diag, elpd, more = _bayes(chosen, frame, columns, specs, spans, draws=draws,
                                              chains=chains, tune=tune, seed=seed,
                                              parameterisation=forms, n_jobs=n_jobs,
                                              progress=progress, gate=gate,
                                              refits=LOO_REFITS if refits is None else refits)
        diagnostics = diag
        notes += more
        compare = _merge_elpd(compare, elpd)
    name = chosen.name if isinstance(measure, str) else "measure"
    return RTResult(name, fits_table, compare, blocks_table, diagnostics, table, posteriors,
                    tuple(notes))


def _rows_of(log: ValidatedLog, chosen: _Measure, start: int, stop: int
             ) -> tuple[ValidatedLog, _Measure]:
    """Return the log and the measure restricted to rows start:stop (whole participants)."""
    rows = slice(start, stop)
    part = replace(log, frame=log.frame.iloc[rows].reset_index(drop=True))
    return part, replace(chosen, values=chosen.values[rows], reason=chosen.reason[rows],
                         block_order=chosen.block_order[rows])


def _participant_path(batch: tuple[ValidatedLog, _Measure], task: Task, specs: Sequence[ModelSpec],
                      fixed: Mapping[str, float] | None, fits: pd.DataFrame | None
                      ) -> tuple[pd.DataFrame, list[dict[str, object]], list[dict[str, object]]]:
    """Return (regressor table, fits rows, blocks rows) of a batch of whole participants.

    Every participant is computed on their own, so batches (and where they
    run: joblib's processes or a Dask cluster) never change a result.
    """
    log, chosen = batch
    frame = log.frame
    spans = _participant_spans(frame)

    def score(pid: str, candidates: Sequence[Mapping[str, np.ndarray]]) -> np.ndarray:
        X, y, _, _ = _design(chosen, spans[pid], candidates)
        if len(y) <= X.shape[2]:
            return np.full(len(candidates), -np.inf)
        return ols(X, y, lags=0).loglik

    table = trial_regressors(log, task, specs, fixed=fixed, fits=fits, score=score)
    columns = {c: table[c].to_numpy() for c in (*chosen.columns, "leak", "alpha", "params_from")}
    fit_rows, block_rows = [], []
    for rows in spans.values():
        cols, info = _model_columns(chosen, columns, rows, len(specs))
        part = frame.iloc[rows]
        fit_rows += _participant_fits(chosen, part, rows, cols, specs, info)
        profiled = np.array([i["params_from"] == "profile" for i in info])
        block_rows += _participant_blocks(chosen, part, rows, cols, specs, profiled)
    return table, fit_rows, block_rows


# -- choosing the measure and the trials ----------------------------------------------------------
def _measure(log: ValidatedLog, task: Task, specs: Sequence[ModelSpec],
             measure: str | pd.Series | np.ndarray, locked: str | None,
             regressors: Sequence[str] | None, log_transform: bool | None,
             block_start: int | None) -> _Measure:
    """Return the validated choice of measure, regressors and the per-trial drop reasons."""
    frame = log.frame
    reaction = design(task) == "reaction"
    if isinstance(measure, str):
        if measure != "rt" and measure not in frame.columns:
            raise UsageError(f"measure {measure!r} is not a column of the log; columns: "
                             f"{', '.join(map(str, frame.columns))}")
        raw = pd.to_numeric(frame[measure], errors="coerce") if measure in frame.columns \
            else pd.Series(np.nan, index=frame.index)
        if measure != "rt" and raw.isna().all():
            raise UsageError(f"measure {measure!r} holds no numbers")
        name = measure
    else:
        raw = pd.Series(np.asarray(measure, dtype=float)) if not isinstance(measure, pd.Series) \
            else pd.to_numeric(measure, errors="coerce")
        if len(raw) != len(frame):
            raise UsageError(f"the measure has {len(raw)} values but the log has {len(frame)} trials")
        if isinstance(measure, pd.Series) and not measure.index.equals(frame.index):
            raw = raw.reindex(frame.index)
        name = "measure"
    values = raw.to_numpy(dtype=float)
    locked = ("reveal" if reaction else "guess") if locked is None else locked
    if locked not in LOCKS:
        raise UsageError(f"locked must be 'guess' or 'reveal', got {locked!r}")
    main_default = "entropy" if locked == "guess" else "surprise"
    chosen = tuple(regressors) if regressors is not None else (main_default,)
    unknown = [r for r in chosen if r not in REGRESSORS]
    if unknown or not chosen:
        raise UsageError(f"unknown regressor(s) {unknown}; choose from {', '.join(REGRESSORS)}")
    if chosen[0] not in IN_BITS:
        raise UsageError(f"the first regressor is the one whose slope is reported per bit: one of "
                         f"{', '.join(IN_BITS)}, got {chosen[0]!r}")
    if len(set(chosen)) != len(chosen):
        raise UsageError(f"regressors listed twice: {list(chosen)}")
    if "guess_prob" in chosen and reaction:
        raise UsageError("guess_prob exists only in guess designs; this task's responses are "
                         "reactions to the stimulus")
    log_transform = (name == "rt") if log_transform is None else bool(log_transform)
    usable = frame["rt_ok"].to_numpy(bool) if name == "rt" else np.isfinite(values)
    if log_transform and np.any(usable & ~(values > 0)):
        raise UsageError(f"log_transform needs positive values of {name!r}; some kept trials "
                         "are 0 or negative")
    start = (BLOCK_START_DROP if reaction else 0) if block_start is None else block_start
    if isinstance(start, bool) or not isinstance(start, (int, np.integer)) or start < 0:
        raise UsageError(f"block_start must be a whole number >= 0, got {block_start!r}")
    warmup = max(s.depth for s in specs)
    reason = np.zeros(len(frame), dtype=np.int64)
    session_key = frame[["participant", "session"]]
    pos_session = session_key.groupby(["participant", "session"], sort=False).cumcount().to_numpy()
    pos_block = frame.groupby(["participant", "session", "block"], sort=False).cumcount().to_numpy()
    checks = [~usable, pos_session < warmup]
    if reaction:
        error = frame["missed"].to_numpy(bool) | (frame["response_idx"].to_numpy()
                                                   != frame["stimulus_idx"].to_numpy())
        after = np.r_[False, error[:-1]] & (pos_session > 0)
        checks += [error, after, pos_block < start]
    else:
        checks += [np.zeros(len(frame), bool)] * 2 + [pos_block < start]
    for code, drop in enumerate(checks, start=1):
        reason[(reason == 0) & drop] = code
    unit = frame.groupby(["participant", "session", "block"], sort=False).ngroup().to_numpy()
    first_unit = pd.Series(unit).groupby(frame["participant"].to_numpy(), sort=False).transform("min")
    block_order = unit - first_unit.to_numpy()
    return _Measure(name, values, log_transform, chosen[0], chosen[1:], reason, block_order)


def _model_columns(chosen: _Measure, columns: Mapping[str, np.ndarray], rows: slice, n_models: int
                   ) -> tuple[list[dict[str, np.ndarray]], list[dict[str, object]]]:
    """Return one participant's chosen regressor arrays per model and each model's learner values.

    ``columns`` are columns of the regressor table, which holds, per
    participant (in log order), its models one after another, each over the
    participant's trials (see :func:`foretell.regressors.regressors`).
    """
    n = rows.stop - rows.start
    start = rows.start * n_models
    cols = [{c: columns[c][start + j * n: start + (j + 1) * n] for c in chosen.columns}
            for j in range(n_models)]
    info = [{k: columns[k][start + j * n] for k in ("leak", "alpha", "params_from")}
            for j in range(n_models)]
    return cols, info


def _participant_spans(frame: pd.DataFrame) -> dict[str, slice]:
    """Return participant -> slice of their rows (the log is sorted by participant)."""
    part = frame["participant"].to_numpy()
    cuts = np.flatnonzero(part[1:] != part[:-1]) + 1
    starts, stops = np.r_[0, cuts], np.r_[cuts, len(part)]
    return {str(part[a]): slice(int(a), int(b)) for a, b in zip(starts, stops)}


def _design(chosen: _Measure, rows: slice, cols: Sequence[Mapping[str, np.ndarray]],
            trend: bool = True
            ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return (X (M, n, p), y (n,), times (n,), kept mask over the rows) of one participant.

    Kept: no drop reason and every chosen regressor finite in every model.
    Columns: 1, the regressors, the block order (when ``trend`` and the kept
    trials span more than one block).
    """
    kept = chosen.reason[rows] == 0
    for c in cols:
        for name in chosen.columns:
            kept &= np.isfinite(c[name])
    y = chosen.outcome(rows)[kept]
    times = np.flatnonzero(kept)
    columns = [np.ones((len(cols), len(y)))]
    columns += [np.stack([c[name][kept] for c in cols]) for name in chosen.columns]
    if trend:
        order = chosen.block_order[rows][kept]
        if order.size and order.min() < order.max():
            columns.append(np.broadcast_to(order.astype(float), (len(cols), len(y))))
    return np.stack(columns, axis=-1), y, times, kept


def _participant_fits(chosen: _Measure, part: pd.DataFrame, rows: slice,
                      cols: Sequence[Mapping[str, np.ndarray]], specs: Sequence[ModelSpec],
                      info: Sequence[Mapping[str, object]]) -> list[dict[str, object]]:
    """Return one fits row per model for one participant."""
    X, y, times, kept = _design(chosen, rows, cols)
    reason = chosen.reason[rows]
    dropped = {f"n_dropped_{r}": int((reason == i).sum()) for i, r in enumerate(DROP_REASONS, 1)}
    dropped["n_dropped_regressor"] = int(((reason == 0) & ~kept).sum())
    n, p = len(y), X.shape[2]
    raw = chosen.values[rows][kept]
    slope = f"slope_{chosen.slope_name}"
    base = {"participant": part["participant"].iloc[0],
            "group": part["group"].iloc[0] if "group" in part.columns else pd.NA}
    if n < p + 2:
        return [{**base, "model": s.model_id, "n_trials": n, "n_dropped": len(reason) - n,
                 **dropped, "note": f"too few kept trials ({n})"} for s in specs]
    fit = ols(X, y, times)
    robust = huber(X, y)
    factor = chosen.slope_factor(raw)
    z = norm.ppf(0.5 + CI_LEVEL / 2)
    moves = np.ptp(X[:, :, 1], axis=1) > 1e-12
    out = []
    for j, spec in enumerate(specs):
        row = info[j]
        profiled = row["params_from"] == "profile"
        k = p + 1 + int(profiled)
        b, se = fit.coef[j, 1], math.sqrt(max(fit.cov_hac[j, 1, 1], 0.0))
        ok = bool(moves[j])
        out.append({**base, "model": spec.model_id, "n_trials": n, "n_dropped": len(reason) - n,
                    **dropped, "n_params": k, "loglik": float(fit.loglik[j]),
                    "r2": float(fit.r2[j]), "bic": k * math.log(n) - 2 * float(fit.loglik[j]),
                    slope: factor * b if ok else math.nan,
                    "slope_low": factor * (b - z * se) if ok else math.nan,
                    "slope_high": factor * (b + z * se) if ok else math.nan,
                    f"slope_robust_{chosen.slope_name}": factor * robust[j, 1] if ok else math.nan,
                    "b_per_bit": b if ok else math.nan, "b_se_hac": se if ok else math.nan,
                    "block_trend": float(fit.coef[j, -1]) if p > 1 + len(chosen.columns)
                    else math.nan,
                    "hac_lags": fit.lags, chosen.median_name: float(np.median(raw)),
                    "leak": row["leak"], "alpha": row["alpha"], "params_from": row["params_from"],
                    "note": "" if ok else f"{chosen.main} does not vary on the kept trials"})
    return out


def _participant_blocks(chosen: _Measure, part: pd.DataFrame, rows: slice,
                        cols: Sequence[Mapping[str, np.ndarray]], specs: Sequence[ModelSpec],
                        profiled: np.ndarray) -> list[dict[str, object]]:
    """Return one row per block x model for one participant: per-block OLS BIC and slope.

    k counts the coefficients, the residual variance and a leak chosen on the measure.
    """
    X, y, _, kept = _design(chosen, rows, cols, trend=False)
    keys = part[["session", "block"]].to_numpy()[kept]
    order = chosen.block_order[rows][kept]
    raw = chosen.values[rows][kept]
    out = []
    if not len(y):
        return out
    change = np.flatnonzero(order[1:] != order[:-1]) + 1
    for a, b in zip(np.r_[0, change], np.r_[change, len(y)]):
        n, p = b - a, X.shape[2]
        if n < p + 2:
            continue
        fit = ols(X[:, a:b], y[a:b], lags=0)
        factor = chosen.slope_factor(raw[a:b])
        moves = np.ptp(X[:, a:b, 1], axis=1) > 1e-12
        for j, spec in enumerate(specs):
            out.append({"participant": part["participant"].iloc[0],
                        "session": block_label(keys[a, 0]), "block": block_label(keys[a, 1]),
                        "model": spec.model_id, "n_trials": n,
                        "bic": (p + 1 + int(profiled[j])) * math.log(n)
                        - 2 * float(fit.loglik[j]),
                        "slope": factor * fit.coef[j, 1] if moves[j] else math.nan})
    return out


def _rank_blocks(rows: pd.DataFrame, chosen: _Measure) -> pd.DataFrame:
    """Return session x block x model: summed per-block BIC (score), its rank, median slope."""
    slope = f"slope_median_{chosen.slope_name}"
    columns = ["session", "block", "model", "score", "criterion", "rank", "n_participants",
               "n_trials", slope]
    if rows.empty:
        return pd.DataFrame(columns=columns)
    out = rows.groupby(["session", "block", "model"], sort=False).agg(
        score=("bic", "sum"), n_participants=("participant", "nunique"),
        n_trials=("n_trials", "sum"), **{slope: ("slope", "median")}).reset_index()
    out["criterion"] = "bic_sum_per_block"
    out["rank"] = out.groupby(["session", "block"], sort=False)["score"].rank(
        method="min").astype(int)
    return out[columns]


# -- comparisons -------------------------------------------------------------------------------------
def _compare_bic(fits: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """Return (compare table ranked by summed BIC, notes)."""
    usable = fits.dropna(subset=["bic"]) if "bic" in fits.columns else fits.iloc[0:0]
    if usable.empty:
        return pd.DataFrame(columns=COMPARE_COLUMNS), ["no participant had enough kept trials"]
    total = usable.groupby("model", sort=False)["bic"].sum()
    n_part = usable.groupby("model", sort=False)["participant"].nunique()
    total = total.sort_values(kind="stable")
    delta = total - total.iloc[0]
    weight = np.exp(-0.5 * delta.to_numpy())
    margin = float(delta.iloc[1]) if len(delta) > 1 else math.nan
    called = bool(margin >= KASS_RAFTERY_VERY_STRONG)
    table = pd.DataFrame({
        "model": total.index, "rank": np.arange(1, len(total) + 1), "criterion": "bic_sum",
        "bic_sum": total.to_numpy(), "d_bic_sum": delta.to_numpy(),
        "elpd": math.nan, "se": math.nan, "d_elpd": math.nan, "dse": math.nan, "p_loo": math.nan,
        "weight": weight / weight.sum(), "called": called, "provisional": False})
    notes = []
    if n_part.nunique() > 1:
        notes.append("summed BIC: models were summed over different participants (too few "
                     "kept trials for some)")
    if len(total) > 1:
        verdict = ("called: the margin is at least 10, 'very strong' on Kass & Raftery's (1995) "
                   "scale" if called else "not called: the margin is below 10 (Kass & Raftery, 1995)")
        notes.append(f"summed BIC over {int(n_part.max())} participants (fixed effects: every "
                     f"participant assumed to use the same model): {total.index[0]} ahead of "
                     f"{total.index[1]} by {margin:.1f}; {verdict}")
    return table[list(COMPARE_COLUMNS)], notes


def _merge_elpd(bic: pd.DataFrame, elpd: pd.DataFrame) -> pd.DataFrame:
    """Return the compare table ranked by ELPD, with the summed-BIC columns kept beside it."""
    if elpd.empty:
        return bic
    keep = bic.set_index("model")[["bic_sum", "d_bic_sum"]]
    out = elpd.join(keep, on="model")
    out["criterion"] = "elpd_loo_participant_block"
    return out[list(COMPARE_COLUMNS)].reset_index(drop=True)


def _drop_notes(chosen: _Measure, frame: pd.DataFrame) -> list[str]:
    """Return the plain-words account of the trials left out."""
    counts = {r: int((chosen.reason == i).sum()) for i, r in enumerate(DROP_REASONS, 1)}
    what = {"screen": "screened out or missing", "warmup": "session warm-up",
            "error": "error trials", "after_error": "trials after an error",
            "block_start": "first trials of a block"}
    parts = [f"{n} {what[r]}" for r, n in counts.items() if n and r in what]
    kept = int((chosen.reason == 0).sum())
    transform = "log " if chosen.log_transform else ""
    return [f"{chosen.name}: {transform}{chosen.name} on {', '.join(chosen.columns)} plus a block "
            f"trend; {kept} of {len(frame)} trials usable"
            + (f" (left out: {', '.join(parts)})" if parts else "")]


def _slope_notes(fits: pd.DataFrame, chosen: _Measure) -> list[str]:
    """Return a line on how many participants' slopes exclude 0 at the 95% level, per model."""
    if "slope_low" not in fits.columns:
        return []
    lines = []
    for model, rows in fits.groupby("model", sort=False):
        rows = rows.dropna(subset=["slope_low"])
        up = int((rows["slope_low"] > 0).sum())
        down = int((rows["slope_high"] < 0).sum())
        lines.append(f"{model}: the 95% HAC interval of the {chosen.main} slope is above 0 for "
                     f"{up} and below 0 for {down} of {len(rows)} participants (not corrected "
                     "for multiple comparisons)")
    return lines


# -- the hierarchical Bayesian model -----------------------------------------------------------------
HIERARCHICAL = ("intercept", "slope")
"""The participant-level parameters of :func:`hierarchical_model` drawn from a population."""


@dataclass(frozen=True, eq=False)
class UnitStats:
    """Sufficient statistics of a Gaussian linear model per unit (participant x block).

    ``n`` trials; ``x_mean``, ``y_mean`` the unit's means of the regressor and
    the outcome; ``sxx``, ``sxy``, ``syy`` the sums of squares and products
    about those means.
    """

    n: np.ndarray
    x_mean: np.ndarray
    y_mean: np.ndarray
    sxx: np.ndarray
    sxy: np.ndarray
    syy: np.ndarray


def unit_statistics(y: np.ndarray, x: np.ndarray, unit_start: np.ndarray) -> UnitStats:
    """Return the :class:`UnitStats` of trials ``y``, ``x`` (n,) cut into units at ``unit_start``.

    Two passes (means, then sums about them), so the sums of squares carry no
    cancellation error.
    """
    y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    start = np.asarray(unit_start, dtype=np.int64)
    n = np.diff(np.r_[start, len(y)]).astype(float)
    x_mean = np.add.reduceat(x, start) / n
    y_mean = np.add.reduceat(y, start) / n
    dx = x - np.repeat(x_mean, n.astype(np.int64))
    dy = y - np.repeat(y_mean, n.astype(np.int64))
    return UnitStats(n, x_mean, y_mean, np.add.reduceat(dx * dx, start),
                     np.add.reduceat(dx * dy, start), np.add.reduceat(dy * dy, start))


def gaussian_unit_loglik(level, slope, sigma, log_sigma, stats: UnitStats):
    """Return sum over each unit's trials of log Normal(y_t | level + slope x_t, sigma).

    Exact through the sufficient statistics: with r = mean y - level - slope mean x,
    sum_t (y_t - level - slope x_t)^2 = Syy - 2 slope Sxy + slope^2 Sxx + n r^2
    (S.. about the unit's means), so log L = -n log sigma - n/2 log 2 pi - SS / (2 sigma^2)
    (common practice). ``level``, ``slope``, ``sigma``, ``log_sigma`` broadcast
    against the units (last axis); arithmetic only, so the same formula serves
    numpy arrays and PyTensor tensors.
    """
    r = stats.y_mean - level - slope * stats.x_mean
    ss = stats.syy - 2.0 * slope * stats.sxy + slope * slope * stats.sxx + stats.n * r * r
    return -stats.n * log_sigma - 0.5 * math.log(2 * math.pi) * stats.n - ss / (2.0 * sigma * sigma)


@dataclass(frozen=True, eq=False)
class _Pooled:
    """One model's kept trials of every participant, reduced to participant x block units.

    ``stats`` of each unit, with the regressor minus its mean over every kept
    trial; ``trend`` the unit's block order minus its mean over every kept
    trial; ``participant`` the unit's participant (index into participants).
    """

    stats: UnitStats
    trend: np.ndarray
    participant: np.ndarray
    participants: tuple[str, ...]
    group_of: np.ndarray  # group index of each participant
    groups: tuple[str, ...]
    units: tuple[str, ...]
    y_mean: float  # over every kept trial

    @property
    def n_trials(self) -> int:
        return int(self.stats.n.sum())


def participant_estimates(pooled: _Pooled) -> tuple[np.ndarray, np.ndarray]:
    """Return (estimates, standard errors), both (participants, 2): intercept and slope.

    Per participant, OLS of the outcome on 1, the centred regressor and the
    centred block order (left out when the participant's kept trials are in
    one block), from the units' sufficient statistics; classical standard
    errors sqrt(s^2 [(X'X)^-1]_jj), s^2 = RSS / (n - p): the precision the
    hierarchical model's Gaussian likelihood gives each participant. NaN for a
    participant with no more trials than coefficients.
    """
    s, k = pooled.stats, pooled.trend
    sx, sy = s.n * s.x_mean, s.n * s.y_mean
    per_unit = np.stack([
        s.n, sx, s.n * k, s.sxx + s.n * s.x_mean ** 2, k * sx, s.n * k * k,  # X'X entries
        sy, s.sxy + s.n * s.x_mean * s.y_mean, k * sy,  # X'y
        s.syy + s.n * s.y_mean ** 2], axis=1)  # y'y
    P = len(pooled.participants)
    tot = np.zeros((P, per_unit.shape[1]))
    np.add.at(tot, pooled.participant, per_unit)
    n, x1, k1, xx, xk, kk, y1, xy, ky, yy = tot.T
    k_lo = np.full(P, np.inf)
    k_hi = np.full(P, -np.inf)
    np.minimum.at(k_lo, pooled.participant, k)
    np.maximum.at(k_hi, pooled.participant, k)
    trend = k_hi > k_lo
    p = 2 + trend
    gram = np.stack([np.stack([n, x1, k1], -1), np.stack([x1, xx, xk], -1),
                     np.stack([k1, xk, kk], -1)], -2)
    gram[~trend, 2, :] = 0.0
    gram[~trend, :, 2] = 0.0
    gram[~trend, 2, 2] = 1.0  # one block: no trend coefficient
    xty = np.stack([y1, xy, np.where(trend, ky, 0.0)], -1)
    est = np.full((P, 2), np.nan)
    se = np.full((P, 2), np.nan)
    fit = n > p
    if fit.any():
        inv = _inverse(gram[fit])
        coef = (inv @ xty[fit][..., None])[..., 0]
        rss = np.maximum(yy[fit] - (coef * xty[fit]).sum(-1), 0.0)
        s2 = rss / (n[fit] - p[fit])
        est[fit] = coef[:, :2]
        se[fit] = np.sqrt(s2[:, None] * np.diagonal(inv, axis1=1, axis2=2)[:, :2])
    return est, se


def parameterisations(pooled: _Pooled, requested: Mapping[str, str]
                      ) -> tuple[dict[str, str], dict[str, str]]:
    """Return ({parameter: form}, {parameter: reason}) for the intercepts and the slopes.

    "auto" decides per parameter from the strength of the data
    (:func:`foretell.hierarchical.sampling.choose_by_strength` on :func:`participant_estimates`).
    """
    est, se = participant_estimates(pooled)
    forms, reasons = {}, {}
    for j, name in enumerate(HIERARCHICAL):
        forms[name], reasons[name] = choose_by_strength(est[:, j], se[:, j], pooled.group_of,
                                                        requested[name])
    return forms, reasons


def hierarchical_model(pooled: _Pooled, forms: Mapping[str, str]) -> object:
    """Return the PyMC model of the pooled outcome.

    y_it ~ Normal(a_i + b_i (x_it - mean x) + c (k_it - mean k), sigma_i): participant
    intercepts a_i ~ Normal(mu_a[g_i], tau_a) and slopes b_i ~ Normal(mu_b[g_i],
    tau_b) drawn from their group's distribution, c the change per block (k
    the block order), sigma_i ~ HalfNormal(0.5) per participant. Priors (on
    the log-RT scale): mu_a ~ Normal(mean y, 1), mu_b ~ Normal(0, 0.5),
    tau_a ~ HalfNormal(0.5), tau_b ~ HalfNormal(0.2), c ~ Normal(0, 0.2).
    ``forms`` gives each of "intercept", "slope" "centred" or "non-centred"
    (a_i = mu_a + tau_a z_i, z_i ~ Normal(0, 1); Betancourt & Girolami, 2015).
    The likelihood enters through each participant x block unit's sufficient
    statistics (:func:`gaussian_unit_loglik`), the same density as trial by
    trial at a cost per gradient that grows with units, not trials. With
    several groups ``slope_diff`` = mu_b[g] - mu_b[first group].
    """
    import pymc as pm

    coords = {"participant": list(pooled.participants), "group": list(pooled.groups)}
    g = pooled.group_of
    with pm.Model(coords=coords) as model:
        mu_a = pm.Normal("mu_a", pooled.y_mean, 1.0, dims="group")
        mu_b = pm.Normal("mu_b", 0.0, 0.5, dims="group")
        tau_a = pm.HalfNormal("tau_a", 0.5)
        tau_b = pm.HalfNormal("tau_b", 0.2)
        levels = {}
        for name, var, mu, tau in (("intercept", "a", mu_a, tau_a), ("slope", "b", mu_b, tau_b)):
            if forms[name] == "centred":
                levels[var] = pm.Normal(var, mu[g], tau, dims="participant")
            else:
                z = pm.Normal(f"{var}_z", 0.0, 1.0, dims="participant")
                levels[var] = pm.Deterministic(var, mu[g] + tau * z, dims="participant")
        c = pm.Normal("block", 0.0, 0.2)
        sigma = pm.HalfNormal("sigma", 0.5, dims="participant")
        p = pooled.participant
        ll = gaussian_unit_loglik(levels["a"][p] + c * pooled.trend, levels["b"][p], sigma[p],
                                  pm.math.log(sigma)[p], pooled.stats)
        pm.Potential("y", ll.sum())
        if len(pooled.groups) > 1:
            model.add_coord("group_contrast", [f"{gr} - {pooled.groups[0]}"
                                               for gr in pooled.groups[1:]])
            pm.Deterministic("slope_diff", mu_b[1:] - mu_b[0], dims="group_contrast")
    return model


def unit_loglik(idata: object, pooled: _Pooled) -> np.ndarray:
    """Return (chains, draws, units): the log-likelihood of each participant x block unit per draw.

    :func:`gaussian_unit_loglik` at every posterior draw.
    """
    post = idata.posterior
    a, b, sigma = (post[v].to_numpy() for v in ("a", "b", "sigma"))
    c = post["block"].to_numpy()[..., None]
    p = pooled.participant
    return gaussian_unit_loglik(a[..., p] + c * pooled.trend, b[..., p], sigma[..., p],
                                np.log(sigma)[..., p], pooled.stats)


def leave_out(pooled: _Pooled, unit: int) -> tuple[_Pooled, _Pooled]:
    """Return (the data without ``unit``, every unit in the same coordinates) for an exact LOO refit.

    The regressor and the block order are centred again over the remaining
    trials, and the prior's centre (mean outcome) recomputed without them, as
    :func:`_pool` would on those trials alone; the left-out unit's sums are
    zero in the first (it adds exactly 0 to the likelihood of
    :func:`gaussian_unit_loglik`), kept in the second, which gives its
    likelihood under the refitted posterior (:func:`unit_loglik`).
    """
    s = pooled.stats
    rest = np.ones(len(s.n), dtype=bool)
    rest[unit] = False
    n_rest = s.n[rest].sum()
    x_shift = float((s.n * s.x_mean)[rest].sum() / n_rest)
    t_shift = float((s.n * pooled.trend)[rest].sum() / n_rest)
    moved = UnitStats(s.n, s.x_mean - x_shift, s.y_mean, s.sxx, s.sxy, s.syy)
    every = replace(pooled, stats=moved, trend=pooled.trend - t_shift,
                    y_mean=float((s.n * s.y_mean)[rest].sum() / n_rest))
    keep = rest.astype(float)
    without = replace(every, stats=UnitStats(s.n * keep, moved.x_mean, s.y_mean, s.sxx * keep,
                                             s.sxy * keep, s.syy * keep))
    return without, every


def _pool(chosen: _Measure, frame: pd.DataFrame, columns: Mapping[str, np.ndarray], spec_index: int,
          n_models: int, spans: Mapping[str, slice]) -> _Pooled:
    """Return every participant's kept trials of one model, reduced to participant x block units."""
    ys, xs, trends, parts, units, labels, groups_of = [], [], [], [], [], [], []
    start = 0
    for i, (pid, rows) in enumerate(spans.items()):
        cols, _ = _model_columns(chosen, columns, rows, n_models)
        part = frame.iloc[rows]
        X, y, _, kept = _design(chosen, rows, cols[spec_index: spec_index + 1], trend=False)
        order = chosen.block_order[rows][kept]
        keys = part[["session", "block"]].to_numpy()[kept]
        ys.append(y)
        xs.append(X[0, :, 1])
        trends.append(order.astype(float))
        cuts = np.r_[0, np.flatnonzero(order[1:] != order[:-1]) + 1] if len(y) else np.array([], int)
        units.append(cuts + start)
        parts.append(np.full(len(cuts), i))
        labels += [f"{pid}|{block_label(keys[k, 0])}|{block_label(keys[k, 1])}" for k in cuts]
        start += len(y)
        groups_of.append(str(part["group"].iloc[0]) if "group" in part.columns else "all")
    groups = tuple(dict.fromkeys(groups_of))
    y, x, trend = np.concatenate(ys), np.concatenate(xs), np.concatenate(trends)
    unit_start = np.concatenate(units).astype(np.int64)
    y_mean = float(y.mean()) if len(y) else math.nan
    if len(y):
        x, trend = x - x.mean(), trend - trend.mean()
    stats = unit_statistics(y, x, unit_start) if len(y) else UnitStats(*[np.zeros(0)] * 6)
    return _Pooled(stats, trend[unit_start], np.concatenate(parts).astype(np.int64), tuple(spans),
                   np.array([groups.index(g) for g in groups_of]), groups, tuple(labels), y_mean)


def _requested_forms(parameterisation: str | Mapping[str, str]) -> dict[str, str]:
    """Return {"intercept": ..., "slope": ...} from one form for both or a mapping per parameter."""
    allowed = ("auto", *PARAMETERISATIONS)
    given = dict(parameterisation) if isinstance(parameterisation, Mapping) \
        else dict.fromkeys(HIERARCHICAL, parameterisation)
    unknown = set(given) - set(HIERARCHICAL)
    bad = {k: v for k, v in given.items() if v not in allowed}
    if unknown or bad:
        raise UsageError(f"parameterisation must be one of {', '.join(allowed)}, or a mapping of "
                         f"{' and '.join(HIERARCHICAL)} to one of them; got {parameterisation!r}")
    return {name: given.get(name, "auto") for name in HIERARCHICAL}


def _bayes(chosen: _Measure, frame: pd.DataFrame, columns: Mapping[str, np.ndarray],
           specs: Sequence[ModelSpec],
           spans: Mapping[str, slice], *, draws: int, chains: int, tune: int, seed: int,
           parameterisation: Mapping[str, str], n_jobs: int, progress: bool | None, gate: Gate,
           refits: int) -> tuple[dict[str, object], pd.DataFrame, pd.DataFrame, list[str]]:
    """Return (posteriors, diagnostics table, ELPD comparison, notes) of the hierarchical models."""
    if isinstance(refits, bool) or not isinstance(refits, (int, np.integer)) or refits < 0:
        raise UsageError(f"refits must be a whole number >= 0, got {refits!r}")
    seeds = np.random.SeedSequence(seed).spawn(len(specs))
    show = sys.stderr.isatty() if progress is None else bool(progress)
    cores = max(1, int(n_jobs)) if int(n_jobs) > 0 else chains
    posteriors: dict[str, object] = {}
    diagnostics: dict[str, Diagnostics] = {}
    loos: dict[str, object] = {}
    rows, notes = [], []
    for j, (spec, ss) in enumerate(zip(specs, seeds)):
        pooled = _pool(chosen, frame, columns, j, len(specs), spans)
        if pooled.n_trials == 0:
            notes.append(f"{spec.model_id}: no kept trials for the hierarchical model")
            continue
        forms, reasons = parameterisations(pooled, parameterisation)
        idata, sampler, messages = sample(hierarchical_model(pooled, forms), draws=draws,
                                          tune=tune, chains=chains,
                                          seed=int(ss.generate_state(1)[0]), cores=cores,
                                          progress=show)
        idata.add_groups(log_likelihood={"y": unit_loglik(idata, pooled)},
                         coords={"unit": list(pooled.units)}, dims={"y": ["unit"]})
        names = [v for v in idata.posterior.data_vars if not v.endswith("_z")]
        loo = psis_loo(idata)
        bad = np.flatnonzero(np.asarray(loo.pareto_k) > gate.pareto_k_max)
        unchecked = replace(gate, pareto_k_max=math.inf)
        failed: list[str] = []
        n_refits = 0
        high = (f"{spec.model_id}: {len(bad)} participant x block "
                f"{'unit has' if len(bad) == 1 else 'units have'} Pareto k > {gate.pareto_k_max:g}")
        if len(bad) and not diagnose(idata, sampler, unchecked, names, loo=loo).ok:
            notes.append(f"{high}; not refitted: the posterior fails the gate on other grounds")
        elif len(bad) and len(pooled.units) == 1:
            notes.append(f"{high}; a single unit cannot be left out")
        elif 0 < len(bad) <= refits:
            run = {"draws": draws, "tune": tune, "chains": chains, "cores": cores}
            held_out, failed = _refit_units(pooled, forms, bad, ss, run, unchecked, names)
            loo, n_refits = exact_units(loo, held_out), len(held_out)
            notes.append(f"{high}: estimated by exact leave-one-out refits")
        elif len(bad):
            notes.append(f"{high}; exact leave-one-out would need as many refits, {refits} allowed "
                         "(refits=, --refits)")
        diag = diagnose(idata, sampler, gate, names, loo=loo)
        if failed:  # the first, and how many more
            more = f" (and {len(failed) - 1} more of {len(bad)} refits)" if len(failed) > 1 else ""
            diag = replace(diag, ok=False, reasons=diag.reasons + (failed[0] + more,))
        posteriors[spec.model_id] = idata
        diagnostics[spec.model_id] = diag
        loos[spec.model_id] = loo
        how = "; ".join(f"{name}: {reasons[name]}" for name in HIERARCHICAL)
        rows.append({"model": spec.model_id, "intercept_form": forms["intercept"],
                     "slope_form": forms["slope"], "form_reason": how, **diag.row(),
                     "loo_refits": n_refits})
        notes.append(f"{spec.model_id}: hierarchical model with {forms['intercept']} intercepts "
                     f"and {forms['slope']} slopes ({how}); sampled with {sampler} NUTS, "
                     f"{chains} chains x {draws} draws after {tune} tuning")
        notes += [f"{spec.model_id}: sampler said: {m}" for m in messages]
    elpd, more = compare_loo(loos, diagnostics, gate)
    notes += more
    return posteriors, pd.DataFrame(rows, columns=list(DIAGNOSTIC_COLUMNS)), elpd, notes


def _refit_units(pooled: _Pooled, forms: Mapping[str, str], units: np.ndarray,
                 model_seed: np.random.SeedSequence, run: Mapping[str, int], gate: Gate,
                 names: Sequence[str]) -> tuple[dict[int, np.ndarray], list[str]]:
    """Return ({unit: its log-likelihood draws under the model refitted without it}, gate failures).

    One MCMC run per unit (:func:`leave_out`), each checked by ``gate``.
    """
    held_out: dict[int, np.ndarray] = {}
    failed: list[str] = []
    for u in (int(v) for v in units):
        without, every = leave_out(pooled, u)
        refit, sampler, _ = sample(hierarchical_model(without, forms), seed=_refit_seed(model_seed, u),
                                   **run)
        held_out[u] = unit_loglik(refit, every)[..., u]
        check = diagnose(refit, sampler, gate, names)
        if check.reasons:
            failed.append(f"exact refit without {pooled.units[u]}: {', '.join(check.reasons)}")
    return held_out, failed


def _refit_seed(model_seed: np.random.SeedSequence, unit: int) -> int:
    """Return the sampler seed of the exact refit without ``unit``: the same whichever units are refitted."""
    child = np.random.SeedSequence(model_seed.entropy, spawn_key=(*model_seed.spawn_key, 1 + unit))
    return int(child.generate_state(1)[0])
