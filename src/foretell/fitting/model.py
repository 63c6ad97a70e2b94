"""One model for a batch of participants: its parameter space, cached learner predictions and fit rows."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from foretell.fitting.optimise import Batch, ChoiceSpace
from foretell.fitting.trials import Participant
from foretell.models import ModelSpec
from foretell.params import CHOICE_PARAMS, LEARNER_PARAMS, PARAMS

LOG_TINY = math.log(1e-300)
"""Floor of log predictions (zero probabilities), as in :mod:`foretell.choice`."""


class Model:
    """One model's free parameters, held values and cached learner predictions for a batch of participants.

    Parameters
    ----------
    spec : ModelSpec
        The model.
    fixed : mapping
        Parameters held at given values (they override ``spec.free``).
    parts : sequence of Participant
        The batch's participants; ``i`` below indexes them.
    symbols : sequence of str
        The task's symbols.

    Notes
    -----
    Optimiser coordinates: ``z`` (2,) for inv_temp and lapse
    (:class:`foretell.fitting.optimise.ChoiceSpace`), ``theta`` (d,) for the
    free learner parameters: the logarithm for log-scale parameters
    (:data:`foretell.params.PARAMS`), the value otherwise.
    """

    def __init__(self, spec: ModelSpec, fixed: Mapping[str, float], parts: Sequence[Participant],
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

    @property
    def bounds(self) -> np.ndarray:
        """Return (k, 2) bounds of the full coordinate vector (free choice coordinates, then learner)."""
        return np.r_[self.space.bounds[np.array(self.space.free)], self.learner_bounds].reshape(-1, 2)

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
            self.cache[key] = np.maximum(log_pred, LOG_TINY)
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


@dataclass
class Rows:
    """Fits of one model for a batch of participants: who, which trials, and the best point so far.

    Attributes
    ----------
    part, kind, unit : numpy.ndarray
        Per row: the participant (index into the batch), the kind
        (:data:`foretell.fitting.trials.FULL`, ``FOLD``, ``BLOCK``) and the
        fold's or block's unit (-1 for the whole session).
    trials : list of numpy.ndarray
        The scored trials each row fits.
    z, theta : numpy.ndarray
        The best point so far: choice coordinates (R, 2), learner coordinates (R, d).
    nll : numpy.ndarray
        Its negative log-likelihood (inf before any fit).
    converged : numpy.ndarray
    message : list of str
    """

    part: np.ndarray
    kind: np.ndarray
    unit: np.ndarray
    trials: list[np.ndarray]
    z: np.ndarray
    theta: np.ndarray
    nll: np.ndarray
    converged: np.ndarray
    message: list[str]

    def vector(self, model: Model, r: int) -> np.ndarray:
        """Return row r's free coordinates as one vector (choice, then learner)."""
        return np.r_[self.z[r][np.array(model.space.free)], self.theta[r]]

    def nll_at(self, model: Model, r: int, vector: np.ndarray) -> float:
        """Return the negative ln L of row r at a full coordinate vector (free choice coordinates, then learner)."""
        free = np.array(model.space.free)
        z = np.zeros(2)
        z[free] = vector[:free.sum()]
        theta = np.asarray(vector[free.sum():], dtype=float)
        batch = model.batch([(self.part[r], theta)], [self.trials[r]])
        return float(batch.nll(model.space, np.array([0]), z[None], derivatives=False)[0])

    def values(self, model: Model, r: int) -> dict[str, float]:
        """Return every parameter value of row r (NaN for the free ones when nothing was fitted)."""
        choice = model.space.values(self.z[r])
        values = {**model.learner_values(self.theta[r]), **dict(zip(CHOICE_PARAMS, map(float, choice)))}
        if not np.isfinite(self.nll[r]):
            values.update(dict.fromkeys(model.names, math.nan))
        return values


def best_per_owner(nll: np.ndarray, owner: np.ndarray) -> np.ndarray:
    """Return, per owner (sorted), the index of its smallest finite ``nll`` (the first when none is finite).

    Parameters
    ----------
    nll : numpy.ndarray
        Values of several starts.
    owner : numpy.ndarray
        The row each start belongs to.

    Returns
    -------
    numpy.ndarray
        One index into ``nll`` per distinct owner.
    """
    order = np.lexsort((np.where(np.isfinite(nll), nll, np.inf), owner))
    return order[np.r_[True, owner[order][1:] != owner[order][:-1]]] if len(order) else order
