"""Reference fitter (the per-participant scipy.optimize path foretell.fitting.participants replaced): plain L-BFGS-B per fit.

Kept for the benchmark and the tests, which compare the batched fitter with it.
Block refits here fit every free parameter on the block, as foretell.fitting.participants does.

The likelihood of a participant's guesses under a model is the product over
scored trials of the choice rule applied to the learner's prediction,
P(guess = a) = (1 - lapse) softmax(inv_temp log p)_a + lapse / m (see
:mod:`foretell.choice`). Scored trials: in every session the first K trials
(K = the largest context depth among the compared models) are warm-up and
are never scored, so all models are compared on the same trials; missed
guesses are not scored either, but their stimuli still feed the learner;
learners restart at each session.

Trade-offs between parameters. When the learner's predictions are close to
uniform, the guess probabilities depend on inv_temp and lapse almost only
through how far they pull the choice away from uniform, so the two trade
off (a lower inv_temp looks like a higher lapse). When leak or alpha are
freed they trade off against inv_temp too: a leakier or less smoothed
learner makes sharper predictions, which a lower inv_temp flattens again.
``fits`` reports the correlation of the estimates (``corr_<a>_<b>``, from the
inverse of the numerical Hessian of the negative log-likelihood at the
optimum) so that such trade-offs are visible.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from scipy.optimize import OptimizeResult, minimize
from sklearn.model_selection import LeaveOneGroupOut

from foretell.choice import choice_terms
from foretell.errors import LogError, UsageError
from foretell.models import ModelSpec, model_specs
from foretell.params import CHOICE_PARAMS, LEARNER_PARAMS, PARAMS
from foretell.tasks import Task
from foretell.validation import child_rng

_LOG_TINY = math.log(1e-300)  # floor of log predictions (zero probabilities), as in foretell.choice
_FD_STEP = 1e-5  # finite-difference step (optimiser coordinates) for learner parameters
_HESS_STEP = 1e-4  # finite-difference step of the gradient for the Hessian
_LBFGSB = {"ftol": 1e-12, "gtol": 1e-8}  # tight: the likelihood has flat ridges (inv_temp vs lapse)
_PGTOL = 1e-3  # projected gradient (nats per optimiser unit) below which a fit counts as converged
_RESTARTS = 3  # L-BFGS-B restarts from its own end point when it stops short
_MAX_COND = 1e10  # Hessians worse conditioned than this give NaN correlations
_PARAM_ORDER = CHOICE_PARAMS + LEARNER_PARAMS
_LOG_COLUMNS = ("participant", "session", "block", "trial", "stimulus", "response")


@dataclass(frozen=True)
class FitOptions:
    """How to fit: parameters freed or held, random starts, what to compute.

    ``free`` names learner parameters fitted in every model that has them
    (``leak``, ``alpha``); ``fixed`` holds parameters at given values (e.g.
    ``{"lapse": 0.0}``), overriding ``free``; ``warmup`` overrides K, the number
    of unscored trials at the start of each session.
    """

    free: tuple[str, ...] = ()
    fixed: tuple[tuple[str, float], ...] = ()
    n_starts: int = 3
    cv: bool = True
    per_block: bool = True
    warmup: int | None = None

    @classmethod
    def make(cls, *, free: Iterable[str] = (), fixed: Mapping[str, float] | None = None,
             n_starts: int = 3, cv: bool = True, per_block: bool = True,
             warmup: int | None = None) -> "FitOptions":
        """Return validated options from the keyword arguments of the public functions."""
        fixed = dict(fixed or {})
        for name, value in fixed.items():
            if name not in PARAMS:
                raise UsageError(f"cannot fix {name!r}: fixable parameters are {', '.join(PARAMS)}")
            PARAMS[name].check(value, "fixed")
            if name == "lapse" and float(value) >= 1.0:
                raise UsageError("fixed lapse must be below 1: at 1 every guess ignores the learner")
        if int(n_starts) < 1:
            raise UsageError(f"n_starts must be at least 1; got {n_starts}")
        if warmup is not None and int(warmup) < 0:
            raise UsageError(f"warmup must be >= 0; got {warmup}")
        free = (free,) if isinstance(free, str) else tuple(free)
        return cls(free, tuple(sorted((k, float(v)) for k, v in fixed.items())), int(n_starts),
                   bool(cv), bool(per_block), None if warmup is None else int(warmup))


@dataclass(frozen=True)
class FitTables:
    """The tidy results of fitting participants.

    ``fits``: one row per participant x model (participant, group, model,
    loglik, n_params, n_trials, aic, bic, cv_loglik, inv_temp, lapse, leak and
    alpha when fitted or fixed, converged, cv_converged, message, depth, and
    the correlations ``corr_<a>_<b>`` of the fitted parameters).
    ``blocks``: one row per participant x block x model (participant, group,
    session, block, model, loglik with the participant's fitted parameters,
    n_trials, n_params, inv_temp and lapse refitted on the block alone,
    loglik_refit, converged and message of the refit).
    ``predictions``: one row per trial x model (participant, group, session,
    block, trial, model, p_<symbol> the learner's prediction, guess_prob the
    probability of the actual guess under the fitted choice rule, NaN when
    missed, scored).
    """

    fits: pd.DataFrame
    blocks: pd.DataFrame
    predictions: pd.DataFrame


# -- one participant's trials ------------------------------------------------------------
@dataclass(frozen=True)
class _Trials:
    """One participant's trials in session order, ready for the likelihood."""

    sessions: tuple[np.ndarray, ...]  # stimulus indices of each session
    guess: np.ndarray  # response index per trial, -1 = missed
    scored: np.ndarray  # indices of the scored trials
    unit: np.ndarray  # block unit: one code per (session, block), every trial
    keys: pd.DataFrame  # session, block, trial of every trial
    symbols: tuple[str, ...]

    @property
    def units(self) -> np.ndarray:
        """Return the block unit of each scored trial."""
        return self.unit[self.scored]


def encode_log(log: pd.DataFrame, task: Task) -> pd.DataFrame:
    """Return ``log`` with stimulus_idx, response_idx (-1 = missed) and missed columns.

    Existing index columns are kept (as :func:`foretell.logs.validate_log`
    makes them); labels are encoded with ``task.encode``, and a missing or
    empty response is a missed guess.
    """
    missing = [c for c in _LOG_COLUMNS if c not in log.columns]
    missing = [c for c in missing if not (c in ("stimulus", "response") and f"{c}_idx" in log.columns)]
    if missing:
        raise LogError(f"the log lacks the column(s) {', '.join(missing)}")
    out = log.copy()
    for col in ("stimulus", "response"):
        if f"{col}_idx" not in out.columns:
            labels = out[col]
            present = labels.notna() & (labels.astype("string").str.strip() != "")
            uniques = pd.unique(labels[present])
            codes = dict(zip(uniques, task.encode(uniques)))
            out[f"{col}_idx"] = labels.map(codes).where(present, -1).astype(np.int64)
    if (out["stimulus_idx"] < 0).any():
        raise LogError("the log has trials without a stimulus")
    out["missed"] = out["response_idx"] < 0
    return out


def _trials(data: pd.DataFrame, symbols: tuple[str, ...], warmup: int) -> _Trials:
    """Return the prepared trials of one participant's encoded log."""
    data = data.sort_values(["session", "trial"], kind="stable")
    session = data["session"].to_numpy()
    guess = data["response_idx"].to_numpy(np.int64)
    starts = np.flatnonzero(np.r_[True, session[1:] != session[:-1]])
    position = np.arange(len(data)) - np.repeat(starts, np.diff(np.r_[starts, len(data)]))
    scored = np.flatnonzero((position >= warmup) & (guess >= 0))
    stim = data["stimulus_idx"].to_numpy(np.int64)
    keys = data[["session", "block", "trial"]].reset_index(drop=True)
    unit = keys.groupby(["session", "block"], sort=False).ngroup().to_numpy()
    sessions = tuple(np.split(stim, starts[1:]))
    return _Trials(sessions, guess, scored, unit, keys, tuple(symbols))


# -- the likelihood of one model for one participant -----------------------------------------
class _Likelihood:
    """Log-likelihood of one model's guesses as a function of its free parameters.

    The optimiser works in coordinates z (log of log-scale parameters, the
    value itself otherwise) within the parameters' bounds. Learner
    predictions are cached per learner-parameter values, so when only
    inv_temp and lapse are free the learner runs once.
    """

    def __init__(self, spec: ModelSpec, trials: _Trials, fixed: Mapping[str, float],
                 cache: dict | None = None) -> None:
        self.spec, self.trials, self.fixed = spec, trials, dict(fixed)
        self.names = tuple(p for p in spec.free if p not in fixed)
        held = {k: v for k, v in fixed.items() if k in CHOICE_PARAMS or k in spec.tunable}
        self.held = {**dict(spec.defaults), **held}
        self.params = [PARAMS[n] for n in self.names]
        self.log_scale = np.array([p.log_scale for p in self.params], dtype=bool)
        self.bounds = np.array([(math.log(p.low), math.log(p.high)) if p.log_scale
                                else (p.low, p.high) for p in self.params]).reshape(-1, 2)
        self.cache = {} if cache is None else cache

    def values(self, z: np.ndarray) -> dict[str, float]:
        """Return every parameter value (free from z, held otherwise)."""
        z = np.asarray(z, dtype=float)
        free = np.where(self.log_scale, np.exp(z), z)
        return {**self.held, **dict(zip(self.names, free.tolist()))}

    def to_z(self, values: Mapping[str, float]) -> np.ndarray:
        """Return the optimiser coordinates of the free parameters in ``values``."""
        return np.array([math.log(values[n]) if log else float(values[n])
                         for n, log in zip(self.names, self.log_scale)])

    def log_prediction(self, values: Mapping[str, float]) -> np.ndarray:
        """Return the learner's log predictions (n_trials, m), restarting at each session."""
        key = tuple(values[p] for p in self.spec.tunable)
        if key not in self.cache:
            learner = self.spec.learner(**{p: values[p] for p in self.spec.tunable})
            m = len(self.trials.symbols)
            if len(self.cache) > 64:  # free learner parameters: only recent values are reused
                self.cache.clear()
            log_pred = np.concatenate([learner.log_next_proba(x, m) for x in self.trials.sessions])
            self.cache[key] = np.maximum(log_pred, _LOG_TINY)
        return self.cache[key]

    def terms(self, values: Mapping[str, float], idx: np.ndarray):
        """Return :func:`choice_terms` on the trials ``idx``."""
        log_pred = self.log_prediction(values)
        return choice_terms(log_pred[idx], self.trials.guess[idx], values["inv_temp"], values["lapse"])

    def loglik(self, values: Mapping[str, float], idx: np.ndarray) -> float:
        """Return the log-likelihood of the guesses on trials ``idx``."""
        return float(self.terms(values, idx)[0].sum())

    def nll(self, z: np.ndarray, idx: np.ndarray) -> tuple[float, np.ndarray]:
        """Return the negative log-likelihood at z and its gradient in z.

        inv_temp and lapse derivatives are analytic (:func:`choice_terms`);
        learner parameters use central differences (one-sided at a bound).
        """
        z = np.asarray(z, dtype=float)
        values = self.values(z)
        logp, d_inv_temp, d_lapse = self.terms(values, idx)
        f = -float(logp.sum())
        grad = np.empty(len(self.names))
        analytic = {"inv_temp": d_inv_temp, "lapse": d_lapse}
        for i, name in enumerate(self.names):
            if name in analytic:
                chain = values[name] if self.log_scale[i] else 1.0
                grad[i] = -float(analytic[name].sum()) * chain
                continue
            lo, hi = self.bounds[i]
            up, down = min(z[i] + _FD_STEP, hi), max(z[i] - _FD_STEP, lo)
            f_up = -self.loglik(self.values(_moved(z, i, up)), idx) if up > z[i] else f
            f_down = -self.loglik(self.values(_moved(z, i, down)), idx) if down < z[i] else f
            grad[i] = (f_up - f_down) / (up - down)
        return f, grad


def _moved(z: np.ndarray, i: int, value: float) -> np.ndarray:
    """Return a copy of z with coordinate i set to ``value``."""
    out = z.copy()
    out[i] = value
    return out


# -- optimisation ----------------------------------------------------------------------
@dataclass(frozen=True)
class _Optimum:
    """A maximum-likelihood estimate: every parameter value, its coordinates, ln L, diagnostics."""

    values: dict[str, float]
    z: np.ndarray
    loglik: float
    converged: bool
    message: str


def _starts(lik: _Likelihood, rng: np.random.Generator, n_starts: int,
            first: np.ndarray | None = None) -> list[np.ndarray]:
    """Return starting points: ``first`` (default: each parameter's usual start), then uniform draws in z."""
    if first is None:
        first = lik.to_z({p.name: p.start for p in lik.params})
    lo, hi = lik.bounds.T
    return [first] + [rng.uniform(lo, hi) for _ in range(n_starts - 1)]


def _full_starts(lik: _Likelihood, idx: np.ndarray, rng: np.random.Generator,
                 n_starts: int) -> list[np.ndarray]:
    """Return the starts of a full fit; with learner parameters free, the first is the nested optimum.

    The nested model holds the learner parameters at their defaults (no leak,
    alpha = 0.5) and fits inv_temp and lapse on cached predictions; starting
    there, the full fit can only do better than the nested model (L-BFGS-B
    never accepts a worse point), so e.g. count-1-leak never scores below
    count-1 on the same trials.
    """
    free_learner = [p for p in lik.names if p in LEARNER_PARAMS]
    if not free_learner:
        return _starts(lik, rng, n_starts)
    held = {**lik.fixed, **{p: lik.held.get(p, PARAMS[p].start) for p in free_learner}}
    nested = _Likelihood(lik.spec, lik.trials, held, lik.cache)
    inner = _maximise(nested, idx, _starts(nested, rng, n_starts))
    return _starts(lik, rng, n_starts, lik.to_z(inner.values))


def _lbfgsb(lik: _Likelihood, idx: np.ndarray, z0: np.ndarray, bounds: list) -> OptimizeResult:
    """Return bounded L-BFGS-B's result, restarted from its end point while the gradient is not zero.

    On the flat inv_temp-lapse ridges L-BFGS-B can stop on its function-change
    test with a clearly non-zero projected gradient; a restart (fresh curvature
    memory) continues. ``success`` is False unless the projected gradient
    ends below the tolerance.
    """
    lo, hi = np.array(bounds).T
    res = minimize(lik.nll, z0, args=(idx,), jac=True, method="L-BFGS-B", bounds=bounds, options=_LBFGSB)
    for attempt in range(_RESTARTS + 1):
        grad = np.where(((res.x <= lo) & (res.jac > 0)) | ((res.x >= hi) & (res.jac < 0)), 0.0, res.jac)
        stationary = bool(np.max(np.abs(grad)) <= _PGTOL)
        if stationary or attempt == _RESTARTS:
            break
        again = minimize(lik.nll, res.x, args=(idx,), jac=True, method="L-BFGS-B", bounds=bounds,
                         options=_LBFGSB)
        if not again.fun <= res.fun:
            break
        res = again
    res.success = bool(res.success) and stationary
    if not stationary:
        res.message = f"{res.message} (projected gradient {np.max(np.abs(grad)):.1e} > {_PGTOL})"
    return res


def _maximise(lik: _Likelihood, idx: np.ndarray, starts: Sequence[np.ndarray]) -> _Optimum:
    """Return the maximum-likelihood estimate on trials ``idx``.

    Bounded L-BFGS-B from every start (the best kept); when it does not report
    success, bounded Nelder-Mead from that best point, and ``converged`` is
    Nelder-Mead's verdict. ``message`` keeps every optimiser's own message.
    """
    if not len(idx):
        values = {**lik.values(starts[0]), **{p: math.nan for p in CHOICE_PARAMS if p in lik.names}}
        return _Optimum(values, np.asarray(starts[0]), 0.0, False, "no scored trials: nothing fitted")
    if not lik.names:
        values = lik.values(np.empty(0))
        return _Optimum(values, np.empty(0), lik.loglik(values, idx), True, "no free parameter")
    lo, hi = lik.bounds.T
    bounds = list(zip(lo, hi))
    best = None
    for z0 in starts:
        res = _lbfgsb(lik, idx, np.clip(z0, lo, hi), bounds)
        if np.isfinite(res.fun) and (best is None or res.fun < best.fun):
            best = res
    if best is None:
        return _Optimum(lik.values(starts[0]), np.asarray(starts[0]), math.nan, False,
                        "L-BFGS-B: no finite log-likelihood from any start")
    z, fun, converged = best.x, float(best.fun), bool(best.success)
    message = f"L-BFGS-B: {best.message}"
    if not converged:
        res = minimize(lambda v: lik.nll(v, idx)[0], z, method="Nelder-Mead", bounds=bounds,
                       options={"xatol": 1e-6, "fatol": 1e-9, "maxfev": 400 * len(z)})
        message += f"; Nelder-Mead: {res.message}"
        converged = bool(res.success)
        if res.fun <= fun:
            z, fun = res.x, float(res.fun)
    return _Optimum(lik.values(z), np.asarray(z), -fun, converged, message)


def _correlations(lik: _Likelihood, idx: np.ndarray, z: np.ndarray) -> dict[str, float]:
    """Return corr_<a>_<b> of the estimates from the inverse Hessian of the negative log-likelihood.

    Cov = H^-1 (observed information, common practice); the Hessian is the
    central difference of the gradient in the optimiser coordinates
    (one-sided at a bound). The coordinates are per-parameter monotone
    transforms, so the correlations are those of the parameters themselves
    to first order (delta method). NaN when H is not positive definite or is
    ill conditioned.
    """
    k = len(z)
    if k < 2:
        return {}
    lo, hi = lik.bounds.T
    hess = np.empty((k, k))
    for i in range(k):
        up, down = min(z[i] + _HESS_STEP, hi[i]), max(z[i] - _HESS_STEP, lo[i])
        hess[:, i] = (lik.nll(_moved(z, i, up), idx)[1] - lik.nll(_moved(z, i, down), idx)[1]) / (up - down)
    hess = 0.5 * (hess + hess.T)
    pairs = list(combinations(range(k), 2))
    names = [f"corr_{lik.names[i]}_{lik.names[j]}" for i, j in pairs]
    try:
        np.linalg.cholesky(hess)
        if np.linalg.cond(hess) > _MAX_COND:
            raise np.linalg.LinAlgError
    except np.linalg.LinAlgError:
        return dict.fromkeys(names, math.nan)
    cov = np.linalg.inv(hess)
    sd = np.sqrt(np.diag(cov))
    return {name: float(cov[i, j] / (sd[i] * sd[j])) for name, (i, j) in zip(names, pairs)}


# -- one model, one participant ----------------------------------------------------------------
def _fit_model(spec: ModelSpec, trials: _Trials, options: FitOptions,
               rng: np.random.Generator) -> tuple[dict, list[dict], pd.DataFrame]:
    """Return the fit row, the block rows and the prediction frame of one model."""
    fixed = dict(options.fixed)
    lik = _Likelihood(spec, trials, fixed)
    scored = trials.scored
    best = _maximise(lik, scored, _full_starts(lik, scored, rng, options.n_starts))
    k, n = len(lik.names), len(scored)
    row = {"model": spec.model_id, "loglik": best.loglik, "n_params": k, "n_trials": n,
           "aic": 2 * k - 2 * best.loglik, "bic": k * math.log(n) - 2 * best.loglik if n else math.nan,
           "cv_loglik": math.nan, "cv_converged": False,
           **{p: best.values.get(p, math.nan) for p in _PARAM_ORDER},
           "converged": best.converged, "message": best.message, "depth": spec.depth,
           **(_correlations(lik, scored, best.z) if n else {})}
    if options.cv:
        row["cv_loglik"], row["cv_converged"] = _cross_validate(lik, best)
    blocks = _block_rows(lik, fixed, best, rng, options.n_starts) if options.per_block else []
    return row, blocks, _prediction_frame(lik, best.values)


def _cross_validate(lik: _Likelihood, best: _Optimum) -> tuple[float, bool | None]:
    """Return the leave-one-block-out held-out log-likelihood and whether every fold converged.

    Folds from scikit-learn's LeaveOneGroupOut with groups = block; the learner
    sees every stimulus; each fold is fitted on the other blocks' guesses
    (starting from the full-data estimate) and scored on the held-out block.
    With fewer than two blocks there is nothing to hold out: (NaN, None), and
    cv_converged is empty (not applicable) rather than False.
    """
    scored, units = lik.trials.scored, lik.trials.units
    if len(np.unique(units)) < 2:
        return math.nan, None
    total, ok = 0.0, True
    for train, test in LeaveOneGroupOut().split(scored, groups=units):
        fold = _maximise(lik, scored[train], [best.z])
        total += lik.loglik(fold.values, scored[test])
        ok = ok and fold.converged
    return total, ok


def _block_rows(lik: _Likelihood, fixed: Mapping[str, float], best: _Optimum,
                rng: np.random.Generator, n_starts: int) -> list[dict]:
    """Return one row per block: log-likelihood at the participant's estimate, and every free parameter refitted.

    The refit fits every free parameter on the block's scored trials alone
    (the learner still runs over whole sessions), from the participant's
    estimate and n_starts - 1 uniform draws.
    """
    spec, trials = lik.spec, lik.trials
    rows = []
    first_rows = np.unique(trials.unit, return_index=True)[1]
    for unit, first in enumerate(first_rows):
        idx = trials.scored[trials.units == unit]
        fit = _maximise(lik, idx, _starts(lik, rng, n_starts, best.z))
        rows.append({"session": trials.keys["session"].iat[first], "block": trials.keys["block"].iat[first],
                     "model": spec.model_id, "loglik": lik.loglik(best.values, idx),
                     "n_trials": len(idx), "n_params": len(lik.names),
                     "inv_temp": fit.values["inv_temp"], "lapse": fit.values["lapse"],
                     "loglik_refit": fit.loglik, "converged": fit.converged, "message": fit.message})
    return rows


def _prediction_frame(lik: _Likelihood, values: Mapping[str, float]) -> pd.DataFrame:
    """Return the per-trial predictions and guess probabilities at the fitted values."""
    log_pred = lik.log_prediction(values)
    guess = lik.trials.guess
    made = np.flatnonzero(guess >= 0)
    guess_prob = np.full(len(guess), math.nan)
    logp = choice_terms(log_pred[made], guess[made], values["inv_temp"], values["lapse"])[0]
    guess_prob[made] = np.exp(logp)
    scored = np.zeros(len(guess), dtype=bool)
    scored[lik.trials.scored] = True
    frame = lik.trials.keys.assign(model=lik.spec.model_id)
    probs = pd.DataFrame(np.exp(log_pred), columns=[f"p_{s}" for s in lik.trials.symbols])
    return pd.concat([frame, probs], axis=1).assign(guess_prob=guess_prob, scored=scored)


# -- public entry points ---------------------------------------------------------------------
def fit_participant(data: pd.DataFrame, task: Task, models: Sequence[str | ModelSpec] | None = None, *,
                    free: Iterable[str] = (), fixed: Mapping[str, float] | None = None,
                    n_starts: int = 3, cv: bool = True, per_block: bool = True,
                    warmup: int | None = None, rng: np.random.Generator | int | None = 0) -> FitTables:
    """Return the fit tables (see :class:`FitTables`) of one participant's log.

    ``data`` holds one participant's trials in the canonical log format;
    ``models`` are identifiers (default: :func:`foretell.models.default_models`);
    ``rng`` seeds the random starts. AIC = 2k - 2 ln L (Akaike, 1974) and
    BIC = k ln n - 2 ln L (Schwarz, 1978), k = free parameters, n = scored trials.
    """
    options = FitOptions.make(free=free, fixed=fixed, n_starts=n_starts, cv=cv,
                              per_block=per_block, warmup=warmup)
    specs = model_specs(models, task, options.free)
    if data["participant"].nunique() != 1:
        raise UsageError("fit_participant takes one participant's trials; use fit_participants")
    return _fit_one(encode_log(data, task), task, specs, options, np.random.default_rng(rng))


def _fit_one(data: pd.DataFrame, task: Task, specs: Sequence[ModelSpec], options: FitOptions,
             rng: np.random.Generator) -> FitTables:
    warmup = max(s.depth for s in specs) if options.warmup is None else options.warmup
    trials = _trials(data, task.symbols, warmup)
    label = {"participant": data["participant"].iloc[0],
             "group": data["group"].iloc[0] if "group" in data.columns else pd.NA}
    rows, block_rows, preds = [], [], []
    for spec in specs:
        row, blocks, pred = _fit_model(spec, trials, options, rng)
        rows.append(row)
        block_rows += blocks
        preds.append(pred)
    fits = _tidy(pd.DataFrame(rows), label, _fit_columns(specs, options))
    blocks = _tidy(pd.DataFrame(block_rows, columns=_BLOCK_COLUMNS), label, _BLOCK_COLUMNS)
    predictions = pd.concat(preds, ignore_index=True)
    predictions = _tidy(predictions, label, predictions.columns)
    return FitTables(fits, blocks, predictions)


_BLOCK_COLUMNS = ["session", "block", "model", "loglik", "n_trials", "n_params", "inv_temp", "lapse",
                  "loglik_refit", "converged", "message"]


def _fit_columns(specs: Sequence[ModelSpec], options: FitOptions) -> list[str]:
    """Return the fits columns after participant and group (learner parameters, correlations when used)."""
    fixed = dict(options.fixed)
    used = [p for p in LEARNER_PARAMS if p in fixed or any(p in s.free for s in specs)]
    free_sets = [tuple(p for p in s.free if p not in fixed) for s in specs]
    corr = [f"corr_{a}_{b}" for a, b in combinations(_PARAM_ORDER, 2)
            if any(a in f and b in f for f in free_sets)]
    return (["model", "loglik", "n_params", "n_trials", "aic", "bic", "cv_loglik", "inv_temp", "lapse"]
            + used + ["converged", "cv_converged", "message", "depth"] + corr)


def _tidy(frame: pd.DataFrame, label: Mapping[str, object], columns: Sequence[str]) -> pd.DataFrame:
    """Return ``frame`` restricted to ``columns`` (missing ones NaN), led by participant and group."""
    out = frame.reindex(columns=[c for c in columns if c not in label])
    out.insert(0, "group", label["group"])
    out.insert(0, "participant", label["participant"])
    return out


def fit_participants(log: pd.DataFrame, task: Task, models: Sequence[str | ModelSpec] | None = None, *,
                     free: Iterable[str] = (), fixed: Mapping[str, float] | None = None,
                     n_starts: int = 3, cv: bool = True, per_block: bool = True,
                     warmup: int | None = None, seed: int = 0, n_jobs: int = 1,
                     progress: bool | None = None) -> FitTables:
    """Return the fit tables (see :class:`FitTables`) of every participant of a log.

    Participants are fitted independently, in parallel through joblib
    (``n_jobs``); participant p draws its random starts from
    ``foretell.validation.child_rng(seed, p)``, so the tables do not depend on
    ``n_jobs`` or on the order of participants. ``progress``
    prints a progress line on stderr (None: only when stderr is a terminal).
    Other options as :func:`fit_participant`.
    """
    options = FitOptions.make(free=free, fixed=fixed, n_starts=n_starts, cv=cv,
                              per_block=per_block, warmup=warmup)
    if int(n_jobs) == 0:
        raise UsageError("n_jobs must be a positive count or negative (-1: all cores); got 0")
    specs = model_specs(models, task, options.free)
    data = encode_log(log, task)
    parts = list(data.groupby("participant", sort=False))
    jobs = (delayed(_fit_one)(part, task, specs, options, child_rng(seed, pid)) for pid, part in parts)
    results = Parallel(n_jobs=n_jobs, return_as="generator")(jobs)
    show = sys.stderr.isatty() if progress is None else progress
    done = list(_progress(results, len(parts)) if show else results)
    return FitTables(*(pd.concat([getattr(r, f) for r in done], ignore_index=True)
                       for f in ("fits", "blocks", "predictions")))


def _progress(results: Iterable[FitTables], total: int) -> Iterator[FitTables]:
    """Yield ``results`` while drawing a progress bar on stderr."""
    width = 30
    for i, result in enumerate(results, start=1):
        filled = width * i // total
        sys.stderr.write(f"\rfitting participants [{'#' * filled}{'.' * (width - filled)}] {i}/{total}")
        sys.stderr.flush()
        yield result
    sys.stderr.write("\n")
