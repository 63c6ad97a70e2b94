"""MNE epoch metadata: the per-trial quantities of the events files, one row per epoch, matched and checked."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from foretell.errors import UsageError
from foretell.inputs import as_log, as_task
from foretell.labels import block_label
from foretell.logs import ValidatedLog
from foretell.models import ModelSpec
from foretell.regressors import design
from foretell.steps.events import BEFORE_STIMULUS, EVENTS, after_stimulus, trial_table
from foretell.text import plural
from foretell.validation import check_option

TIMING_TOLERANCE = 0.02
"""Seconds two inter-event intervals (EEG events vs the log's onsets) may differ by in :func:`to_metadata`."""


def to_metadata(log: object, task: object, events: Any, *, participant: str,
                session: int | None = None, models: Sequence[str | ModelSpec] | None = None,
                fit: object = None, fixed: Mapping[str, float] | None = None,
                locked: str = "guess", sfreq: float | None = None,
                tolerance: float | None = TIMING_TOLERANCE) -> pd.DataFrame:
    """Return one row per epoch of the trial quantities, for ``epochs.metadata``.

    Parameters
    ----------
    log : str, pathlib.Path, pandas.DataFrame or ValidatedLog
    task : Task, str or pathlib.Path
    events : mne.BaseEpochs or array of shape (n, 3)
        One event per trial of ``participant``'s ``session``, locked to
        ``locked``; the array's first column holds sample numbers.
    participant : str
    session : int, optional
        Needed when the participant has more than one.
    models : sequence of str or ModelSpec, optional
        The learner models (default: the task's default set).
    fit : FitResult or a ``foretell fit`` folder, optional
        Earlier fits, for the learner values (:func:`foretell.folders.as_fit`).
    fixed : mapping, optional
        Learner values the fits do not cover.
    locked : str, default "guess"
        The event the epochs are locked to: "guess" or "reveal" (reaction designs: "stimulus").
    sfreq : float, optional
        The sampling rate of an events array (taken from Epochs otherwise).
    tolerance : float or None, default 0.02
        Seconds two inter-event intervals (EEG vs log) may differ by; None: no check.

    Returns
    -------
    pandas.DataFrame
        participant, session, block, trial, event (= ``locked``), log_onset
        (s, the event's onset on the log's clock), stimulus, response, rt,
        missed, rt_ok, context and the model columns of
        :func:`foretell.steps.events.export_events`;
        locked to an event of :data:`BEFORE_STIMULUS`, the quantities of
        :data:`AFTER_STIMULUS` are NaN (not known yet at that event).

    Raises
    ------
    UsageError
        When the counts or the timing of events and trials disagree, or for
        an unknown participant, session or event.

    Notes
    -----
    Trials are matched by order within the session. Epochs dropped after
    creation are matched through ``epochs.selection`` when ``epochs.drop_log``
    counts the session's trials. With the sampling rate and onsets in the
    log, each interval between consecutive events must match the log's within
    ``tolerance``, which catches a missing and an extra trigger that leave
    the count unchanged.
    """
    from foretell.folders import as_fit

    task = as_task(task)
    log = as_log(log, task)
    kinds = dict(EVENTS[design(task)])
    check_option("locked", locked, kinds)
    samples, sfreq, selection, n_created = _event_samples(events, sfreq)
    fitted = as_fit(fit, log, task)
    trials, ids, _ = trial_table(_session_log(log, participant, session), task, models,
                             fits=None if fitted is None else fitted.fits, fixed=fixed)
    n_trials = len(trials)
    if len(samples) == n_trials:
        rows = np.arange(n_trials)
    elif selection is not None and n_created == n_trials:
        rows = np.asarray(selection, dtype=np.int64)
    else:
        raise UsageError(
            f"{plural(len(samples), 'EEG event')} but {plural(n_trials, 'trial')} of participant "
            f"{participant}, session {block_label(trials['session'].iloc[0])} in the log: events and trials "
            "are matched one to one, in order (give only the events locked to one kind of event, "
            "and attach metadata before dropping epochs, or keep their drop_log)")
    trials = trials.iloc[rows].reset_index(drop=True)
    if locked in BEFORE_STIMULUS:
        trials[after_stimulus(ids)] = np.nan
    onset = trials[kinds[locked]].to_numpy(float)
    if tolerance is not None and sfreq is not None:
        _check_timing(samples / sfreq, onset, trials["trial"].to_numpy(), tolerance)
    keys = ["participant", "session", "block", "trial"]
    rest = [c for c in trials.columns if c not in keys + ["onset", "reveal_onset"]]
    out = trials[keys].assign(event=locked, log_onset=onset)
    return pd.concat([out, trials[rest]], axis=1)


def _session_log(log: ValidatedLog, participant: str, session: int | None) -> ValidatedLog:
    """Return the log of one participant's session (the only one when ``session`` is None)."""
    frame = log.frame
    mine = frame[frame["participant"].astype(str) == str(participant)]
    if not len(mine):
        raise UsageError(f"participant {participant!r} is not in the log")
    sessions = sorted(mine["session"].unique().tolist())
    if session is None and len(sessions) > 1:
        raise UsageError(f"participant {participant} has sessions "
                         f"{', '.join(block_label(s) for s in sessions)}: give session=")
    session = sessions[0] if session is None else session
    mine = mine[mine["session"] == session]
    if not len(mine):
        raise UsageError(f"participant {participant} has no session {block_label(session)}; "
                         f"their sessions: {', '.join(block_label(s) for s in sessions)}")
    return replace(log, frame=mine.reset_index(drop=True))


def _event_samples(events: Any, sfreq: float | None
                   ) -> tuple[np.ndarray, float | None, np.ndarray | None, int | None]:
    """Return (sample numbers, sampling rate, epochs.selection, len(drop_log)) of an events array or Epochs."""
    if isinstance(events, (np.ndarray, list, tuple)):
        array = np.asarray(events)
        if array.ndim != 2 or array.shape[1] != 3 or not np.issubdtype(array.dtype, np.integer):
            raise UsageError(f"an events array has shape (n, 3) of whole numbers (sample, "
                             f"previous value, event id), got shape {array.shape}")
        return array[:, 0].astype(float), sfreq, None, None
    try:
        import mne
    except ImportError:
        raise UsageError("reading mne.Epochs needs mne: pip install 'foretell[eeg]' (or pass an "
                         "events array)") from None
    if not isinstance(events, mne.BaseEpochs):
        raise UsageError(f"events must be an mne.Epochs or an events array (n, 3), got "
                         f"{type(events).__name__}")
    return (events.events[:, 0].astype(float), float(events.info["sfreq"]),
            np.asarray(events.selection), len(events.drop_log))


def _check_timing(eeg: np.ndarray, log: np.ndarray, trial: np.ndarray, tolerance: float) -> None:
    """Raise UsageError when an interval between consecutive EEG events differs from the log's by more than tolerance."""
    gap = np.abs(np.diff(eeg) - np.diff(log))
    bad = np.flatnonzero(gap > tolerance)  # NaN (no onset in the log) never compares greater
    if len(bad):
        i = int(bad[0])
        raise UsageError(
            f"the EEG events and the log disagree on {plural(len(bad), 'interval')}: from trial "
            f"{trial[i]} to trial {trial[i + 1]} the EEG has {np.diff(eeg)[i]:.3f} s, the log "
            f"{np.diff(log)[i]:.3f} s (tolerance {tolerance:g} s); a trigger is missing or extra, "
            "or the events belong to another run")
