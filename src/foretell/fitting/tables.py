"""The tables of fitted rows: per-participant fits, per-block refits, parameter correlations and the trial store."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np
import pandas as pd

from foretell.choice import choice_terms
from foretell.fitting.model import Model, Rows
from foretell.fitting.optimise import BOUND_TOL
from foretell.fitting.trials import BLOCK, FOLD, Participant
from foretell.models import ModelSpec
from foretell.params import CHOICE_PARAMS, LEARNER_PARAMS

PARAM_ORDER = CHOICE_PARAMS + LEARNER_PARAMS
"""The order of parameter columns in every table."""
_FD_STEP = 1e-5  # finite-difference step (optimiser coordinates) of learner parameters
_HESS_STEP = 1e-4  # finite-difference step of the gradient for the Hessian
_MAX_COND = 1e10  # Hessians worse conditioned than this give NaN correlations


@dataclass(frozen=True)
class FitTables:
    """The tidy results of fitting participants (see README, "Outputs of foretell fit").

    Attributes
    ----------
    fits : pandas.DataFrame
        One row per participant x model: participant, group, model, loglik,
        n_params, n_trials, aic, bic, cv_loglik, inv_temp, lapse (leak, alpha
        when fitted or fixed), converged, cv_converged, at_bound (free
        parameters within 1e-6 of a fit bound in optimiser coordinates,
        ';'-joined, '' when none), message, depth, and the correlations
        ``corr_<a>_<b>`` of the fitted parameters.
    blocks : pandas.DataFrame
        One row per participant x block x model: participant, group, session,
        block, model, n_trials, n_params, loglik_session (at the whole-session
        estimate), loglik_block (at the block's own refit of every free
        parameter), bic_block = n_params ln(n_trials) - 2 loglik_block (NaN
        without trials), cv_loglik_block (held out in leave-one-block-out CV,
        NaN with one block), <param>_block for each free parameter, converged
        (the refit), cv_converged (that block's fold), message.
    predictions : pandas.DataFrame
        One row per trial x model: participant, group, session, block, trial,
        model, p_<symbol> (the learner's prediction), guess_prob (the actual
        guess under the fitted choice rule, NaN when missed), scored.
    excluded : pandas.DataFrame
        Participants not fitted: participant, group, reason.
    """

    fits: pd.DataFrame
    blocks: pd.DataFrame
    predictions: pd.DataFrame
    excluded: pd.DataFrame


def model_tables(model: Model, rows: Rows, best: Mapping[int, int]) -> tuple[list[dict], list[dict], np.ndarray]:
    """Return the fit rows, block rows and the prediction values of one model from its solved rows.

    Parameters
    ----------
    model : Model
    rows : Rows
        Solved by :func:`foretell.fitting.search.solve_model`.
    best : mapping
        Participant index -> its whole-session row.

    Returns
    -------
    fit_rows, block_rows : list of dict
        Rows of :attr:`FitTables.fits` and :attr:`FitTables.blocks`.
    values : numpy.ndarray
        (trials of the batch, m + 1): each trial's prediction and guess
        probability at the whole-session estimate, participants in batch order.
    """
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
        values = rows.values(model, r)
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
            **{q: values.get(q, math.nan) for q in PARAM_ORDER},
            "converged": bool(rows.converged[r]), "cv_converged": all(fold_ok.values()) if folds else None,
            "at_bound": _at_bound(model, rows, r), "message": rows.message[r], "depth": spec.depth,
            **_correlations(model, rows, r)})
        for u, q in sorted(blocks.items()):  # in unit order, as session_pairs were made
            n_block = len(rows.trials[q])
            block_values = rows.values(model, q)
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
                   for q_ in PARAM_ORDER},
                "converged": bool(rows.converged[q]), "cv_converged": fold_ok.get(u),
                "message": rows.message[q]})
    return fit_rows, block_rows, _prediction_values(model, rows, best)


def _prediction_values(model: Model, rows: Rows, best: Mapping[int, int]) -> np.ndarray:
    """Return (trials of the batch, m + 1): each trial's prediction and guess probability (NaN when missed).

    At every participant's whole-session estimate; participants one after another, in batch order.
    """
    out = np.empty((sum(len(p.guess) for p in model.parts), len(model.symbols) + 1))
    at = 0
    for i, p in enumerate(model.parts):
        r = best[i]
        values = rows.values(model, r)
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


def _logliks(model: Model, rows: Rows, pairs: Sequence[tuple[int, np.ndarray]]) -> np.ndarray:
    """Return the log-likelihood of each (row r, trials) pair at row r's parameters, in one batch (NaN when r is unfitted)."""
    if not pairs:
        return np.empty(0)
    which = np.array([r for r, _ in pairs])
    batch = model.batch([(rows.part[r], rows.theta[r]) for r in which], [t for _, t in pairs])
    out = -batch.nll(model.space, np.arange(len(which)), rows.z[which], derivatives=False)
    return np.where(np.isfinite(rows.nll[which]), out, math.nan)


def _at_bound(model: Model, rows: Rows, r: int) -> str:
    """Return the names of row r's free parameters within BOUND_TOL of a fit bound, ';'-joined."""
    choice = model.space.at_bound(rows.z[r])
    lo, hi = model.learner_bounds.T
    learner = (rows.theta[r] - lo <= BOUND_TOL) | (hi - rows.theta[r] <= BOUND_TOL)
    flags = dict(zip(CHOICE_PARAMS, choice)) | dict(zip(model.learner_names, learner))
    return ";".join(p for p in model.names if flags[p])


def _correlations(model: Model, rows: Rows, r: int) -> dict[str, float]:
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
        vector, bounds = rows.vector(model, r), model.bounds
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


def _gradient(model: Model, rows: Rows, r: int, vector: np.ndarray, bounds: np.ndarray) -> np.ndarray:
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
        f_up = rows.nll_at(model, r, _moved(vector, i, up)) if up > vector[i] else f[0]
        f_down = rows.nll_at(model, r, _moved(vector, i, down)) if down < vector[i] else f[0]
        out[i] = (f_up - f_down) / (up - down)
    return out


def _moved(vector: np.ndarray, i: int, value: float) -> np.ndarray:
    """Return a copy of ``vector`` with coordinate i set to ``value``."""
    out = np.array(vector, dtype=float)
    out[i] = value
    return out


class Predictions:
    """The per-trial predictions table, filled batch by batch into arrays of its final size.

    Rows: participant, then model, then the participant's trials (the order of
    the other tables). Holding only the final arrays, and each batch's values
    until they are copied in, keeps the peak memory of a large study near the
    size of the table itself.

    Parameters
    ----------
    parts : sequence of Participant
        Every fitted participant, in table order.
    specs : sequence of ModelSpec
    symbols : sequence of str
    """

    def __init__(self, parts: Sequence[Participant], specs: Sequence[ModelSpec], symbols: Sequence[str]):
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

        def scored(p: Participant) -> np.ndarray:
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


def assemble(fit_rows: list[dict], block_rows: list[dict], predictions: pd.DataFrame,
             specs: Sequence[ModelSpec], fixed: Mapping[str, float], excluded: pd.DataFrame) -> FitTables:
    """Return the FitTables of the batches' rows, ordered participant, model (, block).

    Parameters
    ----------
    fit_rows, block_rows : list of dict
        From :func:`model_tables`, batch after batch.
    predictions : pandas.DataFrame
        :meth:`Predictions.frame`.
    specs : sequence of ModelSpec
    fixed : mapping
        Held parameters (their columns are written).
    excluded : pandas.DataFrame

    Returns
    -------
    FitTables
    """
    used = [p for p in LEARNER_PARAMS if p in fixed or any(p in s.free for s in specs)]
    free_sets = [tuple(p for p in s.free if p not in fixed) for s in specs]
    corr = [f"corr_{a}_{b}" for a, b in combinations(PARAM_ORDER, 2)
            if any(a in f and b in f for f in free_sets)]
    fit_columns = (["participant", "group", "model", "loglik", "n_params", "n_trials", "aic", "bic",
                    "cv_loglik", "inv_temp", "lapse"] + used
                   + ["converged", "cv_converged", "at_bound", "message", "depth"] + corr)
    block_params = [f"{p}_block" for p in PARAM_ORDER if any(p in f for f in free_sets)]
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
