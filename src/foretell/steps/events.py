"""The events step: per-trial events and learner quantities as BIDS events files, and MNE epoch metadata."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import ClassVar

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from foretell.cluster import batches, job_count, workers_stopped
from foretell.errors import UsageError
from foretell.inputs import as_log, as_task
from foretell.labels import block_label
from foretell.logs import ValidatedLog
from foretell.models import ModelSpec, default_models, model_specs, parse_model
from foretell.progress import stage
from foretell.regressors import REGRESSORS, design, kept_by_fit, regressors
from foretell.results import Result
from foretell.steps.bids import column_name, events_sidecar, file_labels, label_notes, sidecar_json, to_tsv
from foretell.steps.guesses import reuse_notes
from foretell.tasks import Task
from foretell.text import plural
from foretell.validation import check_n_jobs

EVENTS = {"guess": (("guess", "onset"), ("reveal", "reveal_onset")),
          "reaction": (("stimulus", "onset"),)}
"""Per task design, the events of one trial in time order: (trial_type, the log column of its onset)."""
BEFORE_STIMULUS = ("guess",)
"""Events that come before the trial's symbol is shown: what depends on the symbol is not known there."""
AFTER_STIMULUS = ("surprise",)
"""Per-model quantities known only once the trial's symbol is shown (n/a on :data:`BEFORE_STIMULUS` rows)."""
_CHUNK_TRIALS = 200_000  # most trials per batch of participants exported together


@dataclass(frozen=True, eq=False, kw_only=True)
class EventsResult(Result):
    """The BIDS events files of a log, ready to write (see README, "EEG-ready events").

    Attributes
    ----------
    files : mapping of str to pandas.DataFrame
        File name -> events table, in BIDS column order (written by :func:`to_tsv`).
    sidecars : mapping of str to dict
        File name -> column descriptions (written by :func:`sidecar_json`).
    labels : pandas.DataFrame
        participant, session, bids_label, bids_session (NA when the file names
        carry no session): one row per participant x session; written as
        ``participants.csv``.
    task_label : str
        The task's BIDS label.
    """

    step: ClassVar[str] = "events"
    files: Mapping[str, pd.DataFrame]
    sidecars: Mapping[str, dict]
    labels: pd.DataFrame
    task_label: str

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return ``participants``: the mapping of participant ids to BIDS labels."""
        return {"participants": self.labels}

    def blobs(self) -> dict[str, bytes]:
        """Return every events file (TSV) and its JSON sidecar, by file name."""
        return ({name: to_tsv(frame) for name, frame in self.files.items()}
                | {name: sidecar_json(d) for name, d in self.sidecars.items()})


def default_event_models(task: Task, fit: "FitResult | None" = None) -> list[str]:
    """Return the models whose per-trial quantities go into the events files when none are given.

    Parameters
    ----------
    task : Task
    fit : FitResult, optional
        Earlier fits.

    Returns
    -------
    list of str
        The fitted models, in the order fitted; without fits the task's default
        set (:func:`foretell.models.default_models`) less the models whose leak
        is fitted: their quantities would need values nobody fitted.
    """
    if fit is not None:
        return list(dict.fromkeys(fit.fits["model"].astype(str)))
    return [m for m in default_models(task) if "leak" not in parse_model(m, task).free]


def export_events(log: object, task: object, *, fit: object = None,
                  models: Sequence[str | ModelSpec] | None = None, n_jobs: int = 1, progress: bool | None = None, fixed: Mapping[str, float] | None = None,
                  stimulus_duration: float | None = None) -> EventsResult:
    """Return the BIDS events files of every participant and session, with per-model quantities.

    Parameters
    ----------
    log : str, pathlib.Path, pandas.DataFrame or ValidatedLog
        The response log (:func:`foretell.inputs.as_log`).
    task : Task, str or pathlib.Path
        The task (:func:`foretell.inputs.as_task`).
    fit : FitResult or a ``foretell fit`` folder, optional
        Earlier fits (:func:`foretell.folders.as_fit`): the learner values
        (leak, alpha) of each participant, and the participants the fit left
        out, who are left out here too (the notes name them).
    models : sequence of str or ModelSpec, optional
        The learner models (default :func:`default_event_models`).
    n_jobs : int, default 1
        Processes over batches of participants; the files do not depend on it.
    progress : bool, optional
        Participants written, on stderr (:func:`foretell.progress.shown`: True a bar on a
        terminal and plain lines otherwise; None only on a terminal).
    fixed : mapping, optional
        Learner values for models the fits do not cover (e.g. ``{"leak": 0.2}``).
    stimulus_duration : float, optional
        Seconds a stimulus stays on screen, when the design fixes it.

    Returns
    -------
    EventsResult

    Raises
    ------
    UsageError
        For bad options, or a leaky model whose leak is neither fitted nor fixed.

    Notes
    -----
    File names: ``sub-<label>[_ses-<label>]_task-<label>_events.tsv`` with
    labels from :func:`foretell.steps.bids.bids_labels`; the ``ses-`` entity appears in every file
    when the log holds more than one session, in none otherwise (BIDS,
    "Common principles: filesystem structure"). Rows: the events of every
    trial (guess designs: ``guess`` at the guess prompt ``onset`` and
    ``reveal`` at ``reveal_onset``; reaction designs: ``stimulus`` at
    ``onset``), sorted by onset; ties, and rows whose onset is n/a, keep trial
    order. Columns: ``onset`` (s, copied from the log: it must be on the
    recording's clock), ``duration`` (the guess lasts until the response; the
    stimulus ``stimulus_duration``; else n/a), ``trial_type``,
    ``response_time``, ``stimulus``, ``response``, ``block``, ``trial``,
    ``context`` (the source's true context), ``missed``, ``rt_ok`` (1/0), then
    per model ``<quantity>_<model>`` (:func:`column_name`) for the quantities
    of :func:`foretell.regressors.regressors` and the learner's ``context``.
    Both rows of a trial carry that trial's values, except the quantities of
    :data:`AFTER_STIMULUS`, n/a on the rows of :data:`BEFORE_STIMULUS`: a
    guess-locked analysis must not see the symbol's surprise before it is
    revealed. The sidecars say when each quantity is known.

    Examples
    --------
    >>> events = export_events("study.csv", "lantern-relay", fit="results/")  # doctest: +SKIP
    >>> foretell.write("events/", events)  # doctest: +SKIP
    """
    from foretell.folders import as_fit

    task = as_task(task)
    log = as_log(log, task)
    n_jobs = check_n_jobs(n_jobs)
    if stimulus_duration is not None and not (isinstance(stimulus_duration, (int, float))
                                              and math.isfinite(stimulus_duration) and stimulus_duration >= 0):
        raise UsageError(f"stimulus_duration must be a number of seconds >= 0, got {stimulus_duration!r}")
    fitted = as_fit(fit, log, task)
    keep, notes = kept_by_fit(log, None if fitted is None else fitted.excluded)
    notes = [*notes, *(reuse_notes(fitted) if fitted is not None else ())]
    log = replace(log, frame=log.frame[keep].reset_index(drop=True))
    specs = model_specs(models if models is not None else default_event_models(task, fitted), task)
    labels, task_label = file_labels(log.frame, task.name)
    kinds = EVENTS[design(task)]
    notes += label_notes(labels, task.name, task_label)
    notes += [f"the log has no {col} column: every {kind} row has onset n/a; EEG alignment "
              f"needs the {kind} onsets on the recording's clock"
              for kind, col in kinds if col not in log.frame.columns]
    files, sidecars = {}, {}
    for batch_files, batch_sidecars, batch_notes in _run_batches(
            log, task, specs, labels, task_label, fits=None if fitted is None else fitted.fits, fixed=fixed,
            stimulus_duration=stimulus_duration, n_jobs=n_jobs, progress=progress):
        files |= batch_files
        sidecars |= batch_sidecars
        notes += batch_notes
    settings = {"task": task.name, "models": [s.model_id for s in specs], "fit": fitted is not None,
                "fixed": dict(fixed or {}), "stimulus_duration": stimulus_duration}
    return EventsResult(task=task, specs=tuple(specs), settings=settings, notes=tuple(dict.fromkeys(notes)),
                        files=files, sidecars=sidecars, labels=labels, task_label=task_label)


def _run_batches(log: ValidatedLog, task: Task, specs: Sequence[ModelSpec], labels: pd.DataFrame,
                 task_label: str, *, fits: pd.DataFrame | None, fixed: Mapping[str, float] | None,
                 stimulus_duration: float | None, n_jobs: int, progress: bool | None):
    """Yield (files, sidecars, notes) of consecutive batches of participants, in log order."""
    participant = log.frame["participant"].to_numpy()
    starts = np.flatnonzero(np.r_[True, participant[1:] != participant[:-1]]) if len(participant) else []
    stops = np.r_[starts[1:], len(participant)] if len(participant) else []
    sizes = [int(b - a) for a, b in zip(starts, stops)]
    ranges = batches(sizes, job_count(n_jobs), _CHUNK_TRIALS)
    jobs = (delayed(_export_batch)(replace(log, frame=log.frame.iloc[starts[a]:stops[b - 1]]
                                           .reset_index(drop=True)),
                                   task, specs, labels, task_label, fits, fixed, stimulus_duration)
            for a, b in ranges)
    with workers_stopped(n_jobs):
        with Parallel(n_jobs=job_count(n_jobs), return_as="generator") as parallel, \
                stage("events", "participants written", len(sizes), progress) as bar:
            for (a, b), out in zip(ranges, parallel(jobs)):
                bar.advance(b - a)
                yield out


def _export_batch(log: ValidatedLog, task: Task, specs: Sequence[ModelSpec], labels: pd.DataFrame,
                  task_label: str, fits: pd.DataFrame | None, fixed: Mapping[str, float] | None,
                  stimulus_duration: float | None) -> tuple[dict, dict, list[str]]:
    """Return the events files, sidecars and notes of a batch of whole participants."""
    trials, models_used, values = trial_table(log, task, specs, fits=fits, fixed=fixed)
    kinds = EVENTS[design(task)]
    files, sidecars, notes = {}, {}, []
    mine = labels[labels["participant"].isin(log.frame["participant"].unique())]
    for row in mine.itertuples(index=False):
        at = ((trials["participant"] == row.participant) & (trials["session"] == row.session))
        table = _events(trials[at.to_numpy()], kinds, models_used, _quantities(task), stimulus_duration)
        name = f"sub-{row.bids_label}" + ("" if pd.isna(row.bids_session) else f"_ses-{row.bids_session}")
        name += f"_task-{task_label}_events"
        files[name + ".tsv"] = table
        sidecars[name + ".json"] = events_sidecar(table, task, models_used, _quantities(task),
                                                 values.get(row.participant, {}), _known_later(task))
        no_onset = int(table["onset"].isna().sum())
        if no_onset and all(col in log.frame.columns for _, col in kinds):
            notes.append(f"participant {row.participant}, session {block_label(row.session)}: "
                         f"{plural(no_onset, 'event')} without an onset (n/a)")
    return files, sidecars, notes


def trial_table(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None,
                *, fits: pd.DataFrame | None = None, fixed: Mapping[str, float] | None = None
                ) -> tuple[pd.DataFrame, list[str], dict[str, dict[str, dict[str, object]]]]:
    """Return one row per trial of the log with every model's quantities.

    Parameters
    ----------
    log : ValidatedLog
    task : Task
    models : sequence of str or ModelSpec, optional
    fits : pandas.DataFrame, optional
        Fitted learner values (:func:`foretell.regressors.learner_values`).
    fixed : mapping, optional

    Returns
    -------
    trials : pandas.DataFrame
        In log order: participant, session, block, trial, stimulus, response,
        rt, onset and reveal_onset (s, NaN when the log has none), missed,
        rt_ok, context (the source's true context, NA where undetermined),
        then ``<quantity>_<model>`` (:func:`foretell.steps.bids.column_name`)
        for the regressors of :func:`foretell.regressors.regressors`
        (guess_prob only in guess designs) and the learner's context.
    models : list of str
        The model ids.
    values : dict
        participant -> model -> learner values (leak, alpha: NaN where the
        model has none) and params_from, as the regressors used them.
    """
    table = regressors(log, task, models, fits=fits, fixed=fixed)
    frame = log.frame
    n = len(frame)
    out = pd.DataFrame({
        "participant": frame["participant"].to_numpy(), "session": frame["session"].to_numpy(),
        "block": frame["block"].to_numpy(), "trial": frame["trial"].to_numpy(),
        "stimulus": frame["stimulus"].to_numpy(), "response": frame["response"].to_numpy(),
        "rt": frame["rt"].to_numpy(float),
        **{c: frame[c].to_numpy(float) if c in frame.columns else np.full(n, np.nan)
           for c in ("onset", "reveal_onset")},
        "missed": frame["missed"].to_numpy(bool), "rt_ok": frame["rt_ok"].to_numpy(bool),
        "context": _true_contexts(frame, task)})
    ids = [str(m) for m in table["model"].cat.categories]
    quantities = _quantities(task)
    model = table["model"].to_numpy()
    columns = {}
    for m in ids:
        rows = table[model == m]  # regressors: participant by participant, trials in log order
        columns |= {column_name(q, m): rows[q].to_numpy() for q in quantities if q != "context"}
        columns[column_name("context", m)] = rows["context"].astype(object).to_numpy()
    firsts = table.drop_duplicates(["participant", "model"])
    values: dict[str, dict[str, dict[str, object]]] = {}
    for row in firsts.itertuples(index=False):
        values.setdefault(row.participant, {})[str(row.model)] = {
            "leak": row.leak, "alpha": row.alpha, "params_from": row.params_from}
    return pd.concat([out, pd.DataFrame(columns)], axis=1), ids, values


def _known_later(task: Task) -> tuple[str, ...]:
    """Return the quantities n/a on some rows of a task's events files (those shown before the stimulus)."""
    return AFTER_STIMULUS if any(kind in BEFORE_STIMULUS for kind, _ in EVENTS[design(task)]) else ()


def after_stimulus(models: Sequence[str]) -> list[str]:
    """Return the columns of the :data:`AFTER_STIMULUS` quantities of ``models``.

    Parameters
    ----------
    models : sequence of str

    Returns
    -------
    list of str
    """
    return [column_name(q, m) for m in models for q in AFTER_STIMULUS]


def _quantities(task: Task) -> tuple[str, ...]:
    """Return the per-model quantities of a task's design (guess_prob only where guesses are made)."""
    return tuple(q for q in REGRESSORS if design(task) == "guess" or q != "guess_prob") + ("context",)


def _true_contexts(frame: pd.DataFrame, task: Task) -> np.ndarray:
    """Return the source's context label of every trial (None where the task gives no source or the past is short)."""
    out = np.full(len(frame), None, dtype=object)
    if not task.has_source:
        return out
    names = np.array([task.context_label(c) for c in task.contexts] + [None], dtype=object)
    keys = frame["participant"].astype(str) + "\x00" + frame["session"].astype(str)
    for _, idx in frame.groupby(keys.to_numpy(), sort=False).indices.items():
        out[idx] = names[task.context_indices(frame["stimulus_idx"].to_numpy()[idx])]
    return out


def _events(trials: pd.DataFrame, kinds: tuple[tuple[str, str], ...], models: list[str],
            quantities: tuple[str, ...], stimulus_duration: float | None) -> pd.DataFrame:
    """Return the events table of one participant x session: rows of every trial's events, by onset."""
    n, k = len(trials), len(kinds)
    take = np.repeat(np.arange(n), k)
    kind = np.tile(np.arange(k), n)
    onset = np.stack([trials[col].to_numpy(float) for _, col in kinds], axis=1).ravel()
    rt = trials["rt"].to_numpy(float)[take]
    first = kind == 0
    names = np.array([name for name, _ in kinds], dtype=object)[kind]
    shown = np.nan if stimulus_duration is None else float(stimulus_duration)
    duration = np.where(names == "guess", rt, shown)
    key = pd.Series(onset).ffill().fillna(-np.inf).to_numpy()
    order = np.lexsort((np.arange(n * k), key))
    rows = trials.iloc[take].reset_index(drop=True)
    table = pd.DataFrame({
        "onset": onset, "duration": duration,
        "trial_type": names,
        "response_time": np.where(first, rt, np.nan),
        "stimulus": rows["stimulus"].to_numpy(), "response": rows["response"].to_numpy(),
        "block": rows["block"].to_numpy(), "trial": rows["trial"].to_numpy(),
        "context": rows["context"].to_numpy(),
        "missed": rows["missed"].to_numpy().astype(np.int64),
        "rt_ok": rows["rt_ok"].to_numpy().astype(np.int64)})
    for col in (column_name(q, m) for m in models for q in quantities):
        values = rows[col]
        table[col] = values.astype("Int64") if col.startswith("prev_correct_") else values.to_numpy()
    table.loc[np.isin(names, BEFORE_STIMULUS), after_stimulus(models)] = np.nan
    return table.iloc[order].reset_index(drop=True)
