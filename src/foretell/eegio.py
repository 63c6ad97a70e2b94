"""Finding and reading MNE epochs files: a pattern with placeholders or a BIDS derivatives folder."""

from __future__ import annotations

import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError, Problem, UsageError
from .labels import block_label

PLACEHOLDERS = ("participant", "session", "sub", "ses")
"""Placeholders of an epochs pattern: the log's participant id and session, and their BIDS labels."""
PICKS = ("same", "common")
"""How channel sets that differ across files are handled: refused, or reduced to the channels all files have."""
INSTALL = "reading EEG epochs needs mne: pip install 'foretell[eeg]'"


def require_mne():
    """Return the mne module, or raise UsageError saying how to install it."""
    try:
        import mne
    except ImportError:
        raise UsageError(INSTALL) from None
    return mne


@dataclass(frozen=True)
class EpochsHeader:
    """What every file must share: EEG channel names, sampling rate, sample times (s); and its mne.Info."""

    path: Path
    channels: tuple[str, ...]
    sfreq: float
    times: np.ndarray
    info: object


def epochs_path(source: str | Path, labels: pd.Series) -> Path:
    """Return the epochs file of one participant x session.

    Parameters
    ----------
    source : str or pathlib.Path
        A pattern with placeholders ``{participant}``, ``{session}``, ``{sub}``
        and ``{ses}`` (e.g. ``eeg/{participant}_ses-{session}-epo.fif``), or a
        BIDS derivatives folder holding
        ``sub-<label>/[ses-<label>/]eeg/sub-<label>[_ses-<label>]_*_epo.fif``
        with the labels of :func:`foretell.steps.bids.file_labels` (the
        ``participants.csv`` mapping of the events step).
    labels : pandas.Series
        One row of that mapping: participant, session, bids_label, bids_session.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    InputError
        When no file, or more than one, matches.
    UsageError
        For a pattern with an unknown placeholder.
    """
    session = block_label(labels["session"])
    bids_session = labels["bids_session"] if pd.notna(labels["bids_session"]) else session
    text = str(source)
    if "{" in text:
        try:
            path = Path(text.format(participant=labels["participant"], session=session,
                                    sub=labels["bids_label"], ses=bids_session))
        except (KeyError, IndexError, ValueError) as err:
            raise UsageError(f"the epochs pattern {text!r} has an unknown placeholder {err}; use "
                             f"{', '.join('{' + p + '}' for p in PLACEHOLDERS)}") from None
        found = [path] if path.is_file() else []
    else:
        sub = f"sub-{labels['bids_label']}"
        ses = f"_ses-{labels['bids_session']}" if pd.notna(labels["bids_session"]) else ""
        found = sorted(Path(text).glob(f"{sub}/**/eeg/{sub}{ses}_*epo.fif"))
        path = Path(text) / sub / "eeg" / f"{sub}{ses}_*_epo.fif"
    who = f"participant {labels['participant']}, session {session}"
    if not found:
        raise InputError(Problem(f"no epochs file of {who}: give a pattern or folder that holds it",
                                 str(path)))
    if len(found) > 1:
        raise InputError(Problem(f"{len(found)} epochs files of {who} ({', '.join(f.name for f in found)}): "
                                 "keep one per participant and session", str(found[0])))
    return found[0]


def read_epochs(path: Path, who: str, *, preload: bool):
    """Return the mne.Epochs of ``path`` (``preload=False`` reads the header only).

    Raises
    ------
    InputError
        When the file cannot be read as epochs, naming the file and ``who``.
    """
    mne = require_mne()
    try:
        return mne.read_epochs(path, preload=preload, verbose="error")
    except Exception as err:  # mne raises many kinds for a damaged or foreign file
        raise InputError(Problem(f"cannot read the epochs of {who} ({type(err).__name__}: {err}); "
                                 "write them with mne.Epochs.save as *-epo.fif", str(path))) from None


def header(path: Path, who: str) -> EpochsHeader:
    """Return the :class:`EpochsHeader` of an epochs file, reading no data."""
    mne = require_mne()
    epochs = read_epochs(path, who, preload=False)
    info = mne.pick_info(epochs.info, mne.pick_types(epochs.info, eeg=True, exclude=()))
    return EpochsHeader(path=path, channels=tuple(info.ch_names), sfreq=float(info["sfreq"]),
                        times=np.asarray(epochs.times), info=info)


def shared_channels(headers: list[tuple[str, EpochsHeader]], pick: str) -> tuple[str, ...]:
    """Return the channels analysed in every file, after checking that rates and times agree.

    Parameters
    ----------
    headers : list of (who, EpochsHeader)
    pick : {"same", "common"}
        "same": every file must hold the same EEG channels (in any order);
        "common": the channels every file holds, in the first file's order.

    Returns
    -------
    tuple of str

    Raises
    ------
    InputError
        Naming the first file whose sampling rate, sample times or channel set differs.
    """
    who0, first = headers[0]
    keep = set(first.channels)
    for who, h in headers[1:]:
        if h.sfreq != first.sfreq or len(h.times) != len(first.times) or not np.allclose(h.times, first.times):
            raise InputError(Problem(
                f"the epochs of {who} are sampled at {h.sfreq:g} Hz from {h.times[0]:g} to {h.times[-1]:g} s, "
                f"those of {who0} at {first.sfreq:g} Hz from {first.times[0]:g} to {first.times[-1]:g} s: "
                "resample and crop every file alike", str(h.path)))
        if pick == "same" and set(h.channels) != set(first.channels):
            extra = sorted(set(h.channels) ^ set(first.channels))
            raise InputError(Problem(
                f"the epochs of {who} and of {who0} hold different channels ({', '.join(extra[:6])}): "
                "give pick='common' (--pick common) to keep the channels every file has", str(h.path)))
        keep &= set(h.channels)
    channels = tuple(c for c in first.channels if c in keep)
    if not channels:
        raise InputError(Problem("no EEG channel is common to every epochs file", str(first.path)))
    return channels


def evoked_bytes(evoked) -> bytes:
    """Return an mne.Evoked as the bytes of a -ave.fif file (to write with the other outputs)."""
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "map-ave.fif"
        evoked.save(path, verbose="error")
        return path.read_bytes()
