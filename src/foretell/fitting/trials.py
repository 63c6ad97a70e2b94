"""One participant's trials, ready for the likelihood: sessions, guesses, scored trials and block units."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

FULL, FOLD, BLOCK = 0, 1, 2
"""Kinds of fit row: the whole session, a leave-one-block-out fold, a block's refit."""


@dataclass(frozen=True)
class Participant:
    """One participant's trials ordered by session, block and trial.

    Attributes
    ----------
    participant, group : object
        The participant's label and group (NA without groups).
    sessions : tuple of numpy.ndarray
        Stimulus indices of each session (learners restart at each).
    guess : numpy.ndarray
        Response index per trial, -1 when missed.
    scored : numpy.ndarray
        Indices of the scored trials: not missed and past the warm-up.
    unit : numpy.ndarray
        Block unit (one code per session x block) of every trial.
    keys : pandas.DataFrame
        session, block, trial of every trial.
    unit_labels : tuple of (session, block)
        The labels of every unit, by code.
    """

    participant: object
    group: object
    sessions: tuple[np.ndarray, ...]
    guess: np.ndarray
    scored: np.ndarray
    unit: np.ndarray
    keys: pd.DataFrame
    unit_labels: tuple[tuple[object, object], ...]

    @property
    def n_units(self) -> int:
        """Return the number of blocks (session x block units)."""
        return int(self.unit.max()) + 1

    def trials(self, kind: int, unit: int) -> np.ndarray:
        """Return the scored trials a row of ``kind`` fits (``unit``: the fold's or block's unit)."""
        if kind == FULL:
            return self.scored
        in_unit = self.unit[self.scored] == unit
        return self.scored[~in_unit if kind == FOLD else in_unit]


def prepare(frame: pd.DataFrame, warmup: int) -> list[Participant]:
    """Return every participant's prepared trials, participants in sorted order.

    Parameters
    ----------
    frame : pandas.DataFrame
        A validated log's frame (participant, session, block, trial,
        stimulus_idx, response_idx; group when present).
    warmup : int
        Unscored trials at the start of every session.

    Returns
    -------
    list of Participant
        Participants with nothing to score have an empty ``scored``.
    """
    frame = frame.sort_values(["participant", "session", "block", "trial"], kind="stable")
    out = []
    for pid, data in frame.groupby("participant", sort=False):
        session = data["session"].to_numpy()
        guess = data["response_idx"].to_numpy(np.int64)
        starts = np.flatnonzero(np.r_[True, session[1:] != session[:-1]])
        position = np.arange(len(data)) - np.repeat(starts, np.diff(np.r_[starts, len(data)]))
        keys = data[["session", "block", "trial"]].reset_index(drop=True)
        unit = keys.groupby(["session", "block"], sort=False).ngroup().to_numpy()
        first = np.unique(unit, return_index=True)[1]
        out.append(Participant(
            participant=pid, group=data["group"].iloc[0] if "group" in data.columns else pd.NA,
            sessions=tuple(np.split(data["stimulus_idx"].to_numpy(np.int64), starts[1:])),
            guess=guess, scored=np.flatnonzero((position >= warmup) & (guess >= 0)), unit=unit, keys=keys,
            unit_labels=tuple(zip(keys["session"].to_numpy()[first], keys["block"].to_numpy()[first]))))
    return out
