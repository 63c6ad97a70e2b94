"""Per-trial regressors of learner models: uncertainty, surprise, guess probability, the context used."""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence

import numpy as np
import pandas as pd
from pandas.api.types import union_categoricals

from foretell.errors import UsageError
from foretell.labels import context_label
from foretell.learners import Counting, TreeMixture
from foretell.learners.base import suffix_codes
from foretell.logs import ValidatedLog
from foretell.models import ModelSpec, model_specs
from foretell.params import DEFAULT_ALPHA, PARAMS
from foretell.tasks import Task

REGRESSORS = ("entropy", "surprise", "guess_prob", "prev_surprise", "prev_correct")
"""The per-trial regressors :func:`regressors` computes for every model."""
IN_BITS = ("entropy", "surprise", "prev_surprise")
"""The regressors measured in bits (a slope on them is "per bit")."""
LEAK_GRID = (0.0, 0.01, 0.02, 0.03, 0.05, 0.075, 0.1, 0.15, 0.2, 0.3, 0.4, 0.5, 0.6, 0.8, 0.95)
"""Leaks tried when a leak is chosen on the measure (denser near 0, up to the fit bound 0.95)."""

Score = Callable[[str, str, Sequence[Mapping[str, np.ndarray]]], np.ndarray]
"""score(participant, model id, candidates) -> how well the measure is predicted under each
candidate's regressor columns (arrays over that participant's trials in log order), higher better;
used to choose a leak."""

COLUMNS = ("participant", "group", "session", "block", "trial", "model", *REGRESSORS,
           "context", "missed", "rt_ok", "leak", "alpha", "params_from")


def design(task: Task) -> str:
    """Return the task's response design: "guess" (the default) or "reaction".

    Parameters
    ----------
    task : Task

    Returns
    -------
    str
    """
    return getattr(task, "response", "guess")


def kept_by_fit(log: ValidatedLog, excluded: pd.DataFrame | None) -> tuple[np.ndarray, list[str]]:
    """Return (which rows of the log belong to participants the fit kept, a note per participant it left out).

    A participant the fit left out (nothing scored) has no fitted learner
    values: the steps that reuse fits leave them out too, and say so.

    Parameters
    ----------
    log : ValidatedLog
    excluded : pandas.DataFrame or None
        The fit's ``excluded`` table (participant, group, reason).

    Returns
    -------
    (numpy.ndarray of bool, list of str)

    Raises
    ------
    UsageError
        When the fit left out every participant of the log.
    """
    participant = log.frame["participant"].astype(str)
    if excluded is None or excluded.empty:
        return np.ones(len(participant), dtype=bool), []
    reasons = dict(zip(excluded["participant"].astype(str), excluded["reason"].astype(str)))
    left = [p for p in dict.fromkeys(participant) if p in reasons]
    keep = ~participant.isin(left).to_numpy()
    if not keep.any():
        raise UsageError(f"the fit left out every participant of {log.source}: nothing to analyze")
    return keep, [f"participant {p} left out, as in the fit: {reasons[p]}" for p in left]


def learner_values(spec: ModelSpec, participant: str, *, fits: pd.DataFrame | None = None,
                   fixed: Mapping[str, float] | None = None) -> tuple[dict[str, float], str]:
    """Return (learner values, where from) for one participant and model.

    Per tunable parameter (leak, alpha) the first that gives a finite value
    wins: the participant's row of ``fits``, then ``fixed`` (which, as in the
    fitter, applies to every model that has the parameter: a fixed leak makes
    count-1 leaky too); alpha then defaults to 0.5 (the Krichevsky-Trofimov
    estimator; Krichevsky & Trofimov, 1981) and leak to 0 for models whose
    leak is not free.

    Parameters
    ----------
    spec : ModelSpec
    participant : str
    fits : pandas.DataFrame, optional
        Fitted parameters (participant, model, leak, alpha).
    fixed : mapping of str to float, optional
        Held values.

    Returns
    -------
    (dict of str to float, str)
        The values, and where from: "fits", "fixed", "default", or "held_out"
        when the model's leak is free and still unknown (it is then chosen on
        the measure, see :func:`regressors`).
    """
    values: dict[str, float] = {}
    source = "default"
    row = None
    if fits is not None and len(fits):
        hit = fits[(fits["participant"].astype(str) == str(participant))
                   & (fits["model"] == spec.model_id)]
        row = hit.iloc[0] if len(hit) else None
    for name in spec.tunable:
        value = row.get(name, math.nan) if row is not None else math.nan
        if _finite(value):
            values[name], source = PARAMS[name].check(float(value), "fits"), "fits"
        elif fixed is not None and _finite(fixed.get(name, math.nan)):
            values[name] = PARAMS[name].check(float(fixed[name]), "fixed")
            source = "fixed" if source == "default" else source
    if "leak" in spec.free and "leak" not in values:
        source = "held_out"
    return values, source


def regressors(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None, *,
               fixed: Mapping[str, float] | None = None, fits: pd.DataFrame | None = None,
               score: Score | None = None, leak_grid: Sequence[float] = LEAK_GRID) -> pd.DataFrame:
    """Return one tidy row per trial x model of the learners' per-trial regressors.

    A response made from a confident prediction, or to an expected stimulus,
    is fast; an uncertain or surprising one is slow (Hick, 1952; Hyman,
    1953). Columns: participant, group, session, block, trial, model, then
    ``entropy`` = -sum_a p_a log2 p_a of the learner's prediction before the
    trial (bits); ``surprise`` = -log2 p(stimulus) (bits); ``guess_prob`` = p
    of the symbol guessed (guess designs only; NaN when missed and in reaction
    designs); ``prev_surprise``; ``prev_correct`` (1.0 / 0.0: the previous
    trial's response was the stimulus; NaN on a session's first trial and
    after a missed response); ``context`` the context the learner predicted
    from (labels oldest first joined by '-', root '*'; NA before the learner
    has a full context): count-k the last k symbols, count-task and source the
    task's context, mix-D the last d symbols with d the posterior mean depth
    of the context rounded to the nearest whole number
    (:meth:`TreeMixture.mean_depth`); ``missed`` and ``rt_ok`` copied from
    the log (missed guesses and screened RTs stay, flagged, so per-trial
    alignment, e.g. with EEG epochs, keeps every trial); ``leak``, ``alpha``
    the learner values used (NaN where the model has none) and
    ``params_from`` where they came from (see :func:`learner_values`).

    Learners restart at each session and carry on across blocks. A model
    whose leak is free and given neither in ``fits`` nor in ``fixed`` gets,
    per participant, the leak of ``leak_grid`` that maximises ``score``
    (``params_from`` "held_out"); :func:`foretell.steps.measures.analyze_rt`
    passes the held-out predictive density of its model of the measure.
    Rows: participant by participant, model by model, trials in log order.

    Parameters
    ----------
    log : ValidatedLog
    task : Task
    models : sequence of str or ModelSpec, optional
        Default: the task's default set.
    fixed : mapping of str to float, optional
        Held learner values (:func:`learner_values`).
    fits : pandas.DataFrame, optional
        Fitted learner values per participant and model.
    score : callable, optional
        See :data:`Score`; needed when a free leak has no value.
    leak_grid : sequence of float, default :data:`LEAK_GRID`

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COLUMNS`.

    Raises
    ------
    UsageError
        For a log not validated, an invalid grid, or a free leak with neither a value nor a ``score``.

    References
    ----------
    Hick (1952), Q. J. Exp. Psychol. 4, 11-26; Hyman (1953), J. Exp. Psychol. 45, 188-196.
    """
    if not isinstance(log, ValidatedLog):
        raise UsageError("regressors needs a validated log: use load_log or validate_log first")
    specs = model_specs(models, task)
    grid = _check_grid(leak_grid)
    guessing = design(task) == "guess"
    frame = log.frame
    parts: list[dict[str, np.ndarray]] = []
    catalog: dict[str, int] = {}
    for pid, rows in frame.groupby("participant", sort=False):
        sessions = _sessions(rows)
        for spec in specs:
            values, source = learner_values(spec, pid, fits=fits, fixed=fixed)
            if source == "held_out":
                if score is None:
                    raise UsageError(
                        f"model {spec.model_id!r} needs a leak for participant {pid}, and no fit gives one: "
                        "reuse fits of this participant, hold the leak at a value, or analyze the "
                        "measure (the rt step chooses the leak on it)")
                candidates = [_participant_columns(spec.learner(**values, leak=leak), sessions,
                                                   task, guessing) for leak in grid]
                scores = np.asarray(score(pid, spec.model_id, candidates), dtype=float)
                best = int(np.argmax(np.where(np.isfinite(scores), scores, -np.inf)))
                values["leak"], cols = grid[best], candidates[best]
                learner = spec.learner(**values)
            else:
                learner = spec.learner(**values)
                cols = _participant_columns(learner, sessions, task, guessing)
            context = np.concatenate([_contexts(spec, learner, x, task, catalog)
                                      for x, _ in sessions])
            parts.append(_columns(spec, cols, context, values, source, len(rows)))
    return _table(frame, parts, catalog)


def stack_tables(tables: Sequence[pd.DataFrame]) -> pd.DataFrame:
    """Return the regressor tables of consecutive batches of participants as one table.

    The same table, categories included, as :func:`regressors` gives on
    the batches' logs together: contexts in order of first appearance,
    ``params_from`` sorted.

    Parameters
    ----------
    tables : sequence of pandas.DataFrame
        :func:`regressors` of consecutive batches, in order.

    Returns
    -------
    pandas.DataFrame
    """
    if len(tables) == 1:
        return tables[0]
    out = pd.concat(tables, ignore_index=True)
    for column, sort in (("model", False), ("context", False), ("params_from", True)):
        out[column] = union_categoricals([t[column] for t in tables], sort_categories=sort)
    return out


def session_columns(learner: object, x: np.ndarray, response: np.ndarray, n_symbols: int,
                    guessing: bool) -> dict[str, np.ndarray]:
    """Return the regressor arrays (see :func:`regressors`) of one session.

    Parameters
    ----------
    learner : learner
        Any learner of :mod:`foretell.learners`.
    x, response : numpy.ndarray of int
        Stimulus and response indices (-1 = missed).
    n_symbols : int
    guessing : bool
        False (reaction designs) leaves guess_prob NaN.

    Returns
    -------
    dict of str to numpy.ndarray
        Each of :data:`REGRESSORS`.
    """
    pred = learner.next_proba(x, n_symbols)
    t = np.arange(len(x))
    with np.errstate(divide="ignore", invalid="ignore"):
        entropy = -np.where(pred > 0, pred * np.log2(pred), 0.0).sum(axis=1)
        surprise = -np.log2(pred[t, x])
    made = response >= 0
    guess_prob = np.where(made & guessing, pred[t, np.maximum(response, 0)], np.nan)
    correct = np.where(made, (response == x).astype(float), np.nan)
    return {"entropy": entropy, "surprise": surprise, "guess_prob": guess_prob,
            "prev_surprise": _lag(surprise), "prev_correct": _lag(correct)}


def _finite(value: object) -> bool:
    try:
        return math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def _check_grid(grid: Sequence[float]) -> tuple[float, ...]:
    values = tuple(grid)
    if not values:
        raise UsageError("leak_grid must list at least one leak")
    return tuple(PARAMS["leak"].check(v, "leak_grid") for v in values)


def _sessions(rows: pd.DataFrame) -> list[tuple[np.ndarray, np.ndarray]]:
    """Return (stimulus indices, response indices) of each session of one participant, in log order."""
    session = rows["session"].to_numpy()
    cuts = np.flatnonzero(session[1:] != session[:-1]) + 1
    stim = np.split(rows["stimulus_idx"].to_numpy(np.int64), cuts)
    resp = np.split(rows["response_idx"].to_numpy(np.int64), cuts)
    return list(zip(stim, resp))


def _participant_columns(learner: object, sessions: list[tuple[np.ndarray, np.ndarray]],
                         task: Task, guessing: bool) -> dict[str, np.ndarray]:
    """Return the regressor arrays of one participant and learner, sessions end to end."""
    per_session = [session_columns(learner, x, r, task.n_symbols, guessing) for x, r in sessions]
    return {k: np.concatenate([s[k] for s in per_session]) for k in per_session[0]}


def _lag(values: np.ndarray) -> np.ndarray:
    """Return ``values`` shifted one trial later, NaN first."""
    return np.r_[np.nan, values[:-1]] if len(values) else values.astype(float)


def _contexts(spec: ModelSpec, learner: object, x: np.ndarray, task: Task,
              catalog: dict[str, int]) -> np.ndarray:
    """Return the code in ``catalog`` (label -> code, extended here) of the context of each trial.

    -1 before the learner has a full context.
    """
    m, n = task.n_symbols, len(x)
    out = np.full(n, -1, dtype=np.int64)
    if isinstance(learner, Counting):
        depth = np.full(n, learner.depth)
    elif isinstance(learner, TreeMixture):
        depth = np.rint(learner.mean_depth(x, m)).astype(np.int64)
    else:  # learners on the task's own contexts (count-task, source)
        nodes = task.context_indices(x)
        nodes[: spec.depth] = -1
        codes = np.array([catalog.setdefault(task.context_label(c), len(catalog))
                          for c in task.contexts] + [-1], dtype=np.int64)
        return codes[nodes]
    depth[: spec.depth] = -1
    for d in np.unique(depth[depth >= 0]):
        at = depth == d
        uniq, inverse = np.unique(suffix_codes(x, m, int(d))[at], return_inverse=True)
        codes = np.array([catalog.setdefault(context_label(task.symbols, _decode(c, int(d), m)),
                                             len(catalog)) for c in uniq], dtype=np.int64)
        out[at] = codes[inverse]
    return out


def _decode(code: int, depth: int, m: int) -> tuple[int, ...]:
    """Return the symbol indices (oldest first) of a base-m context code of ``depth`` symbols."""
    return tuple(int(code) // m ** (depth - 1 - j) % m for j in range(depth))


def _columns(spec: ModelSpec, cols: Mapping[str, np.ndarray], context: np.ndarray,
             values: Mapping[str, float], source: str, n: int) -> dict[str, np.ndarray]:
    """Return the model-specific columns of one participant and model as arrays of length n."""
    alpha = values.get("alpha", DEFAULT_ALPHA) if "alpha" in spec.tunable else math.nan
    leak = values.get("leak", 0.0) if "leak" in spec.tunable else math.nan
    return {"model": np.full(n, spec.model_id, dtype=object),
            **{k: cols[k] for k in REGRESSORS}, "context": context,
            "leak": np.full(n, float(leak)), "alpha": np.full(n, float(alpha)),
            "params_from": np.full(n, source, dtype=object)}


def _table(frame: pd.DataFrame, parts: list[dict[str, np.ndarray]], catalog: Mapping[str, int]
           ) -> pd.DataFrame:
    """Return the tidy table: each participant's log columns beside their stacked model columns.

    ``parts`` come participant by participant, model by model, each in log order.
    """
    n_models = len(parts) // frame["participant"].nunique()
    part = frame["participant"].to_numpy()
    starts = np.flatnonzero(np.r_[True, part[1:] != part[:-1]])
    stops = np.r_[starts[1:], len(part)]
    rows = np.concatenate([np.tile(np.arange(a, b), n_models) for a, b in zip(starts, stops)])

    def take(col: str) -> np.ndarray:
        return frame[col].to_numpy()[rows]

    stacked = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    out = {"participant": take("participant"),
           "group": take("group") if "group" in frame.columns else np.full(len(rows), None),
           "session": take("session"), "block": take("block"), "trial": take("trial"),
           "model": pd.Categorical(stacked["model"],
                                   categories=[p["model"][0] for p in parts[:n_models]]),
           **{k: stacked[k] for k in REGRESSORS},
           "context": pd.Categorical.from_codes(stacked["context"], categories=list(catalog)),
           "missed": take("missed").astype(bool), "rt_ok": take("rt_ok").astype(bool),
           "leak": stacked["leak"], "alpha": stacked["alpha"],
           "params_from": pd.Categorical(stacked["params_from"])}
    return pd.DataFrame(out)[list(COLUMNS)]
