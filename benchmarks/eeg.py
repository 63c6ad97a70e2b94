"""Benchmark of the eeg step: regressions + learner comparison, and one cluster permutation test.

Simulated participants of the lantern-relay task (a depth-1 learner), epochs
files written with MNE (64 channels of the standard 10-20 montage, reveal-locked,
noise plus a response to the learner's surprise), 9 learner models.

1. analyze_eeg with n_permutations=0 (files read one participant at a time,
   one OLS per participant x model, leave-one-block-out scores, selection),
   against a plain loop of mne.stats.linear_regression calls (one per
   participant x model, same designs) measured in the same run. Target: < 60 s.
2. One spatio-temporal cluster test of 1,000 permutations on one model's beta
   maps, as the step runs it. Target: < 60 s.

Full size: 30 participants x 600 epochs x 64 channels x 250 samples (about
2.3 GB of epochs files in a temporary folder). --small: 10 x 300 x 64 x 100.

Run once, by hand, on a quiet machine: PYTHONPATH=src python benchmarks/eeg.py [--small]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
import warnings
from pathlib import Path

import mne
import numpy as np

from foretell.logs import validate_log
from foretell.regressors import regressors
from foretell.simulate import simulate_participants
from foretell.steps.eeg import analyze_eeg
from foretell.tasks import load_task
from foretell.validation import child_rng

MODELS = ["count-0", "count-1", "count-2", "count-3", "count-4", "mix-1", "mix-2", "mix-3", "mix-4"]
TARGET_S = 60.0
SFREQ = 250.0


def study(n_participants: int, n_epochs: int):
    task = load_task("tasks/lantern-relay.toml")
    frame, _ = simulate_participants(task, n_participants, 5, models=["count-1"], seed=1,
                                     block_length=n_epochs // 5)
    for col in ("onset", "reveal_onset"):
        frame[col] = np.round(frame[col] * SFREQ) / SFREQ
    return validate_log(frame, task), task


def write_files(folder: Path, log, task, n_times: int) -> str:
    """Write one epochs file per participant; return the pattern."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)
        montage = mne.channels.make_standard_montage("standard_1020")
    info = mne.create_info(montage.ch_names[:64], SFREQ, ch_types="eeg")
    info.set_montage(montage)
    surprise = regressors(log, task, ["count-1"])
    for pid, trials in log.frame.groupby("participant", sort=False):
        s = surprise.loc[surprise["participant"] == pid, "surprise"].to_numpy()
        rng = child_rng(0, pid)
        data = rng.normal(size=(len(trials), 64, n_times)) * 2e-6
        data[:, 20:40, n_times // 2:] += 1e-6 * ((s - s.mean()) / s.std())[:, None, None]
        events = np.c_[np.rint(trials["reveal_onset"].to_numpy() * SFREQ).astype(int),
                       np.zeros(len(trials), int), np.ones(len(trials), int)]
        epochs = mne.EpochsArray(data, info, events=events, tmin=-0.1, verbose="error")
        epochs.save(folder / f"{pid}-epo.fif", overwrite=True, verbose="error")
    return str(folder / "{participant}-epo.fif")


def mne_loop(pattern: str, log, task) -> float:
    """Return the seconds of one mne.stats.linear_regression per participant x model (reading not timed)."""
    table = regressors(log, task, MODELS)
    seconds = 0.0
    for pid, rows in log.frame.groupby("participant", sort=False):
        epochs = mne.read_epochs(pattern.format(participant=pid), verbose="error")
        for m in MODELS:
            s = table.loc[(table["participant"] == pid) & (table["model"] == m), "surprise"].to_numpy()
            x = np.column_stack([np.ones(len(s)), (s - s.mean()) / s.std(), _z(rows["block"]), _z(rows["trial"])])
            start = time.perf_counter()
            mne.stats.linear_regression(epochs, x, ["intercept", "surprise", "block", "trial"])
            seconds += time.perf_counter() - start
    return seconds


def _z(values) -> np.ndarray:
    v = np.asarray(values, float)
    return (v - v.mean()) / v.std()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--small", action="store_true", help="10 participants x 300 epochs x 100 samples")
    args = parser.parse_args()
    n_participants, n_epochs, n_times = (10, 300, 100) if args.small else (30, 600, 250)
    mne.set_log_level("error")
    log, task = study(n_participants, n_epochs)
    print(f"{n_participants} participants x {n_epochs} epochs x 64 channels x {n_times} samples x "
          f"{len(MODELS)} models; load average {os.getloadavg()[0]:.2f}")
    with tempfile.TemporaryDirectory() as folder:
        pattern = write_files(Path(folder), log, task, n_times)
        start = time.perf_counter()
        result = analyze_eeg(log, task, epochs=pattern, models=MODELS, locked="reveal", n_permutations=0)
        step = time.perf_counter() - start
        loop = mne_loop(pattern, log, task)
    print(f"regressions + comparison (analyze_eeg, files read): {step:.1f} s (target < {TARGET_S:.0f} s)")
    print(f"plain loop of mne.stats.linear_regression (data in memory, OLS only): {loop:.1f} s; "
          f"ratio loop / step {loop / step:.2f}")
    maps = result.betas["beta"].sel(model="count-1", regressor="surprise").to_numpy().astype(float)
    info = result.evoked["count-1_surprise"].info
    adjacency, _ = mne.channels.find_ch_adjacency(info, "eeg")
    start = time.perf_counter()
    mne.stats.spatio_temporal_cluster_1samp_test(maps.transpose(0, 2, 1), adjacency=adjacency,
                                                 n_permutations=1000, rng=child_rng(0, "bench"))
    print(f"one cluster test, 1,000 permutations: {time.perf_counter() - start:.1f} s "
          f"(target < {TARGET_S:.0f} s); load average {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
