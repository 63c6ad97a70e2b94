"""The files of the events step: BIDS labels, tab-separated tables with n/a, JSON sidecars describing every column."""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from foretell.bids import MISSING
from foretell.errors import UsageError
from foretell.labels import ROOT, block_label
from foretell.regressors import IN_BITS
from foretell.tasks import Task

BIT = "bit"
"""The unit of entropy and surprise (IEC 80000-13 symbol)."""
_NOT_LABEL = re.compile(r"[^0-9A-Za-z]+")


def bids_labels(ids: Iterable[object], empty: str = "x") -> dict[str, str]:
    """Return id -> a BIDS label (ASCII letters and digits only), unique, deterministic.

    Parameters
    ----------
    ids : iterable
        Participant ids, session labels or a task name (as text).
    empty : str, default "x"
        The stem of the label of an id with no letter or digit.

    Returns
    -------
    dict of str to str

    Notes
    -----
    Each id loses every character that is not an ASCII letter or digit (BIDS,
    "Common principles: entities": labels are alphanumeric). Labels are
    compared ignoring letter case, since case-insensitive file systems would
    merge ``sub-Ab`` and ``sub-ab``. An id that already is its label keeps it;
    otherwise, within a set of ids sharing a label, the first in sorted order
    keeps it when nobody has it, and the others get the label followed by "x"
    and the smallest counter 2, 3, ... that no other label uses; ids left
    empty get ``empty`` and the smallest free counter 1, 2, ...

    Examples
    --------
    >>> bids_labels(["p-01", "p_01", "lantern"])
    {'lantern': 'lantern', 'p-01': 'p01', 'p_01': 'p01x2'}
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


def column_name(quantity: str, model_id: str) -> str:
    """Return the column of a model's quantity in an events table.

    Parameters
    ----------
    quantity : str
        entropy, surprise, guess_prob, prev_surprise, prev_correct or context.
    model_id : str

    Returns
    -------
    str
        "<quantity>_<model id with every run of other characters than letters and digits as '_'>".

    Examples
    --------
    >>> column_name("entropy", "count-1-leak")
    'entropy_count_1_leak'
    """
    return f"{quantity}_{_NOT_LABEL.sub('_', model_id)}"


def to_tsv(frame: pd.DataFrame) -> bytes:
    """Return ``frame`` as a BIDS tabular file: UTF-8, tab-separated, a header row, n/a for missing values.

    Parameters
    ----------
    frame : pandas.DataFrame

    Returns
    -------
    bytes
        Numbers that are not finite (an infinite surprise) are n/a, and -0.0
        is written 0.0: a BIDS file holds numbers or n/a (BIDS, "Common
        principles: tabular files").

    Raises
    ------
    UsageError
        When a text cell holds a tab or a line break (TSV has no quoting).
    """
    text = frame.select_dtypes(exclude="number")
    for col in text.columns:
        values = text[col].dropna().astype(str)
        if values.str.contains(r"[\t\r\n]").any():
            raise UsageError(f"column {col!r} holds a tab or a line break, which a TSV file "
                             "cannot carry")
    clean = frame.copy()
    for col in frame.select_dtypes(include="floating").columns:
        values = frame[col].to_numpy(float)
        clean[col] = np.where(np.isfinite(values), values + 0.0, np.nan)  # -0.0 + 0.0 is 0.0
    return clean.to_csv(sep="\t", na_rep=MISSING, index=False, lineterminator="\n").encode("utf-8")


def sidecar_json(d: Mapping[str, Any]) -> bytes:
    """Return a sidecar as UTF-8 JSON text (2-space indent, key order kept).

    Parameters
    ----------
    d : mapping
        Column -> description (:func:`events_sidecar`).

    Returns
    -------
    bytes

    Raises
    ------
    ValueError
        For a NaN or infinity (JSON has none).
    """
    return (json.dumps(d, indent=2, ensure_ascii=False, allow_nan=False) + "\n").encode("utf-8")


def events_sidecar(table: pd.DataFrame, task: Task, models: Sequence[str], quantities: Sequence[str],
                   values: Mapping[str, Mapping[str, object]], later: Sequence[str] = ()) -> dict:
    """Return the column descriptions of one events table (BIDS, "Task events": LongName, Description, Levels, Units).

    Parameters
    ----------
    table : pandas.DataFrame
        The events table (its learner contexts become the Levels of ``context_<model>``).
    task : Task
    models : sequence of str
        The model ids of the table's model columns.
    quantities : sequence of str
        The per-model quantities.
    values : mapping
        Model id -> the learner values it used (leak, alpha, params_from).
    later : sequence of str
        Quantities known only when the symbol is revealed: n/a on guess rows.
        Empty in designs without guess rows.

    Returns
    -------
    dict
        Column -> description, in the table's column order. Every per-model
        description says when its value is known.
    """
    symbols = {s: f"the symbol {s!r}" for s in task.symbols}
    kinds = {"guess": "the guess prompt: the participant guesses the next symbol",
             "reveal": "the reveal of the symbol that came",
             "stimulus": "the stimulus the participant responds to"}
    flag = {"0": "no", "1": "yes"}
    shown = (" On guess rows it labels the trial: the participant sees it only at the reveal."
             if "guess" in set(table["trial_type"]) else "")
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
        "stimulus": _col("Stimulus", "The symbol shown on this trial." + shown, levels=symbols),
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
        for q in quantities:
            col = column_name(q, m)
            out[col] = _model_col(q, m, values.get(m, {}), table[col], later)
    return out


def _values_text(values: Mapping[str, object]) -> str:
    """Return " Learner values: leak 0.2, alpha 0.5 (from fits)." for the values a model used ("" when none)."""
    shown = [f"{k} {v:g}" for k, v in values.items() if k != "params_from" and math.isfinite(v)]
    return f" Learner values: {', '.join(shown)} (from {values['params_from']})." if shown else ""


_QUANTITY_TEXT = {
    "entropy": ("Prediction entropy", "Entropy (bits) of the {l}'s prediction of this trial's "
                "symbol, made from the earlier trials of the session: -sum_a p_a log2 p_a."),
    "surprise": ("Surprise", "Surprise (bits) of this trial's symbol under the {l}'s "
                 "prediction: -log2 p(symbol); n/a where the learner gave the symbol probability 0 "
                 "(an infinite surprise: the task's source makes such a sequence impossible)."),
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
               values: pd.Series, later: Sequence[str]) -> dict:
    """Return the description of one model column (levels: the learner contexts in ``values``)."""
    long_name, text = _QUANTITY_TEXT[quantity]
    levels = None
    if quantity == "context":
        levels = {c: "a context the learner used" for c in sorted(values.dropna().unique())}
    elif quantity == "prev_correct":
        levels = {"0": "incorrect", "1": "correct"}
    if not later:
        known = ""
    elif quantity in later:
        known = " Known only once the symbol is revealed: n/a on guess rows."
    else:
        known = " Already known at the guess prompt, before the symbol is revealed: the same on both rows."
    return _col(f"{long_name}, {model_id}",
                text.format(l=f"learner model {model_id}") + known + _values_text(learner_values),
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




def file_labels(frame: pd.DataFrame, task_name: str) -> tuple[pd.DataFrame, str]:
    """Return the BIDS labels of a log's participants and sessions, and of its task.

    Parameters
    ----------
    frame : pandas.DataFrame
        participant, session (a validated log's frame).
    task_name : str

    Returns
    -------
    labels : pandas.DataFrame
        participant, session, bids_label, bids_session (NA when the log has
        one session: the file names then carry no session), one row per
        participant x session in log order.
    task_label : str
    """
    pairs = frame[["participant", "session"]].drop_duplicates().reset_index(drop=True)
    subjects = bids_labels(pairs["participant"])
    sessions = pairs["session"].unique()
    session_labels = bids_labels(block_label(s) for s in sessions) if len(sessions) > 1 else {}
    pairs["bids_label"] = pairs["participant"].astype(str).map(subjects)
    pairs["bids_session"] = pd.array([session_labels.get(block_label(s)) for s in pairs["session"]],
                                     dtype="str")
    return pairs, bids_labels([task_name], empty="task")[task_name]


def label_notes(labels: pd.DataFrame, task_name: str, task_label: str) -> list[str]:
    """Return a note for every label that needed a counter (two ids shared it, or it was empty).

    Parameters
    ----------
    labels : pandas.DataFrame
        :func:`file_labels`.
    task_name, task_label : str

    Returns
    -------
    list of str
    """
    shared = [f"{p} -> {b}" for p, b in labels[["participant", "bids_label"]].drop_duplicates()
              .itertuples(index=False) if _NOT_LABEL.sub("", str(p)).lower() != b.lower()]
    out = []
    if shared:
        out.append("participant ids that lose their last distinguishing characters as BIDS labels "
                   f"(letters and digits only) got a counter: {', '.join(shared)}; see labels")
    if not _NOT_LABEL.sub("", task_name):
        out.append(f"the task name {task_name!r} has no letter or digit: its BIDS label is "
                   f"{task_label!r}")
    return out
