"""Per-participant maximum-likelihood fits of learner models to guesses, with CV and per-block refits.

The likelihood of a participant's guesses under a model is the product over
scored trials of the choice rule applied to the learner's prediction,
P(guess = a) = (1 - lapse) softmax(inv_temp log p)_a + lapse / m (see
:mod:`foretell.choice`). Scored trials: in every session the first K trials
(K = the largest context depth among the compared models) are warm-up and
are never scored, so all models are compared on the same trials; missed
guesses are not scored either, but their stimuli still feed the learner;
learners restart at each session and carry on across blocks.

How the fits are made. Every fit is a *row*: the whole-session fit, each
leave-one-block-out fold (fitted on the other blocks' guesses) and each
block's refit (every free parameter refitted on that block's guesses, the
learner still running over the whole session). A learner's predictions are
computed once per participant (and once per learner-parameter value tried),
and the rows of many participants are solved together by a bounded projected
Newton method on inv_temp and lapse with analytic gradients and Hessians
(:mod:`foretell.fitting.optimise`): the whole-session fit from the usual start,
the same with each free choice parameter at each of its bounds in turn
(the likelihood can have modes at the ends of the ranges) and
``n_starts - 1`` seeded uniform draws; the folds from the whole-session
estimate; the block refits from it, it with each parameter at each bound, the
usual start and ``n_starts - 1`` draws. Rows are solved independently, so
how participants are batched (and ``n_jobs``) never changes a result.
Free learner parameters (leak, alpha) are found on the profile likelihood
(inv_temp and lapse maximised at each value): a grid that contains the
nested model's values (no leak, alpha = 1/2), so a leaky model never fits
worse than the model it nests (the folds skip the grid and start from the
whole-session estimate), then Brent's method around the best point (with
two learner parameters, from the best grid minima too), one learner
parameter at a time until a cycle gains less than 1e-10; inv_temp and lapse
are re-maximised from the row's best point at every value tried, and
learner predictions are computed once per participant and value.
A fit that does not converge (projected gradient above 1e-3), and every fit
with two free learner parameters, is continued by bounded Nelder-Mead on
every free parameter; ``converged`` and ``message`` report both.

Trade-offs between parameters. When the learner's predictions are close to
uniform, inv_temp and lapse trade off (a lower inv_temp looks like a higher
lapse); freed leak or alpha trade off against inv_temp too. ``fits``
reports the correlation of the estimates (``corr_<a>_<b>``, from the inverse
Hessian of the negative log-likelihood at the optimum) so that such
trade-offs are visible.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Generator, Iterable, Mapping, Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from scipy.optimize import minimize
from tqdm import tqdm

from foretell.choice import choice_terms
from foretell.cluster import batches, job_count, workers_stopped
from foretell.errors import LogError, UsageError
from foretell.logs import ValidatedLog, unscorable
from foretell.models import ModelSpec, model_specs
from foretell.fitting.optimise import BOUND_TOL, Batch, ChoiceSpace, brent, newton
from foretell.params import CHOICE_PARAMS, LEARNER_PARAMS, PARAMS
from foretell.tasks import Task

_LOG_TINY = math.log(1e-300)  # floor of log predictions (zero probabilities), as in foretell.choice
_PARAM_ORDER = CHOICE_PARAMS + LEARNER_PARAMS
_GRID = {1: 9, 2: 7}  # grid points per learner parameter by their number (plus the nested value)
_LOCAL_STARTS = 2  # further grid minima searched from when two or more learner parameters are free
_XTOL = 1e-5  # Brent's tolerance on a learner coordinate
_SEARCH_GTOL = 1e-4  # Newton's projected-gradient tolerance while learner parameters move (then GTOL)
_MAX_CYCLES = 20  # coordinate cycles of the learner-parameter search
_CYCLE_GAIN = 1e-10  # a cycle gaining less (nats) ends the search
_FD_STEP = 1e-5  # finite-difference step (optimiser coordinates) of learner parameters
_HESS_STEP = 1e-4  # finite-difference step of the gradient for the Hessian
_MAX_COND = 1e10  # Hessians worse conditioned than this give NaN correlations
_CHUNK_TRIALS = 50_000  # most trials per batch of participants solved together
FULL, FOLD, BLOCK = 0, 1, 2  # row kinds: whole session, leave-one-block-out fold, block refit


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

    ``fits``: one row per participant x model: participant, group, model,
    loglik, n_params, n_trials, aic, bic, cv_loglik, inv_temp, lapse (leak,
    alpha when fitted or fixed), converged, cv_converged, at_bound (free
    parameters within 1e-6 of a fit bound in optimiser coordinates,
    ';'-joined, '' when none), message, depth, and the correlations
    ``corr_<a>_<b>`` of the fitted parameters.
    ``blocks``: one row per participant x block x model: participant, group,
    session, block, model, n_trials, n_params, loglik_session (at the
    whole-session estimate), loglik_block (at the block's own refit of every
    free parameter), bic_block = n_params ln(n_trials) - 2 loglik_block (NaN
    without trials), cv_loglik_block (held out in leave-one-block-out CV, NaN
    with one block), <param>_block for each free parameter, converged (the
    refit), cv_converged (that block's fold), message.
    ``predictions``: one row per trial x model: participant, group, session,
    block, trial, model, p_<symbol> (the learner's prediction), guess_prob
    (the actual guess under the fitted choice rule, NaN when missed), scored.
    ``excluded``: participants not fitted (participant, group, reason).
    """

    fits: pd.DataFrame
    blocks: pd.DataFrame
    predictions: pd.DataFrame
    excluded: pd.DataFrame


# -- one participant's trials ------------------------------------------------------------
@dataclass(frozen=True)
class _Participant:
    """One participant's trials ordered by session, block and trial, ready for the likelihood."""

    participant: object
    group: object
    sessions: tuple[np.ndarray, ...]  # stimulus indices of each session
    guess: np.ndarray  # response index per trial, -1 = missed
    scored: np.ndarray  # indices of the scored trials
    unit: np.ndarray  # block unit (one code per session x block) of every trial
    keys: pd.DataFrame  # session, block, trial of every trial
    unit_labels: tuple[tuple[object, object], ...]  # (session, block) of every unit
    seeds: tuple[np.random.SeedSequence, ...]  # one per model

    @property
    def n_units(self) -> int:
        """Return the number of blocks (session x block units)."""
        return int(self.unit.max()) + 1

    def trials(self, kind: int, unit: int) -> np.ndarray:
        """Return the scored trials a row of ``kind`` fits (``unit``: the fold's or block's unit)."""
        if kind == FULL:
            return self.scored
        in_unit = self.unit[self.scored] == unit
        return self.scored[~in_unit if kind == FOLD else in_unit]


def _split(frame: pd.DataFrame, warmup: int) -> list[tuple[object, object, pd.DataFrame, np.ndarray]]:
    """Return (participant, group, trials, scored indices) per participant, in sorted order."""
    frame = frame.sort_values(["participant", "session", "block", "trial"], kind="stable")
    out = []
    for pid, data in frame.groupby("participant", sort=False):
        session = data["session"].to_numpy()
        guess = data["response_idx"].to_numpy(np.int64)
        starts = np.flatnonzero(np.r_[True, session[1:] != session[:-1]])
        position = np.arange(len(data)) - np.repeat(starts, np.diff(np.r_[starts, len(data)]))
        scored = np.flatnonzero((position >= warmup) & (guess >= 0))
        group = data["group"].iloc[0] if "group" in data.columns else pd.NA
        out.append((pid, group, data, scored))
    return out


def _participant(pid, group, data: pd.DataFrame, scored: np.ndarray,
                 seeds: Sequence[np.random.SeedSequence]) -> _Participant:
    """Return the prepared trials of one participant."""
    session = data["session"].to_numpy()
    starts = np.flatnonzero(np.r_[True, session[1:] != session[:-1]])
    stim = data["stimulus_idx"].to_numpy(np.int64)
    keys = data[["session", "block", "trial"]].reset_index(drop=True)
    unit = keys.groupby(["session", "block"], sort=False).ngroup().to_numpy()
    first = np.unique(unit, return_index=True)[1]
    labels = tuple(zip(keys["session"].to_numpy()[first], keys["block"].to_numpy()[first]))
    return _Participant(pid, group, tuple(np.split(stim, starts[1:])),
                        data["response_idx"].to_numpy(np.int64), scored, unit, keys, labels, tuple(seeds))


# -- one model: the parameter space and the learner's predictions ----------------------------
class _Model:
    """One model's free parameters, held values and cached learner predictions for a batch of participants."""

    def __init__(self, spec: ModelSpec, fixed: Mapping[str, float], parts: Sequence[_Participant],
                 symbols: Sequence[str]) -> None:
        self.spec, self.parts, self.symbols, self.m = spec, parts, tuple(symbols), len(symbols)
        self.names = tuple(p for p in spec.free if p not in fixed)
        held = {**dict(spec.defaults),
                **{k: v for k, v in fixed.items() if k in CHOICE_PARAMS or k in spec.tunable}}
        self.held = held
        self.space = ChoiceSpace.make(tuple(p for p in self.names if p in CHOICE_PARAMS), held)
        self.learner_names = tuple(p for p in self.names if p in LEARNER_PARAMS)
        self.learner_log = np.array([PARAMS[p].log_scale for p in self.learner_names], dtype=bool)
        self.learner_bounds = np.array([(math.log(PARAMS[p].low), math.log(PARAMS[p].high))
                                        if PARAMS[p].log_scale else (PARAMS[p].low, PARAMS[p].high)
                                        for p in self.learner_names]).reshape(-1, 2)
        self.theta0 = self.to_theta({p: held[p] for p in self.learner_names})
        self.cache: dict[tuple, np.ndarray] = {}

    def to_theta(self, values: Mapping[str, float]) -> np.ndarray:
        """Return optimiser coordinates of the free learner parameters in ``values``."""
        return np.array([math.log(values[p]) if log else float(values[p])
                         for p, log in zip(self.learner_names, self.learner_log)])

    def learner_values(self, theta: np.ndarray) -> dict[str, float]:
        """Return every tunable learner value, the free ones from coordinates ``theta``."""
        free = np.where(self.learner_log, np.exp(theta), theta) if len(theta) else ()
        values = {p: self.held[p] for p in self.spec.tunable if p in self.held}
        values.update(zip(self.learner_names, map(float, free)))
        return values

    def log_pred(self, i: int, theta: np.ndarray) -> np.ndarray:
        """Return participant i's learner log predictions (n_trials, m) at ``theta``, restarting each session."""
        key = (i, tuple(np.asarray(theta, dtype=float).tolist()))
        if key not in self.cache:
            learner = self.spec.learner(**self.learner_values(theta))
            log_pred = np.concatenate([learner.log_next_proba(x, self.m) for x in self.parts[i].sessions])
            self.cache[key] = np.maximum(log_pred, _LOG_TINY)
        return self.cache[key]

    def batch(self, keys: Sequence[tuple[int, np.ndarray]], trials: Sequence[np.ndarray]) -> Batch:
        """Return the Batch whose row r is trials[r] of participant keys[r][0] at learner coordinates keys[r][1]."""
        slots: dict[tuple, int] = {}
        stacks, guesses, offsets, size = [], [], [], 0
        for i, theta in keys:
            key = (i, tuple(np.asarray(theta, dtype=float).tolist()))
            if key not in slots:
                slots[key] = size
                lp = self.log_pred(i, theta)
                stacks.append(lp)
                guesses.append(self.parts[i].guess)
                size += len(lp)
            offsets.append(slots[key])
        ptr = np.zeros(len(trials) + 1, dtype=np.int64)
        np.cumsum([len(t) for t in trials], out=ptr[1:])
        idx = np.concatenate([t + o for t, o in zip(trials, offsets)]) if len(trials) else np.empty(0, np.int64)
        return Batch(np.concatenate(stacks) if stacks else np.empty((0, self.m)),
                     np.concatenate(guesses) if guesses else np.empty(0, np.int64), ptr, idx.astype(np.int64))

    def forget(self, keep: set[tuple] | None = None, participant: int | None = None) -> None:
        """Drop cached predictions not in ``keep`` (of ``participant`` only, when given)."""
        for key in [k for k in self.cache if (participant is None or k[0] == participant)
                    and (keep is None or k not in keep)]:
            del self.cache[key]


# -- the rows of fits and their solution ------------------------------------------------------
@dataclass
class _Rows:
    """Fits of one model for a batch of participants: who, which trials, and the best point so far."""

    part: np.ndarray
    kind: np.ndarray
    unit: np.ndarray
    trials: list[np.ndarray]
    z: np.ndarray  # choice coordinates (R, 2)
    theta: np.ndarray  # learner coordinates (R, d)
    nll: np.ndarray
    converged: np.ndarray
    message: list[str]


def _solve(model: _Model, keys, trials, starts: Sequence[np.ndarray]):
    """Return the best of Newton runs from every start of every row: z, nll, converged, message."""
    owner = np.repeat(np.arange(len(trials)), [len(s) for s in starts])
    z0 = np.concatenate(starts) if starts else np.empty((0, 2))
    batch = model.batch(keys, trials)
    res = newton(batch, model.space, z0, owner)
    order = np.lexsort((np.where(np.isfinite(res.nll), res.nll, np.inf), owner))
    first = order[np.r_[True, owner[order][1:] != owner[order][:-1]]] if len(order) else order
    messages = [f"projected Newton: {'converged' if res.converged[k] else 'stopped'} after "
                f"{res.iterations[k]} iterations (projected gradient {res.pgrad[k]:.1e})" for k in first]
    return res.z[first], res.nll[first], res.converged[first], messages


def _grid(low: float, high: float, size: int, nested: float) -> np.ndarray:
    """Return the grid of one learner coordinate on [low, high], with the nested model's value.

    Evenly spaced, except from a lower bound of 0 (the leak): geometrically
    spaced above 0, since a leak's effect (a memory of about 1/leak trials)
    changes fastest near 0.
    """
    points = (np.r_[0.0, np.geomspace(high / 200, high, size - 1)] if low == 0.0 and high > 0.0
              else np.linspace(low, high, size))
    return np.unique(np.r_[points, nested])


def _search(grids: Sequence[np.ndarray], on_grid: bool, low: np.ndarray, high: np.ndarray,
            theta0: np.ndarray, f0: float,
            extra: Sequence[np.ndarray]) -> Generator[tuple[np.ndarray, bool], float, bool]:
    """Yield (learner coordinates, whether on the grid) to evaluate, receive the profile nll; return whether it converged.

    Every point of ``extra`` and, when ``on_grid``, of the product grid (else
    a local search from the best of theta0 and ``extra``); then, from the
    best point (and, with two or more coordinates, from each of the next
    _LOCAL_STARTS best local minima of the grid, so that a second basin is
    explored too), Brent's method (:func:`foretell.fitting.optimise.brent`) along each
    coordinate in turn between the grid points around the current point,
    until a cycle gains less than _CYCLE_GAIN.
    """
    best_t, best_f = np.array(theta0, dtype=float), f0
    for theta in extra:
        f = yield np.array(theta, dtype=float), False
        if f < best_f:
            best_t, best_f = np.array(theta, dtype=float), f
    shape = tuple(len(g) for g in grids)
    values = np.full(shape, np.inf)
    for index in np.ndindex(*shape) if on_grid else ():
        theta = np.array([g[i] for g, i in zip(grids, index)])
        values[index] = f = f0 if np.array_equal(theta, theta0) else (yield theta, True)
        if f < best_f:
            best_t, best_f = theta, f
    starts = [(best_t, best_f)]
    if on_grid and len(shape) > 1:
        starts += [(np.array([g[i] for g, i in zip(grids, index)]), float(values[index]))
                   for index in _grid_minima(values)[:_LOCAL_STARTS]]
    result = None
    for theta, f in starts:
        if result is not None and np.array_equal(theta, result[0]):
            continue
        found = yield from _coordinate_search(theta, f, grids, low, high)
        if result is None or found[1] < result[1]:
            result = found
    return result[2]


def _grid_minima(values: np.ndarray) -> list[tuple[int, ...]]:
    """Return the grid indices of strict local minima of ``values`` (axis neighbours), best first, the best one left out."""
    finite = np.where(np.isfinite(values), values, np.inf)
    minima = []
    for index in np.ndindex(*values.shape):
        neighbours = [finite[index[:d] + (index[d] + s,) + index[d + 1:]]
                      for d in range(values.ndim) for s in (-1, 1) if 0 <= index[d] + s < values.shape[d]]
        if np.isfinite(finite[index]) and all(finite[index] < v for v in neighbours):
            minima.append(index)
    minima.sort(key=lambda i: finite[i])
    return minima[1:]


def _bracket(grid: np.ndarray, x: float, low: float, high: float) -> tuple[float, float]:
    """Return the grid points on either side of x (the bounds beyond the grid's ends)."""
    below, above = grid[grid < x - _XTOL], grid[grid > x + _XTOL]
    return (float(below[-1]) if len(below) else low), (float(above[0]) if len(above) else high)


def _coordinate_search(theta: np.ndarray, f: float, grids: Sequence[np.ndarray], low: np.ndarray,
                       high: np.ndarray) -> Generator[tuple[np.ndarray, bool], float, tuple[np.ndarray, float, bool]]:
    """Yield points; return (theta, f, converged) of Brent's method along each coordinate in turn from theta.

    Each line search runs between the grid points around the current value;
    with one coordinate, a minimum found at the end of that bracket (not at
    a bound) starts another line search around it.
    """
    best_t, best_f = np.array(theta, dtype=float), f
    for _ in range(_MAX_CYCLES):
        before, ok, edge = best_f, True, False
        for d, grid in enumerate(grids):
            a, b = _bracket(grid, best_t[d], low[d], high[d])
            line = brent(a, b, best_t[d], best_f, xtol=_XTOL)
            try:
                u = next(line)
                while True:
                    point = best_t.copy()
                    point[d] = u
                    u = line.send((yield point, False))
            except StopIteration as stop:
                x, fx, found = stop.value
            ok = ok and found
            if fx < best_f:
                best_t[d], best_f = x, fx
                edge = (x - a <= 3 * _XTOL and a > low[d]) or (b - x <= 3 * _XTOL and b < high[d])
        if (len(grids) == 1 and not edge) or before - best_f <= _CYCLE_GAIN:
            return best_t, best_f, ok
    return best_t, best_f, False


def _learner_search(model: _Model, rows: _Rows, select: np.ndarray, extra: Mapping[int, np.ndarray]) -> None:
    """Move the rows ``select`` to the best learner parameters on the profile likelihood (in place).

    Rows with an ``extra`` point (the leave-one-block-out folds: most of the
    whole session's trials) search locally from it; the others search the
    grid too. All searches advance together: each round evaluates every
    pending point (learner predictions, computed once per participant and
    point, then Newton on inv_temp and lapse from the row's best point so far,
    and, for block refits on the grid, also from it with each choice
    parameter at each bound and from the usual start, to _SEARCH_GTOL) in one batch; each row's best point is then polished to GTOL.
    """
    size = _GRID.get(len(model.learner_names), 4)
    grids = [_grid(lo, hi, size, nested) for (lo, hi), nested in zip(model.learner_bounds, model.theta0)]
    lo, hi = model.learner_bounds.T

    def block_starts(z: np.ndarray) -> np.ndarray:  # a block's few trials: the choice likelihood's modes
        return np.r_[model.space.extremes(z), model.space.start()[None]]

    searches, pending, found = {}, {}, {}
    for r in select:
        local = rows.kind[r] == FOLD and r in extra
        gen = _search(grids, not local, lo, hi, rows.theta[r], rows.nll[r], [extra[r]] if r in extra else [])
        searches[r], pending[r] = gen, next(gen)
    while pending:
        todo = np.array(list(pending))
        keys = [(rows.part[r], pending[r][0]) for r in todo]
        batch = model.batch(keys, [rows.trials[r] for r in todo])
        starts = [np.r_[rows.z[r][None], block_starts(rows.z[r]) if rows.kind[r] == BLOCK and pending[r][1]
                        else np.empty((0, 2))] for r in todo]
        owner = np.repeat(np.arange(len(todo)), [len(s) for s in starts])
        res = newton(batch, model.space, np.concatenate(starts), owner, gtol=_SEARCH_GTOL)
        f_all = np.where(np.isfinite(res.nll), res.nll, np.inf)
        order = np.lexsort((f_all, owner))
        first = order[np.r_[True, owner[order][1:] != owner[order][:-1]]]
        f, z = f_all[first], res.z[first]
        model.forget({(rows.part[r], tuple(rows.theta[r].tolist())) for r in select})
        for k, r in enumerate(todo):
            if f[k] < rows.nll[r]:
                rows.theta[r], rows.z[r], rows.nll[r] = pending[r][0], z[k], f[k]
            try:
                pending[r] = searches[r].send(float(f[k]))
            except StopIteration as stop:
                found[r] = bool(stop.value)
                del pending[r]
    batch = model.batch([(rows.part[r], rows.theta[r]) for r in select], [rows.trials[r] for r in select])
    res = newton(batch, model.space, rows.z[select])
    better = res.nll <= rows.nll[select]
    rows.z[select[better]], rows.nll[select[better]] = res.z[better], res.nll[better]
    for k, r in enumerate(select):
        rows.converged[r] = bool(res.converged[k]) and found[r]
        rows.message[r] += ("; learner parameters: profile search "
                            + ("converged" if found[r] else "did not settle"))


def _row_nll(model: _Model, r: int, rows: _Rows, vector: np.ndarray) -> float:
    """Return the negative ln L of row r at a full coordinate vector (free choice coordinates, then learner)."""
    free = np.array(model.space.free)
    z = np.zeros(2)
    z[free] = vector[:free.sum()]
    theta = np.asarray(vector[free.sum():], dtype=float)
    batch = model.batch([(rows.part[r], theta)], [rows.trials[r]])
    return float(batch.nll(model.space, np.array([0]), z[None], derivatives=False)[0])


def _full_vector(model: _Model, rows: _Rows, r: int) -> np.ndarray:
    """Return row r's free coordinates as one vector (choice, then learner)."""
    return np.r_[rows.z[r][np.array(model.space.free)], rows.theta[r]]


def _bounds(model: _Model) -> np.ndarray:
    """Return (k, 2) bounds of the full coordinate vector."""
    return np.r_[model.space.bounds[np.array(model.space.free)], model.learner_bounds].reshape(-1, 2)


def _fallback(model: _Model, rows: _Rows, r: int) -> None:
    """Continue row r with bounded Nelder-Mead on every free coordinate (in place)."""
    free = np.array(model.space.free)
    vector = _full_vector(model, rows, r)
    res = minimize(lambda v: _row_nll(model, r, rows, v), vector, method="Nelder-Mead",
                   bounds=[tuple(b) for b in _bounds(model)],
                   options={"xatol": 1e-6, "fatol": 1e-9, "maxfev": 400 * len(vector)})
    rows.message[r] += f"; Nelder-Mead: {res.message}"
    rows.converged[r] = bool(res.success)
    if res.fun <= rows.nll[r]:
        rows.z[r][free] = res.x[:free.sum()]
        rows.theta[r] = res.x[free.sum():]
        rows.nll[r] = float(res.fun)
    model.forget({(rows.part[r], tuple(rows.theta[r].tolist()))}, rows.part[r])


def _solve_rows(model: _Model, rows: _Rows, select: np.ndarray, starts: Sequence[np.ndarray],
                extra: Mapping[int, np.ndarray]) -> None:
    """Fit rows ``select``: Newton at the nested learner values, learner search, Nelder-Mead when needed."""
    fit = [r for r, s in zip(select, starts) if len(rows.trials[r])]
    fit_starts = [s for r, s in zip(select, starts) if len(rows.trials[r])]
    for r in select:
        if not len(rows.trials[r]):
            rows.message[r] = "no scored trials: nothing fitted"
    if not fit:
        return
    fit = np.array(fit)
    if not model.names:
        keys = [(rows.part[r], rows.theta[r]) for r in fit]
        batch = model.batch(keys, [rows.trials[r] for r in fit])
        rows.nll[fit] = batch.nll(model.space, np.arange(len(fit)), rows.z[fit], derivatives=False)
        rows.converged[fit] = True
        for r in fit:
            rows.message[r] = "no free parameter"
        return
    keys = [(rows.part[r], rows.theta[r]) for r in fit]
    z, f, ok, messages = _solve(model, keys, [rows.trials[r] for r in fit], fit_starts)
    rows.z[fit], rows.nll[fit], rows.converged[fit] = z, np.where(np.isfinite(f), f, np.inf), ok
    for r, message in zip(fit, messages):
        rows.message[r] = message
    if model.learner_names:
        _learner_search(model, rows, fit, extra)
    for r in fit:  # two learner parameters trade off along ridges the coordinate search crosses slowly
        if not rows.converged[r] or len(model.learner_names) > 1:
            _fallback(model, rows, r)


# -- one model for a batch of participants ------------------------------------------------------
def _fit_model(j: int, spec: ModelSpec, parts: Sequence[_Participant], options: FitOptions,
               symbols: Sequence[str]) -> tuple[list[dict], list[dict], np.ndarray]:
    """Return the fit rows, block rows and the prediction values of model j for every participant."""
    model = _Model(spec, dict(options.fixed), parts, symbols)
    space, n_starts = model.space, options.n_starts
    part, kind, unit, starts = [], [], [], []
    rngs = [np.random.default_rng(p.seeds[j]) for p in parts]
    for i, p in enumerate(parts):
        part.append(i), kind.append(FULL), unit.append(-1)
        starts.append(np.r_[space.start()[None], space.extremes(space.start()), space.random(rngs[i], n_starts - 1)])
        for u in range(p.n_units):
            if options.cv and p.n_units > 1:
                part.append(i), kind.append(FOLD), unit.append(u)
                starts.append(None)
            if options.per_block:
                part.append(i), kind.append(BLOCK), unit.append(u)
                starts.append(space.random(rngs[i], n_starts - 1))
    part, kind, unit = np.array(part), np.array(kind), np.array(unit)
    n = len(part)
    z0 = space.to_z(np.array(model.space.held))
    rows = _Rows(part, kind, unit, [parts[i].trials(k, u) for i, k, u in zip(part, kind, unit)],
                 np.tile(z0, (n, 1)), np.tile(model.theta0, (n, 1)), np.full(n, np.inf),
                 np.zeros(n, dtype=bool), [""] * n)
    full = np.flatnonzero(kind == FULL)
    _solve_rows(model, rows, full, [starts[r] for r in full], {})
    best = dict(zip(part[full], full))
    rest = np.flatnonzero(kind != FULL)
    rest_starts = [np.concatenate([rows.z[best[part[r]]][None]] + ([] if starts[r] is None else
                                  [space.extremes(rows.z[best[part[r]]]), space.start()[None], starts[r]]))
                   for r in rest]
    _solve_rows(model, rows, rest, rest_starts, {r: rows.theta[best[part[r]]] for r in rest})
    return _tables(model, rows, best, options)


def _logliks(model: _Model, rows: _Rows, pairs: Sequence[tuple[int, np.ndarray]]) -> np.ndarray:
    """Return the log-likelihood of each (row r, trials) pair at row r's parameters, in one batch (NaN when r is unfitted)."""
    if not pairs:
        return np.empty(0)
    which = np.array([r for r, _ in pairs])
    batch = model.batch([(rows.part[r], rows.theta[r]) for r in which], [t for _, t in pairs])
    out = -batch.nll(model.space, np.arange(len(which)), rows.z[which], derivatives=False)
    return np.where(np.isfinite(rows.nll[which]), out, math.nan)


def _values(model: _Model, rows: _Rows, r: int) -> dict[str, float]:
    """Return every parameter value of row r (NaN for the free ones when nothing was fitted)."""
    choice = model.space.values(rows.z[r])
    values = {**model.learner_values(rows.theta[r]), **dict(zip(CHOICE_PARAMS, map(float, choice)))}
    if not np.isfinite(rows.nll[r]):
        values.update(dict.fromkeys(model.names, math.nan))
    return values


def _at_bound(model: _Model, rows: _Rows, r: int) -> str:
    """Return the names of row r's free parameters within BOUND_TOL of a fit bound, ';'-joined."""
    choice = model.space.at_bound(rows.z[r])
    lo, hi = model.learner_bounds.T
    learner = (rows.theta[r] - lo <= BOUND_TOL) | (hi - rows.theta[r] <= BOUND_TOL)
    flags = dict(zip(CHOICE_PARAMS, choice)) | dict(zip(model.learner_names, learner))
    return ";".join(p for p in model.names if flags[p])


def _correlations(model: _Model, rows: _Rows, r: int) -> dict[str, float]:
    """Return corr_<a>_<b> of row r's estimates from the inverse Hessian of the negative log-likelihood.

    Cov = H^-1 (observed information, common practice). Without free learner
    parameters H is the analytic Hessian in inv_temp and lapse coordinates;
    otherwise the central difference of the gradient (analytic in the choice
    coordinates, central differences in the learner ones; one-sided at a
    bound). Optimiser coordinates are per-parameter monotone transforms, so
    these are the parameters' correlations to first order (delta method).
    NaN when H is not positive definite or, scaled to unit diagonal, is ill conditioned.
    """
    k = len(model.names)
    if k < 2:
        return {}
    free = np.array(model.space.free)
    if model.learner_names:
        vector, bounds = _full_vector(model, rows, r), _bounds(model)
        hess = np.empty((k, k))
        for i in range(k):
            up, down = min(vector[i] + _HESS_STEP, bounds[i, 1]), max(vector[i] - _HESS_STEP, bounds[i, 0])
            hess[:, i] = (_gradient(model, rows, r, _moved(vector, i, up), bounds)
                          - _gradient(model, rows, r, _moved(vector, i, down), bounds)) / (up - down)
        hess = 0.5 * (hess + hess.T)
    else:
        batch = model.batch([(rows.part[r], rows.theta[r])], [rows.trials[r]])
        hess = batch.nll(model.space, np.array([0]), rows.z[r][None])[2][0][np.ix_(free, free)]
    pairs = list(combinations(range(k), 2))
    names = [f"corr_{model.names[i]}_{model.names[j]}" for i, j in pairs]
    try:
        np.linalg.cholesky(hess)
        scale = 1.0 / np.sqrt(np.diag(hess))  # correlations do not depend on the coordinates' units
        if np.linalg.cond(hess * scale[:, None] * scale[None, :]) > _MAX_COND:
            raise np.linalg.LinAlgError
    except np.linalg.LinAlgError:
        return dict.fromkeys(names, math.nan)
    cov = np.linalg.inv(hess)
    sd = np.sqrt(np.diag(cov))
    return {name: float(cov[i, j] / (sd[i] * sd[j])) for name, (i, j) in zip(names, pairs)}


def _gradient(model: _Model, rows: _Rows, r: int, vector: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """Return the gradient of row r's negative ln L at a full coordinate vector.

    Choice coordinates analytic (:meth:`Batch.nll`), learner coordinates by
    central differences (one-sided at a bound).
    """
    free = np.array(model.space.free)
    n_choice = int(free.sum())
    z = np.zeros(2)
    z[free] = vector[:n_choice]
    batch = model.batch([(rows.part[r], vector[n_choice:])], [rows.trials[r]])
    f, grad, _ = batch.nll(model.space, np.array([0]), z[None])
    out = np.empty(len(vector))
    out[:n_choice] = grad[0][free]
    for i in range(n_choice, len(vector)):
        up, down = min(vector[i] + _FD_STEP, bounds[i, 1]), max(vector[i] - _FD_STEP, bounds[i, 0])
        f_up = _row_nll(model, r, rows, _moved(vector, i, up)) if up > vector[i] else f[0]
        f_down = _row_nll(model, r, rows, _moved(vector, i, down)) if down < vector[i] else f[0]
        out[i] = (f_up - f_down) / (up - down)
    return out


def _moved(vector: np.ndarray, i: int, value: float) -> np.ndarray:
    """Return a copy of ``vector`` with coordinate i set to ``value``."""
    out = np.array(vector, dtype=float)
    out[i] = value
    return out


def _tables(model: _Model, rows: _Rows, best: Mapping[int, int],
            options: FitOptions) -> tuple[list[dict], list[dict], np.ndarray]:
    """Return the fit rows, block rows and the prediction values of one model from its solved rows."""
    spec, k = model.spec, len(model.names)
    held_pairs, session_pairs = [], []
    for q in range(len(rows.part)):
        p = model.parts[rows.part[q]]
        if rows.kind[q] == FOLD and len(rows.trials[q]):
            held_pairs.append((q, p.trials(BLOCK, rows.unit[q])))
        elif rows.kind[q] == BLOCK:
            session_pairs.append((best[rows.part[q]], p.trials(BLOCK, rows.unit[q])))
    held_ll = dict(zip((q for q, _ in held_pairs), _logliks(model, rows, held_pairs)))
    session_ll = iter(_logliks(model, rows, session_pairs))
    fit_rows, block_rows = [], []
    for i, p in enumerate(model.parts):
        r = best[i]
        n = len(p.scored)
        values = _values(model, rows, r)
        loglik = -rows.nll[r]
        mine = np.flatnonzero(rows.part == i)
        folds = {rows.unit[q]: q for q in mine if rows.kind[q] == FOLD}
        blocks = {rows.unit[q]: q for q in mine if rows.kind[q] == BLOCK}
        held_out = {u: held_ll.get(q, math.nan) for u, q in folds.items()}
        fold_ok = {u: bool(rows.converged[q]) for u, q in folds.items()}
        fit_rows.append({
            "participant": p.participant, "group": p.group, "model": spec.model_id, "loglik": loglik,
            "n_params": k, "n_trials": n, "aic": 2 * k - 2 * loglik, "bic": k * math.log(n) - 2 * loglik,
            "cv_loglik": sum(held_out.values()) if folds else math.nan,
            **{q: values.get(q, math.nan) for q in _PARAM_ORDER},
            "converged": bool(rows.converged[r]), "cv_converged": all(fold_ok.values()) if folds else None,
            "at_bound": _at_bound(model, rows, r), "message": rows.message[r], "depth": spec.depth,
            **_correlations(model, rows, r)})
        for u, q in sorted(blocks.items()):  # in unit order, as session_pairs were made
            n_block = len(rows.trials[q])
            block_values = _values(model, rows, q)
            fitted = bool(n_block)
            loglik_block = -rows.nll[q] if fitted else math.nan
            block_rows.append({
                "participant": p.participant, "group": p.group,
                "session": p.unit_labels[u][0], "block": p.unit_labels[u][1],
                "model": spec.model_id, "n_trials": n_block, "n_params": k,
                "loglik_session": float(next(session_ll)), "loglik_block": loglik_block,
                "bic_block": k * math.log(n_block) - 2 * loglik_block if fitted else math.nan,
                "cv_loglik_block": held_out.get(u, math.nan),
                **{f"{q_}_block": block_values.get(q_, math.nan) if fitted else math.nan
                   for q_ in _PARAM_ORDER},
                "converged": bool(rows.converged[q]), "cv_converged": fold_ok.get(u),
                "message": rows.message[q]})
    return fit_rows, block_rows, _prediction_values(model, rows, best)


def _prediction_values(model: _Model, rows: _Rows, best: Mapping[int, int]) -> np.ndarray:
    """Return (trials of the batch, m + 1): each trial's prediction and guess probability (NaN when missed).

    At every participant's whole-session estimate; participants one after another, in batch order.
    """
    out = np.empty((sum(len(p.guess) for p in model.parts), len(model.symbols) + 1))
    at = 0
    for i, p in enumerate(model.parts):
        r = best[i]
        values = _values(model, rows, r)
        log_pred = model.log_pred(i, rows.theta[r])
        made = np.flatnonzero(p.guess >= 0)
        here = out[at: at + len(p.guess)]
        here[:, :-1] = np.exp(log_pred)
        here[:, -1] = math.nan
        here[made, -1] = np.exp(choice_terms(log_pred[made], p.guess[made], values["inv_temp"],
                                             values["lapse"])[0])
        at += len(p.guess)
        model.forget(participant=i)
    return out


def _fit_chunk(parts: Sequence[_Participant], specs: Sequence[ModelSpec], options: FitOptions,
               symbols: Sequence[str]) -> tuple[list[dict], list[dict], list[np.ndarray]]:
    """Return every model's fit rows, block rows and prediction values for a batch of participants."""
    fits, blocks, values = [], [], []
    for j, spec in enumerate(specs):
        f, b, v = _fit_model(j, spec, parts, options, symbols)
        fits += f
        blocks += b
        values.append(v)
    return fits, blocks, values


class _Predictions:
    """The per-trial predictions table, filled batch by batch into arrays of its final size.

    Rows: participant, then model, then the participant's trials (the order of
    the other tables). Holding only the final arrays, and each batch's values
    until they are copied in, keeps the peak memory of a large study near the
    size of the table itself.
    """

    def __init__(self, parts: Sequence[_Participant], specs: Sequence[ModelSpec], symbols: Sequence[str]):
        self.parts, self.specs, self.symbols = parts, specs, tuple(symbols)
        self.sizes = np.array([len(p.guess) for p in parts], dtype=np.int64)
        self.first = np.r_[0, np.cumsum(self.sizes * len(specs))[:-1]]  # first row of each participant
        self.values = np.empty((int(self.sizes.sum()) * len(specs), len(self.symbols) + 1))

    def add(self, start: int, values: Sequence[np.ndarray]) -> None:
        """Copy in a batch's values (one array per model) whose participants begin at ``parts[start]``."""
        at = 0
        i = start
        while at < len(values[0]):
            n = int(self.sizes[i])
            for j, v in enumerate(values):
                row = self.first[i] + j * n
                self.values[row: row + n] = v[at: at + n]
            at += n
            i += 1

    def frame(self) -> pd.DataFrame:
        """Return the table (see :class:`FitTables`); it shares the value arrays (no copy)."""
        n_models = len(self.specs)
        reps = self.sizes * n_models

        def per_participant(values: Sequence[object]) -> pd.Categorical:  # labels as categoricals
            labels = pd.Categorical(values)
            return pd.Categorical.from_codes(np.repeat(labels.codes, reps), labels.categories)

        def tiled(column: str) -> np.ndarray:
            return np.concatenate([np.tile(p.keys[column].to_numpy(), n_models) for p in self.parts])

        def scored(p: _Participant) -> np.ndarray:
            mask = np.zeros(len(p.guess), dtype=bool)
            mask[p.scored] = True
            return np.tile(mask, n_models)

        columns = {"participant": per_participant([p.participant for p in self.parts]),
                   "group": per_participant([p.group for p in self.parts]),
                   **{c: tiled(c) for c in ("session", "block", "trial")},
                   "model": pd.Categorical.from_codes(
                       np.concatenate([np.repeat(np.arange(n_models), n) for n in self.sizes]),
                       [s.model_id for s in self.specs]),
                   **{f"p_{s}": self.values[:, k] for k, s in enumerate(self.symbols)},
                   "guess_prob": self.values[:, -1],
                   "scored": np.concatenate([scored(p) for p in self.parts])}
        return pd.DataFrame(columns, copy=False)


# -- public entry points ---------------------------------------------------------------------
def fit_participant(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None,
                    **options) -> FitTables:
    """Return the fit tables of a validated log holding one participant; options as :func:`fit_participants`."""
    if log.frame["participant"].nunique() != 1:
        raise UsageError("fit_participant takes one participant's trials; use fit_participants")
    return fit_participants(log, task, models, **options)


def fit_participants(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None, *,
                     free: Iterable[str] = (), fixed: Mapping[str, float] | None = None,
                     n_starts: int = 3, cv: bool = True, per_block: bool = True,
                     warmup: int | None = None, seed: int = 0, n_jobs: int = 1,
                     progress: bool | None = None) -> FitTables:
    """Return the fit tables (see :class:`FitTables`) of every participant of a validated log.

    ``models`` are identifiers or specs (default
    :func:`foretell.models.default_models`); ``free`` frees learner parameters
    (leak, alpha) in every model that has them; ``fixed`` holds parameters;
    ``n_starts`` starts per whole-session fit; ``cv`` adds leave-one-block-out
    cross-validation, ``per_block`` the block refits; ``warmup`` overrides K.
    AIC = 2k - 2 ln L (Akaike, 1974) and BIC = k ln n - 2 ln L (Schwarz, 1978),
    k = free parameters, n = scored trials. Participant i (sorted order) draws
    its random starts from the i-th child of ``numpy.random.SeedSequence(seed)``
    (one grandchild per model), and participants are solved in batches fixed
    by the data alone, so the tables do not depend on ``n_jobs`` (joblib
    workers). ``progress`` draws a bar on stderr (None: when stderr is a
    terminal). Participants with nothing to score are listed in ``excluded``;
    LogError when nobody has a scored trial.
    """
    if not isinstance(log, ValidatedLog):
        raise UsageError("fit_participants takes a validated log (foretell.logs.load_log or validate_log)")
    options = FitOptions.make(free=free, fixed=fixed, n_starts=n_starts, cv=cv,
                              per_block=per_block, warmup=warmup)
    if int(n_jobs) == 0:
        raise UsageError("n_jobs must be a positive count or negative (-1: all cores); got 0")
    specs = model_specs(models, task, options.free)
    warm = max(s.depth for s in specs) if options.warmup is None else options.warmup
    split = _split(log.frame, warm)
    seeds = np.random.SeedSequence(seed).spawn(len(split))
    lost = unscorable(log, warm)
    group_of = {pid: group for pid, group, _, _ in split}
    excluded = pd.DataFrame({"participant": lost["participant"],
                             "group": [group_of[pid] for pid in lost["participant"]],
                             "reason": lost["reason"]})
    out = set(lost["participant"])
    parts = [_participant(pid, group, data, scored, ss.spawn(len(specs)))
             for (pid, group, data, scored), ss in zip(split, seeds) if pid not in out]
    if not parts:
        raise LogError(f"no participant has a scored trial (warm-up {warm} trials per session, "
                       "missed guesses unscored): nothing to fit", path=log.source)
    workers = job_count(n_jobs)
    chunks = [parts[a:b] for a, b in batches([len(p.guess) for p in parts], workers, _CHUNK_TRIALS)]
    show = sys.stderr.isatty() if progress is None else bool(progress)
    jobs = (delayed(_fit_chunk)(chunk, specs, options, task.symbols) for chunk in chunks)
    fit_rows, block_rows, predictions = [], [], _Predictions(parts, specs, task.symbols)
    with workers_stopped(n_jobs):
        with Parallel(n_jobs=workers, return_as="generator") as parallel, \
                tqdm(total=len(parts), disable=not show, unit="participant", desc="fitting",
                     file=sys.stderr) as bar:
            start = 0
            for chunk, (f, b, values) in zip(chunks, parallel(jobs)):
                fit_rows += f
                block_rows += b
                predictions.add(start, values)  # copied in as it comes (peak memory)
                start += len(chunk)
                bar.update(len(chunk))
    return _assemble(fit_rows, block_rows, predictions.frame(), specs, options, excluded)


def _assemble(fit_rows: list[dict], block_rows: list[dict], predictions: pd.DataFrame,
              specs: Sequence[ModelSpec], options: FitOptions, excluded: pd.DataFrame) -> FitTables:
    """Return the FitTables of the batches' rows, ordered participant, model (, block)."""
    fixed = dict(options.fixed)
    used = [p for p in LEARNER_PARAMS if p in fixed or any(p in s.free for s in specs)]
    free_sets = [tuple(p for p in s.free if p not in fixed) for s in specs]
    corr = [f"corr_{a}_{b}" for a, b in combinations(_PARAM_ORDER, 2)
            if any(a in f and b in f for f in free_sets)]
    fit_columns = (["participant", "group", "model", "loglik", "n_params", "n_trials", "aic", "bic",
                    "cv_loglik", "inv_temp", "lapse"] + used
                   + ["converged", "cv_converged", "at_bound", "message", "depth"] + corr)
    block_params = [f"{p}_block" for p in _PARAM_ORDER if any(p in f for f in free_sets)]
    block_columns = (["participant", "group", "session", "block", "model", "n_trials", "n_params",
                      "loglik_session", "loglik_block", "bic_block", "cv_loglik_block"] + block_params
                     + ["converged", "cv_converged", "message"])
    order = {s.model_id: j for j, s in enumerate(specs)}

    def ordered(rows: list[dict], columns: list[str]) -> pd.DataFrame:  # participant, then model
        frame = pd.DataFrame(rows).reindex(columns=columns)
        if frame.empty:
            return frame
        first = {pid: i for i, pid in enumerate(pd.unique(frame["participant"]))}
        rank = np.lexsort([frame["model"].map(order).to_numpy(), frame["participant"].map(first).to_numpy()])
        return frame.iloc[rank].reset_index(drop=True)

    return FitTables(ordered(fit_rows, fit_columns), ordered(block_rows, block_columns), predictions,
                     excluded.reset_index(drop=True))
