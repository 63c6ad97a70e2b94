"""The search of one model's fit rows: Newton on inv_temp and lapse, the learner parameters' profile, Nelder-Mead."""

from __future__ import annotations

from collections.abc import Generator, Mapping, Sequence

import numpy as np
from scipy.optimize import minimize

from foretell.fitting.model import Model, Rows, best_per_owner
from foretell.fitting.optimise import brent, newton
from foretell.fitting.trials import BLOCK, FOLD, FULL

_GRID = {1: 9, 2: 7}  # grid points per learner parameter by their number (plus the nested value)
_LOCAL_STARTS = 2  # further grid minima searched from when two or more learner parameters are free
_XTOL = 1e-5  # Brent's tolerance on a learner coordinate
_SEARCH_GTOL = 1e-4  # Newton's projected-gradient tolerance while learner parameters move (then GTOL)
_MAX_CYCLES = 20  # coordinate cycles of the learner-parameter search
_CYCLE_GAIN = 1e-10  # a cycle gaining less (nats) ends the search


def _solve(model: Model, keys, trials, starts: Sequence[np.ndarray]):
    """Return the best of Newton runs from every start of every row: z, nll, converged, message."""
    owner = np.repeat(np.arange(len(trials)), [len(s) for s in starts])
    z0 = np.concatenate(starts) if starts else np.empty((0, 2))
    batch = model.batch(keys, trials)
    res = newton(batch, model.space, z0, owner)
    first = best_per_owner(res.nll, owner)
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


def _learner_search(model: Model, rows: Rows, select: np.ndarray, extra: Mapping[int, np.ndarray]) -> None:
    """Move the rows ``select`` to the best learner parameters on the profile likelihood (in place).

    Rows with an ``extra`` point (the leave-one-block-out folds: most of the
    whole session's trials) search locally from it; the others search the
    grid too. All searches advance together: each round evaluates every
    pending point (learner predictions, computed once per participant and
    point, then Newton on inv_temp and lapse from the row's best point so far
    and, on the grid, also from it with each choice parameter at each bound
    and from the usual start, to _SEARCH_GTOL) in one batch; each row's best
    point is then polished to GTOL. The choice likelihood can have a mode at
    a bound (inv_temp at its upper bound with a high lapse) that another
    learner value's optimum does not lead to, hence the extra starts.
    """
    size = _GRID.get(len(model.learner_names), 4)
    grids = [_grid(lo, hi, size, nested) for (lo, hi), nested in zip(model.learner_bounds, model.theta0)]
    lo, hi = model.learner_bounds.T

    def mode_starts(z: np.ndarray) -> np.ndarray:  # the choice likelihood's modes at its bounds
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
        starts = [np.r_[rows.z[r][None], mode_starts(rows.z[r]) if pending[r][1]
                        else np.empty((0, 2))] for r in todo]
        owner = np.repeat(np.arange(len(todo)), [len(s) for s in starts])
        res = newton(batch, model.space, np.concatenate(starts), owner, gtol=_SEARCH_GTOL)
        f_all = np.where(np.isfinite(res.nll), res.nll, np.inf)
        first = best_per_owner(f_all, owner)
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


def _fallback(model: Model, rows: Rows, r: int) -> None:
    """Continue row r with bounded Nelder-Mead on every free coordinate (in place)."""
    free = np.array(model.space.free)
    vector = rows.vector(model, r)
    res = minimize(lambda v: rows.nll_at(model, r, v), vector, method="Nelder-Mead",
                   bounds=[tuple(b) for b in model.bounds],
                   options={"xatol": 1e-6, "fatol": 1e-9, "maxfev": 400 * len(vector)})
    rows.message[r] += f"; Nelder-Mead: {res.message}"
    rows.converged[r] = bool(res.success)
    if res.fun <= rows.nll[r]:
        rows.z[r][free] = res.x[:free.sum()]
        rows.theta[r] = res.x[free.sum():]
        rows.nll[r] = float(res.fun)
    model.forget({(rows.part[r], tuple(rows.theta[r].tolist()))}, rows.part[r])


def _solve_rows(model: Model, rows: Rows, select: np.ndarray, starts: Sequence[np.ndarray],
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




def solve_model(model: Model, rngs: Sequence[np.random.Generator], *, n_starts: int, cv: bool,
                per_block: bool) -> tuple[Rows, dict[int, int]]:
    """Return every fit row of ``model`` for its batch of participants, solved, and each participant's session row.

    Parameters
    ----------
    model : Model
        The model and its batch of participants.
    rngs : sequence of numpy.random.Generator
        One stream per participant of the batch, for the random starts.
    n_starts : int
        Starts per whole-session fit: the usual start, each free choice
        parameter at each bound, and ``n_starts - 1`` uniform draws; block
        refits start from the session estimate, it with each parameter at each
        bound, the usual start and ``n_starts - 1`` draws.
    cv, per_block : bool
        Whether to add the leave-one-block-out folds and the block refits.

    Returns
    -------
    rows : Rows
        Whole-session rows, folds and block refits of every participant.
    best : dict
        Participant index -> the row of its whole-session fit.
    """
    space = model.space
    part, kind, unit, starts = [], [], [], []
    for i, p in enumerate(model.parts):
        part.append(i), kind.append(FULL), unit.append(-1)
        starts.append(np.r_[space.start()[None], space.extremes(space.start()), space.random(rngs[i], n_starts - 1)])
        for u in range(p.n_units):
            if cv and p.n_units > 1:
                part.append(i), kind.append(FOLD), unit.append(u)
                starts.append(None)
            if per_block:
                part.append(i), kind.append(BLOCK), unit.append(u)
                starts.append(space.random(rngs[i], n_starts - 1))
    part, kind, unit = np.array(part), np.array(kind), np.array(unit)
    n = len(part)
    z0 = space.to_z(np.array(space.held))
    rows = Rows(part, kind, unit, [model.parts[i].trials(k, u) for i, k, u in zip(part, kind, unit)],
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
    return rows, best
