"""EEG-ready event files: per-trial events and learner quantities as BIDS events tables.

An events file lists, per participant and session, the guess prompt and the
reveal of every trial with their onsets, the response time, the source's true
context and every learner model's per-trial quantities (from
:func:`foretell.regressors.regressors`), so single-trial EEG analyses can line
them up with the recording (BIDS specification, "Task events" and "Common
principles: tabular files"). :func:`to_metadata` gives the same quantities as
one row per trial for an ``mne.Epochs`` object.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pandas as pd

from foretell.errors import UsageError
from foretell.labels import ROOT, block_label
from foretell.logs import ValidatedLog
from foretell.models import ModelSpec
from foretell.regressors import IN_BITS, REGRESSORS, design, regressors
from foretell.tasks import Task
from foretell.text import plural

MISSING = "n/a"
"""How a missing value is written in an events file (BIDS, "Common principles: tabular files")."""
BIT = "bit"
"""The unit of entropy and surprise (IEC 80000-13 symbol)."""
TIMING_TOLERANCE = 0.02
"""Seconds two inter-event intervals (EEG events vs the log's onsets) may differ by in :func:`to_metadata`."""
EVENTS = {"guess": (("guess", "onset"), ("reveal", "reveal_onset")),
          "reaction": (("stimulus", "onset"),)}
"""Per task design, the events of one trial in time order: (trial_type, the log column of its onset)."""
_NOT_LABEL = re.compile(r"[^0-9A-Za-z]+")


@dataclass(frozen=True)
class EventFiles:
    """The BIDS events files of a log, ready to write.

    ``files``: file name -> events table (BIDS column order; write with
    :func:`to_tsv`); ``sidecars``: file name -> column descriptions (write
    with :func:`sidecar_json`); ``labels``: participant, session, bids_label,
    bids_session (NA when the file names carry no session), one row per
    participant x session; ``task_label``: the task's BIDS label;
    ``warnings``: what the caller should tell the user (plain strings).
    """

    files: Mapping[str, pd.DataFrame]
    sidecars: Mapping[str, dict]
    labels: pd.DataFrame
    task_label: str
    warnings: tuple[str, ...] = ()


def bids_labels(ids: Iterable[object], empty: str = "x") -> dict[str, str]:
    """Return id -> a BIDS label (ASCII letters and digits only), unique, deterministic.

    Each id (as text) loses every character that is not an ASCII letter or
    digit (BIDS, "Common principles: entities": labels are alphanumeric).
    Labels are compared ignoring letter case, since case-insensitive file
    systems would merge ``sub-Ab`` and ``sub-ab``. An id that already is its
    label keeps it; otherwise, within a set of ids sharing a label, the first
    in sorted order keeps it when nobody has it, and the others get the label
    followed by "x" and the smallest counter 2, 3, ... that no other label
    uses; ids left empty get ``empty`` and the smallest free counter 1, 2, ...
    """
    texts = sorted({str(i) for i in ids})
    base = {t: _NOT_LABEL.sub("", t) for t in texts}
    owners: dict[str, list[str]] = {}
    for t in texts:
        if base[t]:
            owners.setdefault(base[t].lower(), []).append(t)
    out: dict[str, str] = {}
    for group in owners.values():
        keeper = next((t for t in group if t == base[t]), group[0])
        out[keeper] = base[keeper]
    taken = {b.lower() for b in base.values() if b}
    for t in texts:
        if t in out:
            continue
        stem = f"{base[t]}x" if base[t] else empty
        k = 2 if base[t] else 1
        while f"{stem}{k}".lower() in taken:
            k += 1
        out[t] = f"{stem}{k}"
        taken.add(out[t].lower())
    return out


def events_tables(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None,
                  *, fits: pd.DataFrame | None = None, fixed: Mapping[str, float] | None = None,
                  stimulus_duration: float | None = None) -> EventFiles:
    """Return the BIDS events files (:class:`EventFiles`) of every participant and session.

    File names: ``sub-<label>[_ses-<label>]_task-<label>_events.tsv`` with
    labels from :func:`bids_labels`; the ``ses-`` entity appears in every
    file when the log holds more than one distinct session number, in none
    otherwise (BIDS, "Common principles: filesystem structure": a session
    level is optional when there is one session).

    Rows: the events of every trial (guess designs: ``guess`` at the guess
    prompt ``onset`` and ``reveal`` at ``reveal_onset``; reaction designs:
    ``stimulus`` at ``onset``), sorted by onset; ties, and rows whose onset is
    n/a, keep trial order (a row without an onset follows the row before it).
    Columns: ``onset`` (s, copied from the log: it must be on the recording's
    clock), ``duration`` (s: the guess lasts until the response, rt; the
    stimulus ``stimulus_duration`` when the design fixes it; else n/a),
    ``trial_type``, ``response_time`` (s from the event's onset, on the guess
    or the reaction-design stimulus row; n/a when missed), ``stimulus``,
    ``response``, ``block``, ``trial``, ``context`` (the source's true context,
    labels oldest first joined by '-', root '*'; n/a where the task gives no
    source or the past is too short), ``missed``, ``rt_ok`` (1/0), then per
    model ``<quantity>_<model>`` (model id with '-' as '_') for the
    quantities of :func:`foretell.regressors.regressors` and the learner's
    ``context``. Both rows of a trial carry that trial's values. Leaky
    models need their leak in ``fits`` or ``fixed`` (the regressors'
    UsageError says so).
    """
    if stimulus_duration is not None and not (math.isfinite(stimulus_duration)
                                              and stimulus_duration >= 0):
        raise UsageError(f"stimulus_duration must be a number of seconds >= 0, got "
                         f"{stimulus_duration!r}")
    trials, models_used, values = _trials(log, task, models, fits=fits, fixed=fixed)
    labels, task_label = _labels(log, task)
    kinds = EVENTS[design(task)]
    warnings = [*_label_warnings(labels, task, task_label)]
    warnings += [f"the log has no {col} column: every {kind} row has onset n/a; EEG alignment "
                 f"needs the {kind} onsets on the recording's clock"
                 for kind, col in kinds if col not in log.frame.columns]
    files: dict[str, pd.DataFrame] = {}
    sidecars: dict[str, dict] = {}
    for row in labels.itertuples(index=False):
        at = ((trials["participant"] == row.participant) & (trials["session"] == row.session))
        table = _events(trials[at.to_numpy()], kinds, models_used, _quantities(task),
                        stimulus_duration)
        name = f"sub-{row.bids_label}" + ("" if pd.isna(row.bids_session)
                                          else f"_ses-{row.bids_session}")
        name += f"_task-{task_label}_events"
        files[name + ".tsv"] = table
        sidecars[name + ".json"] = _sidecar(table, task, models_used,
                                            values.get(row.participant, {}))
        no_onset = int(table["onset"].isna().sum())
        if no_onset and all(col in log.frame.columns for _, col in kinds):
            warnings.append(f"participant {row.participant}, session {block_label(row.session)}: "
                            f"{plural(no_onset, 'event')} without an onset (n/a)")
    return EventFiles(files, sidecars, labels, task_label, tuple(warnings))


def _trials(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None,
            *, fits: pd.DataFrame | None = None, fixed: Mapping[str, float] | None = None
            ) -> tuple[pd.DataFrame, list[str], dict[str, dict[str, dict[str, object]]]]:
    """Return (one row per trial in log order, the model ids, participant -> model -> learner values).

    Columns: participant, session, block, trial, stimulus, response, rt,
    onset and reveal_onset (s, NaN when the log has none), missed, rt_ok,
    context (the source's true context, NA where undetermined), then
    ``<quantity>_<model>`` (see :func:`column_name`) for the regressors of
    :func:`foretell.regressors.regressors` (guess_prob only in guess designs)
    and the learner's context. Learner values: leak, alpha (NaN where the
    model has none) and params_from, as :func:`foretell.regressors.regressors` used them.
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


def column_name(quantity: str, model_id: str) -> str:
    """Return the column of a model's quantity: "<quantity>_<model id, '-' as '_'>", e.g. entropy_count_1."""
    return f"{quantity}_{_NOT_LABEL.sub('_', model_id)}"


def to_tsv(frame: pd.DataFrame) -> bytes:
    """Return ``frame`` as UTF-8 tab-separated text: a header row, n/a for missing values, no index.

    BIDS, "Common principles: tabular files". Text cells may not hold tabs or
    line breaks (TSV has no quoting).
    """
    text = frame.select_dtypes(exclude="number")
    for col in text.columns:
        values = text[col].dropna().astype(str)
        if values.str.contains(r"[\t\r\n]").any():
            raise UsageError(f"column {col!r} holds a tab or a line break, which a TSV file "
                             "cannot carry")
    return frame.to_csv(sep="\t", na_rep=MISSING, index=False, lineterminator="\n").encode("utf-8")


def sidecar_json(d: Mapping[str, Any]) -> bytes:
    """Return a sidecar as UTF-8 JSON text (2-space indent, key order kept, no NaN)."""
    return (json.dumps(d, indent=2, ensure_ascii=False, allow_nan=False) + "\n").encode("utf-8")


def to_metadata(log: ValidatedLog, task: Task, events: Any, *, participant: str,
                session: int | None = None, models: Sequence[str | ModelSpec] | None = None,
                fits: pd.DataFrame | None = None, fixed: Mapping[str, float] | None = None,
                locked: str = "guess", sfreq: float | None = None,
                tolerance: float | None = TIMING_TOLERANCE) -> pd.DataFrame:
    """Return one row per epoch of the trial quantities, for ``epochs.metadata``.

    ``events``: an ``mne.Epochs`` (or any ``mne.BaseEpochs``) or an MNE
    events array (n, 3) (first column: sample numbers), one event per trial of
    ``participant``'s ``session`` (optional when they have one), locked to
    ``locked`` (guess designs "guess" or "reveal"; reaction designs
    "stimulus"). Trials are matched by order within the session. Epochs
    dropped after creation are matched through ``epochs.selection`` when
    ``epochs.drop_log`` counts the session's trials. With the sampling rate
    (from the epochs, or ``sfreq``) and onsets in the log, each interval
    between consecutive events must match the log's within ``tolerance``
    seconds (None: no check), which catches a missing and an extra trigger
    that leave the count unchanged.

    Columns: participant, session, block, trial, event (= ``locked``),
    log_onset (s, the event's onset on the log's clock), stimulus, response,
    rt, missed, rt_ok, context and the model columns of :func:`events_tables`.
    Raises UsageError when the counts or the timing disagree.
    """
    kinds = dict(EVENTS[design(task)])
    if locked not in kinds:
        raise UsageError(f"locked must be one of {', '.join(kinds)} for this task, got {locked!r}")
    samples, sfreq, selection, n_created = _event_samples(events, sfreq)
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
    trials, _, _ = _trials(replace(log, frame=mine.reset_index(drop=True)), task, models,
                            fits=fits, fixed=fixed)
    n_trials = len(trials)
    if len(samples) == n_trials:
        rows = np.arange(n_trials)
    elif selection is not None and n_created == n_trials:
        rows = np.asarray(selection, dtype=np.int64)
    else:
        raise UsageError(
            f"{plural(len(samples), 'EEG event')} but {plural(n_trials, 'trial')} of participant "
            f"{participant}, session {block_label(session)} in the log: events and trials are "
            "matched one to one, in order (give only the events locked to one kind of event, "
            "and attach metadata before dropping epochs, or keep their drop_log)")
    trials = trials.iloc[rows].reset_index(drop=True)
    onset = trials[kinds[locked]].to_numpy(float)
    if tolerance is not None and sfreq is not None:
        _check_timing(samples / sfreq, onset, trials["trial"].to_numpy(), tolerance)
    keys = ["participant", "session", "block", "trial"]
    rest = [c for c in trials.columns if c not in keys + ["onset", "reveal_onset"]]
    out = trials[keys].assign(event=locked, log_onset=onset)
    return pd.concat([out, trials[rest]], axis=1)


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


def _labels(log: ValidatedLog, task: Task) -> tuple[pd.DataFrame, str]:
    """Return (participant, session, bids_label, bids_session per participant x session; the task label)."""
    pairs = log.frame[["participant", "session"]].drop_duplicates().reset_index(drop=True)
    subjects = bids_labels(pairs["participant"])
    sessions = pairs["session"].unique()
    session_labels = bids_labels(block_label(s) for s in sessions) if len(sessions) > 1 else {}
    pairs["bids_label"] = pairs["participant"].astype(str).map(subjects)
    pairs["bids_session"] = pd.array([session_labels.get(block_label(s)) for s in pairs["session"]],
                                     dtype="str")
    return pairs, bids_labels([task.name], empty="task")[task.name]


def _label_warnings(labels: pd.DataFrame, task: Task, task_label: str) -> list[str]:
    """Return a warning for every label that needed a counter (two ids shared it, or it was empty)."""
    shared = [f"{p} -> {b}" for p, b in labels[["participant", "bids_label"]].drop_duplicates()
              .itertuples(index=False) if _NOT_LABEL.sub("", str(p)).lower() != b.lower()]
    out = []
    if shared:
        out.append("participant ids that lose their last distinguishing characters as BIDS labels "
                   f"(letters and digits only) got a counter: {', '.join(shared)}; see labels")
    if not _NOT_LABEL.sub("", task.name):
        out.append(f"the task name {task.name!r} has no letter or digit: its BIDS label is "
                   f"{task_label!r}")
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
    return table.iloc[order].reset_index(drop=True)


def _sidecar(table: pd.DataFrame, task: Task, models: list[str],
             values: Mapping[str, Mapping[str, object]]) -> dict:
    """Return the column descriptions of one events table (BIDS, "Task events": LongName, Description, Levels, Units)."""
    symbols = {s: f"the symbol {s!r}" for s in task.symbols}
    kinds = {"guess": "the guess prompt: the participant guesses the next symbol",
             "reveal": "the reveal of the symbol that came",
             "stimulus": "the stimulus the participant responds to"}
    flag = {"0": "no", "1": "yes"}
    out: dict[str, dict] = {
        "onset": _col("Event onset", "Onset of the event in seconds, copied from the response "
                      "log; BIDS measures onsets from the first sample of the recording, so the "
                      "log's clock must be the recording's.", units="s"),
        "duration": _col("Event duration", "Duration of the event in seconds: a guess prompt "
                         "lasts until the response (the reaction time); n/a when unknown.",
                         units="s"),
        "trial_type": _col("Event type", "Which event of the trial the row marks.",
                           levels={t: kinds[t] for t in dict.fromkeys(table["trial_type"])}),
        "response_time": _col("Response time", "Seconds from the event's onset to the response; "
                              "n/a when the response was missed or on rows the response does "
                              "not belong to.", units="s"),
        "stimulus": _col("Stimulus", "The symbol shown on this trial (both rows of a trial carry "
                         "the trial's values).", levels=symbols),
        "response": _col("Response", "The symbol the participant chose; n/a when missed.",
                         levels=symbols),
        "block": _col("Block", "Block number within the session, as in the response log."),
        "trial": _col("Trial", "Trial number, as in the response log."),
        "context": _col("Source context", "The context of the stimulus source that generated "
                        "this trial's symbol: the most recent symbols, oldest first, joined by "
                        f"'-' ('{ROOT}' = the empty context); n/a where the task gives no source "
                        "or the past is too short.",
                        levels={task.context_label(c): "a context of the source"
                                for c in task.contexts} or None),
        "missed": _col("Missed response", "1 when no response was made on this trial.",
                       levels=flag),
        "rt_ok": _col("Reaction time usable", "1 when the reaction time passed foretell's RT "
                      "screen; trials that fail it are kept, flagged.", levels=flag),
    }
    for m in models:
        for q in _quantities(task):
            col = column_name(q, m)
            out[col] = _model_col(q, m, values.get(m, {}), table[col])
    return out


def _values_text(values: Mapping[str, object]) -> str:
    """Return " Learner values: leak 0.2, alpha 0.5 (from fits)." for the values a model used ("" when none)."""
    shown = [f"{k} {v:g}" for k, v in values.items() if k != "params_from" and math.isfinite(v)]
    return f" Learner values: {', '.join(shown)} (from {values['params_from']})." if shown else ""


_QUANTITY_TEXT = {
    "entropy": ("Prediction entropy", "Entropy (bits) of the {l}'s prediction of this trial's "
                "symbol, made from the earlier trials of the session: -sum_a p_a log2 p_a."),
    "surprise": ("Surprise", "Surprise (bits) of this trial's symbol under the {l}'s "
                 "prediction: -log2 p(symbol)."),
    "guess_prob": ("Guess probability", "Probability the {l} gave to the symbol guessed; n/a "
                   "when missed."),
    "prev_surprise": ("Previous surprise", "Surprise (bits) of the previous trial's symbol "
                      "under the {l}; n/a on a session's first trial."),
    "prev_correct": ("Previous guess correct", "1 when the previous trial's response was the "
                     "symbol that came, 0 when not; n/a on a session's first trial and after a "
                     "missed response."),
    "context": ("Learner context", "The context the {l} predicted this trial from (symbols "
                f"oldest first joined by '-', '{ROOT}' = none); n/a before it has a full context."),
}


def _model_col(quantity: str, model_id: str, learner_values: Mapping[str, object],
               values: pd.Series) -> dict:
    """Return the description of one model column (levels: the learner contexts in ``values``)."""
    long_name, text = _QUANTITY_TEXT[quantity]
    levels = None
    if quantity == "context":
        levels = {c: "a context the learner used" for c in sorted(values.dropna().unique())}
    elif quantity == "prev_correct":
        levels = {"0": "incorrect", "1": "correct"}
    return _col(f"{long_name}, {model_id}",
                text.format(l=f"learner model {model_id}") + _values_text(learner_values),
                units=BIT if quantity in IN_BITS else None, levels=levels)


def _col(long_name: str, description: str, *, units: str | None = None,
         levels: Mapping[str, str] | None = None) -> dict:
    """Return one column's description: LongName, Description, then Levels or Units when given."""
    out = {"LongName": long_name, "Description": description}
    if levels:
        out["Levels"] = dict(levels)
    if units is not None:
        out["Units"] = units
    return out


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
