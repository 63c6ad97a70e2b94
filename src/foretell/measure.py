"""The per-trial measure learners explain: the trials kept, the outcome, the time-on-task baseline, the designs."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from foretell.errors import UsageError
from foretell.logs import ValidatedLog
from foretell.models import ModelSpec
from foretell.regressors import IN_BITS, REGRESSORS, design
from foretell.stats.splines import natural_spline, spline_knots
from foretell.tasks import Task
from foretell.validation import check_count, check_option

BASELINE_MODEL = "none"
"""The id of the baseline model: the time-on-task terms and no learner. It joins every comparison."""
BASELINE_TERMS = ("blocks", "trial_spline", "log_trial", "block_trend", "prev_correct")
"""The time-on-task terms a baseline may hold (see :func:`baseline_terms`)."""
BASELINE_WORDS = {"blocks": "an intercept per block", "trial_spline": "a natural spline of log trial",
                  "log_trial": "log trial", "block_trend": "a line over blocks",
                  "prev_correct": "whether the previous response was right"}
"""How each baseline term reads in a summary."""
DEFAULT_BASELINE = {"guess": ("blocks", "trial_spline", "prev_correct"), "reaction": ("blocks", "trial_spline")}
"""The baseline of each response design."""
TRIAL_SPLINE_DF = 4
"""Degrees of freedom of the natural cubic spline of log trial: 5 knots at quantiles of log trial.

Four degrees bend with a power-law practice curve and its early steep part
(Newell & Rosenbloom, 1981; Heathcote, Brown & Mewhort, 2000) and leave the
trial-to-trial variation to the learners."""
LOCKS = ("guess", "reveal")  # a measure taken before the stimulus is shown, or after it
DROP_REASONS = ("screen", "warmup", "error", "after_error", "block_start", "regressor")  # see choose_measure
BLOCK_START_DROP = 2
"""Trials dropped at the start of each block in reaction designs (common practice: the first
responses after a break are slow for reasons the learner does not model)."""
_RANK_TOL = 1e-8  # singular values below this fraction of the largest are dropped from the nuisance columns


def baseline_terms(value: str | Sequence[str] | None, response: str) -> tuple[str, ...]:
    """Return the checked time-on-task terms of the baseline.

    Terms: ``blocks``, an intercept per session x block (rest breaks shift
    the level); ``trial_spline``, a natural cubic spline of log trial number
    within the session with :data:`TRIAL_SPLINE_DF` degrees of freedom (the
    power law of practice: Newell & Rosenbloom, 1981; Heathcote, Brown &
    Mewhort, 2000); ``log_trial``, log trial number alone; ``block_trend``, a
    straight line over blocks; ``prev_correct`` (guess designs), whether the
    previous response was right: responses slow down after an error
    (post-error slowing; Rabbitt, 1966).

    Parameters
    ----------
    value : str, sequence of str or None
        Terms, or one string of comma-separated terms; "" (or an empty
        sequence) for an intercept alone; None for :data:`DEFAULT_BASELINE`.
    response : {"guess", "reaction"}
        The task's design.

    Returns
    -------
    tuple of str
        In the order of :data:`BASELINE_TERMS`.

    Raises
    ------
    UsageError
        For an unknown term, two terms of the same kind (trial_spline and
        log_trial; blocks and block_trend), or prev_correct in a reaction
        design (the trial after an error is left out there).

    Examples
    --------
    >>> baseline_terms("blocks, log_trial", "guess")
    ('blocks', 'log_trial')
    """
    if value is None:
        return DEFAULT_BASELINE[response]
    given = [t.strip() for t in value.split(",")] if isinstance(value, str) else [str(t) for t in value]
    given = [t for t in given if t]
    for term in given:
        check_option("baseline term", term, BASELINE_TERMS)
    for pair in (("trial_spline", "log_trial"), ("blocks", "block_trend")):
        if set(pair) <= set(given):
            raise UsageError(f"the baseline takes {pair[0]} or {pair[1]}, not both")
    if "prev_correct" in given and response == "reaction":
        raise UsageError("prev_correct is not a baseline term of reaction designs: the trial after an error is "
                         "left out, so every kept trial follows a correct response")
    return tuple(t for t in BASELINE_TERMS if t in given)


@dataclass(frozen=True, eq=False)
class Designs:
    """One participant's regression designs on the kept trials.

    Attributes
    ----------
    learners : numpy.ndarray, shape (M, n, p)
        Per learner model: 1, its regressors (the main one in column 1), the baseline's columns.
    baseline : numpy.ndarray, shape (n, p0)
        1 and the baseline's columns.
    y, times, unit : numpy.ndarray, shape (n,)
        Outcome; positions among the participant's rows; session x block ordinal (0 = first kept).
    runs : numpy.ndarray of bool, shape (n,)
        True on the first kept trial of each session (serial dependence starts anew).
    kept : numpy.ndarray of bool
        Over the participant's rows.
    dummies : int
        Block-intercept columns, right after the regressors in ``learners`` (after the 1 in ``baseline``).
    """

    learners: np.ndarray
    baseline: np.ndarray
    y: np.ndarray
    times: np.ndarray
    unit: np.ndarray
    runs: np.ndarray
    kept: np.ndarray
    dummies: int


@dataclass(frozen=True, eq=False)
class Measure:
    """A per-trial measure to explain by learner regressors, and the trials kept for it.

    Attributes
    ----------
    name, values, log_transform : str, numpy.ndarray, bool
        "rt", a log column or "measure"; its raw values per log row; the outcome is their log.
    main, extra : str, tuple of str
        The regressor whose slope is reported (in bits), and further ones.
    reason, block_order, session_order : numpy.ndarray of int
        Per log row: 1 + index into :data:`DROP_REASONS` (0 = kept, before
        regressors); the ordinal of its session x block, and of its session,
        within the participant.
    baseline : tuple of str
        The time-on-task terms (:func:`baseline_terms`).
    nuisance, block_nuisance : numpy.ndarray, shape (rows, q), (rows, q_b)
        Per log row, the baseline's columns other than block intercepts, for
        whole sessions and within one block (the spline's line, log trial,
        and prev_correct): centred, uncorrelated and of unit variance over
        the kept trials (the same span as the raw terms).
    practice : numpy.ndarray, shape (rows, 0 or 1)
        Log trial, centred and of unit variance over the kept trials, when
        the baseline has a trial term (each participant's own practice slope
        in the hierarchical model).
    """

    name: str
    values: np.ndarray
    log_transform: bool
    main: str
    extra: tuple[str, ...]
    reason: np.ndarray
    block_order: np.ndarray
    session_order: np.ndarray
    baseline: tuple[str, ...]
    nuisance: np.ndarray
    block_nuisance: np.ndarray
    practice: np.ndarray

    @property
    def columns(self) -> tuple[str, ...]:
        """Return the regressors, the main one first."""
        return (self.main,) + self.extra

    @property
    def median_name(self) -> str:
        """Return the column name of the measure's median ("median_rt_s" for RTs)."""
        return "median_rt_s" if self.name == "rt" else f"median_{self.name}"

    @property
    def slope_name(self) -> str:
        """Return the unit of the reported slope ("ms_per_bit" for RTs, else "per_bit")."""
        return "ms_per_bit" if self.name == "rt" else "per_bit"

    @property
    def block_intercepts(self) -> bool:
        """Return whether the baseline has an intercept per session x block."""
        return "blocks" in self.baseline

    def part(self, rows: slice) -> Measure:
        """Return the measure of some rows of the log only (whole participants), e.g. one batch of them."""
        per_row = ("values", "reason", "block_order", "session_order", "nuisance", "block_nuisance", "practice")
        return replace(self, **{name: getattr(self, name)[rows] for name in per_row})

    def outcome(self, rows: slice) -> np.ndarray:
        """Return the outcome (log value when :attr:`log_transform`) of some rows."""
        v = self.values[rows]
        if not self.log_transform:
            return v
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.log(v)

    def slope_factor(self, raw: np.ndarray) -> float:
        """Return the factor turning a slope on the outcome into the reported slope per bit.

        Log outcome: b median(measure), the change at the median; times 1000
        for RTs in seconds (ms per bit).
        """
        factor = float(np.median(raw)) if self.log_transform else 1.0
        return factor * (1000.0 if self.name == "rt" else 1.0)

    def model_columns(self, table: Mapping[str, np.ndarray], rows: slice, n_models: int
                      ) -> tuple[list[dict[str, np.ndarray]], list[dict[str, object]]]:
        """Return one participant's regressor arrays per model, and each model's learner values.

        Parameters
        ----------
        table : mapping of str to numpy.ndarray
            Columns of a :func:`foretell.regressors.regressors` table (with
            leak, alpha, params_from): per participant, in log order, its
            models one after another, each over the participant's trials.
        rows : slice
            The participant's rows of the log.
        n_models : int

        Returns
        -------
        (list of dict, list of dict)
        """
        n = rows.stop - rows.start
        start = rows.start * n_models
        cols = [{c: table[c][start + j * n: start + (j + 1) * n] for c in self.columns} for j in range(n_models)]
        info = [{k: table[k][start + j * n] for k in ("leak", "alpha", "params_from")} for j in range(n_models)]
        return cols, info

    def kept(self, rows: slice, cols: Sequence[Mapping[str, np.ndarray]]) -> np.ndarray:
        """Return the mask of a participant's kept trials: no reason to leave them out, every regressor finite."""
        kept = self.reason[rows] == 0
        for c in cols:
            for name in self.columns:
                kept &= np.isfinite(c[name])
        return kept

    def design(self, rows: slice, cols: Sequence[Mapping[str, np.ndarray]], within_block: bool = False
               ) -> Designs:
        """Return one participant's designs on the kept trials (:meth:`kept`).

        Whole session: 1, the regressors, then the baseline: an intercept
        per session x block after the first, the session-wide columns of
        :attr:`nuisance`. ``within_block``: 1, the regressors and
        :attr:`block_nuisance`, for fits of one block at a time.

        Parameters
        ----------
        rows : slice
            The participant's rows of the log.
        cols : sequence of mapping
            Per model, the regressor arrays (:meth:`model_columns`).
        within_block : bool, default False

        Returns
        -------
        Designs
        """
        kept = self.kept(rows, cols)
        order = self.block_order[rows][kept]
        present, unit = np.unique(order, return_inverse=True)
        n = int(kept.sum())
        base = [np.ones((n, 1))]
        dummies = int(self.block_intercepts and not within_block) * max(len(present) - 1, 0)
        if within_block:
            base.append(self.block_nuisance[rows][kept])
        else:
            base.append((unit[:, None] == np.arange(1, dummies + 1)).astype(float))
            base.append(self.nuisance[rows][kept])
        baseline = np.concatenate(base, axis=1)
        regressors = np.stack([np.stack([c[name][kept] for name in self.columns], axis=1) for c in cols]) \
            if cols else np.zeros((0, n, len(self.columns)))
        learners = np.concatenate([np.broadcast_to(baseline[:, :1], (len(cols), n, 1)), regressors,
                                   np.broadcast_to(baseline[:, 1:], (len(cols), n, baseline.shape[1] - 1))],
                                  axis=2)
        session = self.session_order[rows][kept]
        runs = np.r_[True, session[1:] != session[:-1]] if n else np.zeros(0, bool)
        return Designs(learners, baseline, self.outcome(rows)[kept], np.flatnonzero(kept), unit, runs, kept, dummies)


def choose_measure(log: ValidatedLog, task: Task, specs: Sequence[ModelSpec], name: str, values: np.ndarray, *,
                   locked: str | None = None, names: Sequence[str] | None = None,
                   log_transform: bool | None = None, block_start: int | None = None,
                   baseline: str | Sequence[str] | None = None) -> Measure:
    """Return the :class:`Measure` to explain, with every trial's reason to be left out (or 0).

    Trials left out, the same for every model: measures the log's RT screen
    flagged (``rt_ok``; for other measures, non-finite values); the first K
    trials of a session (K = the largest model depth: warm-up); in reaction
    designs error trials (response != stimulus, or missed), the trial after
    an error, and the first ``block_start`` trials of a block (common
    practice).

    Parameters
    ----------
    log : ValidatedLog
    task : Task
    specs : sequence of ModelSpec
    name, values : str, numpy.ndarray
        The measure's name ("rt", a log column, or "measure") and raw values per log row.
    locked : {"guess", "reveal"}, optional
        Default "guess" in guess designs (the main regressor is the
        prediction's entropy), "reveal" in reaction designs (the stimulus'
        surprise).
    names : sequence of str, optional
        Regressors of :data:`foretell.regressors.REGRESSORS`, the first in bits; default the main one.
    log_transform : bool, optional
        Default True for rt, else False.
    block_start : int, optional
        Default :data:`BLOCK_START_DROP` in reaction designs, 0 in guess designs.
    baseline : str or sequence of str, optional
        :func:`baseline_terms`; a regressor the learners already carry (prev_correct) leaves the baseline.

    Returns
    -------
    Measure

    Raises
    ------
    UsageError
        For unknown, repeated or inapplicable regressors or baseline terms,
        or a log of values that are not positive.
    """
    frame = log.frame
    response = design(task)
    reaction = response == "reaction"
    locked = check_option("locked", ("reveal" if reaction else "guess") if locked is None else locked, LOCKS)
    chosen = _regressors(tuple(names) if names is not None else ("entropy" if locked == "guess" else "surprise",),
                         reaction)
    terms = tuple(t for t in baseline_terms(baseline, response) if t not in chosen)
    log_transform = (name == "rt") if log_transform is None else bool(log_transform)
    usable = frame["rt_ok"].to_numpy(bool) if name == "rt" else np.isfinite(values)
    if log_transform and np.any(usable & ~(values > 0)):
        raise UsageError(f"log_transform needs positive values of {name!r}; some kept trials are 0 or negative")
    start = check_count("block_start", (BLOCK_START_DROP if reaction else 0) if block_start is None
                        else block_start, 0)
    warmup = max(s.depth for s in specs)
    pos_session = frame.groupby(["participant", "session"], sort=False).cumcount().to_numpy()
    pos_block = frame.groupby(["participant", "session", "block"], sort=False).cumcount().to_numpy()
    checks = [~usable, pos_session < warmup]
    if reaction:
        error = frame["missed"].to_numpy(bool) | (frame["response_idx"].to_numpy()
                                                   != frame["stimulus_idx"].to_numpy())
        checks += [error, np.r_[False, error[:-1]] & (pos_session > 0), pos_block < start]
    else:
        checks += [np.zeros(len(frame), bool)] * 2 + [pos_block < start]
    reason = np.zeros(len(frame), dtype=np.int64)
    for code, drop in enumerate(checks, start=1):
        reason[(reason == 0) & drop] = code
    order, sessions = (_ordinal(frame, keys) for keys in (["session", "block"], ["session"]))
    log_trial = np.log1p(pos_session)
    nuisance, within = _nuisance(frame, terms, log_trial, order, pos_session, reason == 0)
    practice = _orthonormal([log_trial[:, None]] if {"trial_spline", "log_trial"} & set(terms) else [], reason == 0)
    return Measure(name, values, log_transform, chosen[0], chosen[1:], reason, order, sessions, terms, nuisance,
                   within, practice)


def _ordinal(frame: pd.DataFrame, keys: list[str]) -> np.ndarray:
    """Return per row the ordinal (0, 1, ...) of its ``keys`` group within its participant, in log order."""
    code = frame.groupby(["participant", *keys], sort=False).ngroup().to_numpy()
    first = pd.Series(code).groupby(frame["participant"].to_numpy(), sort=False).transform("min").to_numpy()
    return code - first


def _regressors(chosen: tuple[str, ...], reaction: bool) -> tuple[str, ...]:
    """Return the regressors checked: known, the first in bits, none twice, guess_prob only in guess designs."""
    unknown = [r for r in chosen if r not in REGRESSORS]
    if unknown or not chosen:
        raise UsageError(f"unknown regressor(s) {unknown}; choose from {', '.join(REGRESSORS)}")
    if chosen[0] not in IN_BITS:
        raise UsageError(f"the first regressor is the one whose slope is reported per bit: one of "
                         f"{', '.join(IN_BITS)}, got {chosen[0]!r}")
    if len(set(chosen)) != len(chosen):
        raise UsageError(f"regressors listed twice: {list(chosen)}")
    if "guess_prob" in chosen and reaction:
        raise UsageError("guess_prob exists only in guess designs; this task's responses are reactions to the "
                         "stimulus")
    return chosen


def _nuisance(frame: pd.DataFrame, terms: Sequence[str], log_trial: np.ndarray, order: np.ndarray,
              pos_session: np.ndarray, kept: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return the baseline's session-wide and within-block columns per log row (see :class:`Measure`).

    The spline's knots are quantiles of log trial over every kept trial, so
    every participant has the same basis.
    """
    session, within = [], []
    if "trial_spline" in terms and kept.any():
        session.append(natural_spline(log_trial, spline_knots(log_trial[kept], TRIAL_SPLINE_DF)))
    if "log_trial" in terms:
        session.append(log_trial[:, None])
    if {"trial_spline", "log_trial"} & set(terms):
        within.append(log_trial[:, None])
    if "block_trend" in terms:
        session.append(order[:, None].astype(float))
    if "prev_correct" in terms:
        right = (~frame["missed"].to_numpy(bool)
                 & (frame["response_idx"].to_numpy() == frame["stimulus_idx"].to_numpy())).astype(float)
        previous = np.where(pos_session > 0, np.r_[1.0, right[:-1]], 1.0)  # nothing to slow after on trial 1
        session.append(previous[:, None])
        within.append(previous[:, None])
    return _orthonormal(session, kept), _orthonormal(within, kept)


def _orthonormal(columns: Sequence[np.ndarray], kept: np.ndarray) -> np.ndarray:
    """Return columns spanning the same space as ``columns`` with the mean removed, uncorrelated and of
    unit variance over the ``kept`` rows (dependent or constant directions dropped)."""
    n = len(kept)
    if not columns or not kept.any():
        return np.zeros((n, 0))
    Z = np.concatenate(columns, axis=1)
    Z = Z - Z[kept].mean(axis=0)
    _, s, vt = np.linalg.svd(Z[kept], full_matrices=False)
    keep = s > _RANK_TOL * max(s.max(initial=0.0), 1e-300)
    return Z @ (vt[keep].T / s[keep]) * np.sqrt(kept.sum())


def participant_spans(frame: pd.DataFrame) -> dict[str, slice]:
    """Return participant -> the slice of their rows (a validated log is sorted by participant).

    Parameters
    ----------
    frame : pandas.DataFrame

    Returns
    -------
    dict of str to slice
    """
    part = frame["participant"].to_numpy()
    cuts = np.flatnonzero(part[1:] != part[:-1]) + 1
    return {str(part[a]): slice(int(a), int(b)) for a, b in zip(np.r_[0, cuts], np.r_[cuts, len(part)])}
