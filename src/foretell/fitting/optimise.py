"""The batched optimiser of the choice rule: compiled sums (value, gradient, Hessian), projected Newton, Brent.

A *row* is one fit: a set of trials of a stack of learner log predictions,
with its own inv_temp and lapse; every row is solved on its own.
"""

from __future__ import annotations

import math
from collections.abc import Generator
from dataclasses import dataclass

import numba
import numpy as np

from foretell.params import CHOICE_PARAMS, PARAMS

GTOL = 1e-6  # projected gradient (nats per optimiser unit) at which Newton stops
FTOL = 1e-12  # a step gaining less than this share of |f| (at least 1e-12 nats) stops Newton
PGTOL = 1e-3  # projected gradient below which a fit counts as converged
MAX_ITER = 100  # Newton iterations per row
_MAX_HALVINGS = 30  # backtracking steps of the line search
_ARMIJO = 1e-4  # sufficient-decrease constant of the line search
BOUND_TOL = 1e-6  # a coordinate within this of a bound (optimiser units) is "at the bound"


@numba.njit(cache=True)
def _row(log_pred, guess, ptr, idx, r, b, lam, z, derivatives, out):  # pragma: no cover - compiled
    """Write ln L of row r at (inv_temp b, lapse lam) and, when asked, its derivatives into out[0:6]."""
    m = log_pred.shape[1]
    f = gb = gl = hbb = hbl = hll = 0.0
    for j in range(ptr[r], ptr[r + 1]):
        t = idx[j]
        g = guess[t]
        top = -np.inf
        for a in range(m):
            z[a] = b * log_pred[t, a]
            top = max(top, z[a])
        total = 0.0
        mean = 0.0
        for a in range(m):
            z[a] = math.exp(z[a] - top)
            total += z[a]
            mean += z[a] * log_pred[t, a]
        soft_g = z[g] / total  # softmax at the guess
        if lam > 0.0:  # P >= lapse / m: no underflow, plain arithmetic
            p = (1.0 - lam) * soft_g + lam / m
            logp = math.log(p)
        else:
            p = 0.0
            logp = b * log_pred[t, g] - top - math.log(total)
        f += logp
        if not derivatives:
            continue
        mean /= total
        var = 0.0
        for a in range(m):
            dev = log_pred[t, a] - mean
            var += z[a] * dev * dev
        var /= total
        share = (1.0 - lam) * soft_g / p if lam > 0.0 else 1.0  # (1 - lapse) softmax_g / P
        u = log_pred[t, g] - mean
        d_b = share * u
        gb += d_b
        hbb += share * (u * u - var) - d_b * d_b
        if lam > 0.0:
            d_l = (1.0 / m - soft_g) / p
            gl += d_l
            hll -= d_l * d_l
            hbl -= d_b / (p * m * (1.0 - lam))
    out[0] = f
    out[1] = gb
    out[2] = gl
    out[3] = hbb
    out[4] = hbl
    out[5] = hll


@numba.njit(cache=True)
def _sums(log_pred, guess, ptr, idx, rows, inv_temp, lapse, out):  # pragma: no cover - compiled
    z = np.empty(log_pred.shape[1])
    for k in range(rows.shape[0]):
        _row(log_pred, guess, ptr, idx, rows[k], inv_temp[k], lapse[k], z, True, out[k])


@numba.njit(cache=True)
def _negative(log_pred, guess, ptr, idx, r, zk, free, log_scale, held, work, sums, grad, hess):  # pragma: no cover
    """Return the negative ln L of row r at coordinates zk; fill its gradient and Hessian in z."""
    x = np.empty(2)
    for i in range(2):
        x[i] = (math.exp(zk[i]) if log_scale[i] else zk[i]) if free[i] else held[i]
    _row(log_pred, guess, ptr, idx, r, x[0], x[1], work, True, sums)
    scale = np.empty(2)
    for i in range(2):
        scale[i] = x[i] if log_scale[i] else 1.0
        if not math.isfinite(scale[i]):
            scale[i] = 0.0
    grad[0] = -sums[1] * scale[0]
    grad[1] = -sums[2] * scale[1]
    hess[0, 0] = -sums[3] * scale[0] ** 2
    hess[1, 1] = -sums[5] * scale[1] ** 2
    hess[0, 1] = hess[1, 0] = -sums[4] * scale[0] * scale[1]
    for i in range(2):
        if log_scale[i]:
            hess[i, i] += grad[i]
    for i in range(2):
        if not free[i]:
            grad[i] = 0.0
            hess[i, 0] = hess[0, i] = hess[i, 1] = hess[1, i] = 0.0
            hess[i, i] = 1.0
    return -sums[0]


@numba.njit(cache=True)
def _newton_rows(log_pred, guess, ptr, idx, rows, z, free, log_scale, held, lo, hi, max_iter,
                 max_halvings, gtol, ftol, armijo, f_out, pgrad_out, iter_out):  # pragma: no cover
    work = np.empty(log_pred.shape[1])
    sums = np.empty(6)
    grad = np.empty(2)
    hess = np.empty((2, 2))
    grad_new = np.empty(2)
    hess_new = np.empty((2, 2))
    pg = np.empty(2)
    step = np.empty(2)
    trial = np.empty(2)
    for k in range(rows.shape[0]):
        r = rows[k]
        zk = z[k]
        for i in range(2):
            zk[i] = min(max(zk[i], lo[i]), hi[i]) if free[i] else 0.0
        f = _negative(log_pred, guess, ptr, idx, r, zk, free, log_scale, held, work, sums, grad, hess)
        it = 0
        while True:
            held_any = False
            for i in range(2):
                out = (zk[i] <= lo[i] and grad[i] > 0.0) or (zk[i] >= hi[i] and grad[i] < 0.0)
                pg[i] = 0.0 if (out or not free[i]) else grad[i]
                held_any = held_any or pg[i] != grad[i] or not free[i]
            size = max(abs(pg[0]), abs(pg[1]))
            if not math.isfinite(f) or size <= gtol or it >= max_iter:
                break
            it += 1
            # direction -|H|^-1 pg (saddle-free Newton), held coordinates decoupled
            a, c = hess[0, 0], hess[1, 1]
            bb = 0.0 if held_any else hess[0, 1]
            if pg[0] == 0.0 and grad[0] != 0.0 or not free[0]:
                a = 1.0
            if pg[1] == 0.0 and grad[1] != 0.0 or not free[1]:
                c = 1.0
            half = 0.5 * (a - c)
            rad = math.sqrt(half * half + bb * bb)
            l1, l2 = 0.5 * (a + c) + rad, 0.5 * (a + c) - rad
            if bb != 0.0:
                v1x, v1y = bb, l1 - a
            elif a >= c:
                v1x, v1y = 1.0, 0.0
            else:
                v1x, v1y = 0.0, 1.0
            norm = math.sqrt(v1x * v1x + v1y * v1y)
            v1x, v1y = v1x / norm, v1y / norm
            v2x, v2y = -v1y, v1x
            top = max(max(abs(l1), abs(l2)), 1.0)
            e1 = 1.0 / max(abs(l1), 1e-10 * top)
            e2 = 1.0 / max(abs(l2), 1e-10 * top)
            c1 = (v1x * pg[0] + v1y * pg[1]) * e1
            c2 = (v2x * pg[0] + v2y * pg[1]) * e2
            step[0] = -(v1x * c1 + v2x * c2)
            step[1] = -(v1y * c1 + v2y * c2)
            for i in range(2):
                if pg[i] == 0.0:
                    step[i] = 0.0
            t = 1.0
            moved = False
            f_new = f
            for _ in range(max_halvings):
                same = True
                change = 0.0
                for i in range(2):
                    trial[i] = min(max(zk[i] + t * step[i], lo[i]), hi[i]) if free[i] else 0.0
                    same = same and trial[i] == zk[i]
                    change += (trial[i] - zk[i]) * grad[i]
                if same:
                    break
                f_new = _negative(log_pred, guess, ptr, idx, r, trial, free, log_scale, held, work, sums,
                                  grad_new, hess_new)
                if math.isfinite(f_new) and f_new <= f + armijo * min(change, 0.0):
                    moved = True
                    break
                t *= 0.5
            if not moved:
                break
            zk[0], zk[1] = trial[0], trial[1]
            gain = f - f_new
            f = f_new
            grad[:] = grad_new
            hess[:, :] = hess_new
            if gain <= ftol * max(1.0, abs(f)):
                for i in range(2):  # the projected gradient at the final point
                    out = (zk[i] <= lo[i] and grad[i] > 0.0) or (zk[i] >= hi[i] and grad[i] < 0.0)
                    pg[i] = 0.0 if (out or not free[i]) else grad[i]
                break
        f_out[k] = f
        pgrad_out[k] = max(abs(pg[0]), abs(pg[1]))
        iter_out[k] = it


def choice_sums(log_pred: np.ndarray, guess: np.ndarray, ptr: np.ndarray, idx: np.ndarray,
                rows: np.ndarray, inv_temp: np.ndarray, lapse: np.ndarray) -> np.ndarray:
    """Return (len(rows), 6): ln L, its gradient and Hessian in (inv_temp, lapse) for each row.

    Parameters
    ----------
    log_pred : numpy.ndarray
        (n, m) learner log predictions.
    guess : numpy.ndarray
        (n,) guessed symbol indices.
    ptr, idx : numpy.ndarray
        CSR layout: row r sums over trials ``idx[ptr[r]:ptr[r+1]]``.
    rows : numpy.ndarray
        The rows to sum.
    inv_temp, lapse : numpy.ndarray
        Each row's parameter values.

    Returns
    -------
    numpy.ndarray
        Columns ln L, d/d inv_temp, d/d lapse, d2/d inv_temp2,
        d2/d inv_temp d lapse, d2/d lapse2.

    Notes
    -----
    With l the log predictions, b = inv_temp, s = log_softmax(b l),
    P = (1 - lapse) e^{s_g} + lapse/m, w = (1 - lapse) e^{s_g} / P,
    u = l_g - E_pi[l] and v = Var_pi[l] (pi = softmax(b l)):
    d ln P/db = w u, d2/db2 = w (u^2 - v) - (w u)^2,
    d ln P/d lapse = (1/m - e^{s_g}) / P, d2/d lapse2 = -(d ln P/d lapse)^2,
    d2/db d lapse = -w u / (m (1 - lapse) P)
    (differentiating :func:`foretell.choice.choice_terms` once more). Lapse
    derivatives are 0 where lapse is 0.
    """
    out = np.empty((len(rows), 6))
    _sums(log_pred, guess, ptr, idx, np.asarray(rows, dtype=np.int64),
          np.asarray(inv_temp, dtype=float), np.asarray(lapse, dtype=float), out)
    return out


@dataclass(frozen=True)
class ChoiceSpace:
    """The optimiser coordinates of the choice parameters: which are free, their bounds and scale.

    z = log(value) for log-scale parameters (:data:`foretell.params.PARAMS`),
    the value otherwise.

    Attributes
    ----------
    free : (bool, bool)
        Whether inv_temp and lapse are fitted.
    held : (float, float)
        The values of the parameters that are not (NaN for free ones).
    """

    free: tuple[bool, bool]
    held: tuple[float, float]

    @classmethod
    def make(cls, free: tuple[str, ...], held: dict[str, float]) -> "ChoiceSpace":
        """Return the space with ``free`` parameter names and ``held`` values for the others."""
        return cls(tuple(p in free for p in CHOICE_PARAMS),
                   tuple(float(held.get(p, math.nan)) for p in CHOICE_PARAMS))

    @property
    def log_scale(self) -> np.ndarray:
        """Return whether each choice coordinate is a logarithm: inv_temp yes, lapse no.

        ln L is concave in lapse itself (d2/d lapse2 = -(d ln P/d lapse)^2), so
        Newton works on lapse directly; inv_temp spans orders of magnitude.
        """
        return np.array([p == "inv_temp" for p in CHOICE_PARAMS])

    @property
    def bounds(self) -> np.ndarray:
        """Return (2, 2) bounds in optimiser coordinates, one row per choice parameter."""
        return np.array([(math.log(PARAMS[p].low), math.log(PARAMS[p].high)) if log
                         else (PARAMS[p].low, PARAMS[p].high) for p, log in zip(CHOICE_PARAMS, self.log_scale)])

    def start(self) -> np.ndarray:
        """Return the usual start (each parameter's PARAMS start) in optimiser coordinates."""
        return self.to_z(np.array([PARAMS[p].start for p in CHOICE_PARAMS]))

    def to_z(self, values: np.ndarray) -> np.ndarray:
        """Return optimiser coordinates of (..., 2) parameter values (held coordinates: 0)."""
        values = np.asarray(values, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(self.log_scale, np.log(values), values)
        return np.where(self.free, z, 0.0)

    def values(self, z: np.ndarray) -> np.ndarray:
        """Return (..., 2) parameter values of coordinates z (held parameters at their values)."""
        z = np.asarray(z, dtype=float)
        return np.where(self.free, np.where(self.log_scale, np.exp(z), z), self.held)

    def random(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """Return n draws of the free coordinates, uniform on each parameter's PARAMS scale (held ones 0)."""
        free = np.array(self.free)
        lo, hi = np.array([(PARAMS[p].low, PARAMS[p].high) for p in CHOICE_PARAMS]).T
        logs = np.array([PARAMS[p].log_scale for p in CHOICE_PARAMS])
        lo, hi = np.where(logs, np.log(lo), lo), np.where(logs, np.log(hi), hi)
        draws = np.zeros((n, 2))
        draws[:, free] = rng.uniform(lo[free], hi[free], size=(n, int(free.sum())))
        values = np.where(logs, np.exp(draws), draws)
        return np.where(free, self.to_z(values), 0.0)

    def extremes(self, z: np.ndarray) -> np.ndarray:
        """Return copies of z with one free coordinate moved to one of its bounds.

        On few trials the choice likelihood can have modes at the ends of the
        ranges (guesses explained by chance: lapse high or inv_temp low; or a
        near-deterministic guesser with a high lapse), so fits start there too.

        Parameters
        ----------
        z : numpy.ndarray
            (2,) optimiser coordinates.

        Returns
        -------
        numpy.ndarray
            (2 x the free coordinates, 2).
        """
        lo, hi = self.bounds.T
        out = [np.where(np.arange(2) == i, end, z) for i in range(2) if self.free[i] for end in (lo[i], hi[i])]
        return np.array(out, dtype=float).reshape(-1, 2)

    def at_bound(self, z: np.ndarray) -> np.ndarray:
        """Return (..., 2) flags: free coordinate within BOUND_TOL of a bound."""
        lo, hi = self.bounds.T
        return np.array(self.free) & ((z - lo <= BOUND_TOL) | (hi - z <= BOUND_TOL))


@dataclass(frozen=True)
class Batch:
    """Rows of fits over a stack of learner predictions.

    Attributes
    ----------
    log_pred : numpy.ndarray
        (n, m) learner log predictions of every trial of the batch.
    guess : numpy.ndarray
        (n,) the guess of every trial.
    ptr, idx : numpy.ndarray
        CSR layout: row r owns the trials ``idx[ptr[r]:ptr[r+1]]``.
    """

    log_pred: np.ndarray
    guess: np.ndarray
    ptr: np.ndarray
    idx: np.ndarray

    def nll(self, space: ChoiceSpace, rows: np.ndarray, z: np.ndarray, derivatives: bool = True):
        """Return the negative ln L of ``rows`` at z, and its gradient and Hessian in z.

        Chain rule for a log-scale coordinate x = e^z: df/dz = x f',
        d2f/dz2 = x^2 f'' + x f', d2f/dz1dz2 = x1 x2 f_12. Held coordinates
        have gradient 0 and a unit Hessian row, so Newton leaves them alone.
        """
        x = space.values(z)
        sums = choice_sums(self.log_pred, self.guess, self.ptr, self.idx, rows, x[:, 0], x[:, 1])
        f = -sums[:, 0]
        if not derivatives:
            return f
        scale = np.where(space.log_scale, x, 1.0)
        scale = np.where(np.isfinite(scale), scale, 0.0)
        grad = -sums[:, 1:3] * scale
        hess = np.empty((len(rows), 2, 2))
        hess[:, 0, 0] = -sums[:, 3] * scale[:, 0] ** 2
        hess[:, 1, 1] = -sums[:, 5] * scale[:, 1] ** 2
        hess[:, 0, 1] = hess[:, 1, 0] = -sums[:, 4] * scale[:, 0] * scale[:, 1]
        for i in range(2):
            if space.log_scale[i]:
                hess[:, i, i] += grad[:, i]
        free = np.array(space.free)
        grad[:, ~free] = 0.0
        hess[:, ~free, :] = 0.0
        hess[:, :, ~free] = 0.0
        hess[:, ~free, ~free] = 1.0
        return f, grad, hess


@dataclass(frozen=True)
class NewtonResult:
    """The result of :func:`newton`, per row.

    Attributes
    ----------
    z : numpy.ndarray
        (R, 2) optimiser coordinates at the end.
    nll : numpy.ndarray
        Negative ln L there.
    pgrad : numpy.ndarray
        The largest projected gradient component there.
    converged : numpy.ndarray
        Finite nll and projected gradient below PGTOL.
    iterations : numpy.ndarray
    """

    z: np.ndarray
    nll: np.ndarray
    pgrad: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray


def newton(batch: Batch, space: ChoiceSpace, z0: np.ndarray, rows: np.ndarray | None = None,
           gtol: float = GTOL) -> NewtonResult:
    """Return the minimum of every row's negative ln L from starts z0 (R, 2), within the bounds.

    Parameters
    ----------
    batch : Batch
    space : ChoiceSpace
    z0 : numpy.ndarray
        (R, 2) starts.
    rows : numpy.ndarray, optional
        The batch row each start belongs to (default: start r is row r).
    gtol : float, default GTOL
        Projected gradient at which a row stops.

    Returns
    -------
    NewtonResult

    Notes
    -----
    Projected Newton (Bertsekas, 1982), one compiled loop per row: coordinates
    at a bound whose gradient points outward are held; the others take a
    Newton step with |H| (H's eigenvalues replaced by their absolute values,
    floored: saddle-free Newton, Dauphin et al., 2014), clipped to the box,
    with Armijo backtracking. A row stops when its projected gradient is below
    ``gtol``, when a step gains less than FTOL (relative), when no step decreases
    the function, or after MAX_ITER iterations; it has converged when its
    projected gradient is below PGTOL. Rows are solved independently: a row's
    result does not depend on the other rows of the batch.

    References
    ----------
    Bertsekas, D. P. (1982). Projected Newton methods for optimization problems
    with simple constraints. SIAM J. Control Optim. 20, 221-246.
    Dauphin, Y. et al. (2014). Identifying and attacking the saddle point
    problem in high-dimensional non-convex optimization. NeurIPS.
    """
    rows = np.arange(len(z0)) if rows is None else np.asarray(rows, dtype=np.int64)
    lo, hi = space.bounds.T
    z = np.array(z0, dtype=float).reshape(-1, 2)
    n = len(rows)
    f, pgrad, iterations = np.empty(n), np.empty(n), np.zeros(n, dtype=np.int64)
    _newton_rows(batch.log_pred, batch.guess, batch.ptr, batch.idx, rows.astype(np.int64), z,
                 np.array(space.free), space.log_scale, np.nan_to_num(np.array(space.held, dtype=float)),
                 lo.astype(float), hi.astype(float), int(MAX_ITER), _MAX_HALVINGS, float(gtol), FTOL, _ARMIJO,
                 f, pgrad, iterations)
    converged = np.isfinite(f) & (pgrad <= PGTOL)
    return NewtonResult(z, f, pgrad, converged, iterations)


def brent(low: float, high: float, x0: float, f0: float,
          xtol: float = 1e-7) -> Generator[float, float, tuple[float, float, bool]]:
    """Yield points to evaluate; receive their values; return (x, f(x), converged) of the minimum on [low, high].

    Written as a generator, so that many line searches advance together and
    their function values are computed in one batch.

    Parameters
    ----------
    low, high : float
        The interval.
    x0, f0 : float
        A known point and its value; the result is never worse.
    xtol : float, default 1e-7
        Absolute tolerance on x.

    Returns
    -------
    (float, float, bool)
        The generator's return value: x, f(x), and whether it converged
        within 200 steps.

    References
    ----------
    Brent, R. P. (1973). Algorithms for Minimization without Derivatives, ch. 5
    (golden section with parabolic steps).
    """
    golden = 0.5 * (3.0 - math.sqrt(5.0))
    a, b = low, high
    x = w = v = x0
    fx = fw = fv = f0
    d = e = 0.0
    for _ in range(200):
        mid = 0.5 * (a + b)
        tol1 = 1.5e-8 * abs(x) + xtol / 3.0
        tol2 = 2.0 * tol1
        if abs(x - mid) <= tol2 - 0.5 * (b - a):
            return x, fx, True
        golden_step = True
        if abs(e) > tol1:
            r = (x - w) * (fx - fv)
            q = (x - v) * (fx - fw)
            p = (x - v) * q - (x - w) * r
            q = 2.0 * (q - r)
            if q > 0.0:
                p = -p
            q = abs(q)
            r, e = e, d
            if abs(p) < abs(0.5 * q * r) and q * (a - x) < p < q * (b - x):
                d = p / q
                if (x + d - a) < tol2 or (b - x - d) < tol2:
                    d = tol1 if x < mid else -tol1
                golden_step = False
        if golden_step:
            e = (b - x) if x < mid else (a - x)
            d = golden * e
        u = min(max(x + (d if abs(d) >= tol1 else math.copysign(tol1, d)), low), high)
        fu = yield u
        if not math.isfinite(fu):
            fu = math.inf
        if fu <= fx:
            if u < x:
                b = x
            else:
                a = x
            v, fv, w, fw, x, fx = w, fw, x, fx, u, fu
        else:
            if u < x:
                a = u
            else:
                b = u
            if fu <= fw or w == x:
                v, fv, w, fw = w, fw, u, fu
            elif fu <= fv or v == x or v == w:
                v, fv = u, fu
    return x, fx, False
