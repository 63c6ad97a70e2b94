"""BIDS events files and MNE metadata of per-trial learner quantities."""

from __future__ import annotations

import io
import json
import re
import sys

import numpy as np
import pandas as pd
import pytest

from foretell.errors import UsageError
from foretell.steps.events import (bids_labels, column_name, events_tables, sidecar_json, to_metadata,
                             to_tsv)
from foretell.logs import validate_log
from foretell.regressors import regressors
from foretell.simulate import simulate_participants

MODELS = ["count-1", "mix-3"]


@pytest.fixture(scope="module")
def raw(tide):
    frame, _ = simulate_participants(tide, 2, 2, models=["count-1"], seed=5, block_length=30)
    frame.loc[[4, 40, 70], ["response", "rt"]] = ["", np.nan]  # missed guesses
    return frame


@pytest.fixture(scope="module")
def log(raw, tide):
    return validate_log(raw, tide)


@pytest.fixture(scope="module")
def files(log, tide):
    return events_tables(log, tide, MODELS)


def read_back(data: bytes) -> pd.DataFrame:
    return pd.read_csv(io.BytesIO(data), sep="\t", na_values="n/a", keep_default_na=False)


def test_events_files_follow_the_bids_tabular_rules(files, log):
    # BIDS specification, "Task events": sub-<label>[_ses-<label>]_task-<label>_events.tsv
    assert sorted(files.files) == ["sub-p01_task-tidegauge_events.tsv",
                                   "sub-p02_task-tidegauge_events.tsv"]
    data = to_tsv(files.files["sub-p01_task-tidegauge_events.tsv"])
    lines = data.decode("utf-8").split("\n")
    header = lines[0].split("\t")
    # BIDS "Task events": onset and duration are the first two columns, in that order
    assert header[:2] == ["onset", "duration"]
    # BIDS "Common principles - Tabular files": tab-separated, a header row, "n/a" for missing
    assert all(len(line.split("\t")) == len(header) for line in lines[1:-1]) and lines[-1] == ""
    cells = [c for line in lines[1:-1] for c in line.split("\t")]
    assert "n/a" in cells and "" not in cells and "nan" not in cells and "NaN" not in cells
    table = read_back(data)
    n = int((log.frame["participant"] == "p01").sum())
    assert len(table) == 2 * n and set(table["trial_type"]) == {"guess", "reveal"}
    # BIDS "Task events": rows in chronological order (recommended)
    assert (np.diff(table["onset"]) >= 0).all()


def test_events_values_match_the_log_and_the_regressors(files, log, tide):
    table = read_back(to_tsv(files.files["sub-p01_task-tidegauge_events.tsv"]))
    trials = log.frame[log.frame["participant"] == "p01"].reset_index(drop=True)
    guess = table[table["trial_type"] == "guess"].reset_index(drop=True)
    reveal = table[table["trial_type"] == "reveal"].reset_index(drop=True)
    np.testing.assert_allclose(guess["onset"], trials["onset"])
    np.testing.assert_allclose(reveal["onset"], trials["reveal_onset"])
    # BIDS "Task events": response_time is measured from the event's onset; n/a when missed
    np.testing.assert_allclose(guess["response_time"], trials["rt"])
    np.testing.assert_allclose(guess["duration"], trials["rt"])
    assert reveal["duration"].isna().all() and reveal["response_time"].isna().all()
    assert guess["response"].isna().sum() == trials["missed"].sum() > 0
    np.testing.assert_array_equal(guess["missed"], trials["missed"].astype(int))
    np.testing.assert_array_equal(guess["rt_ok"], trials["rt_ok"].astype(int))
    reg = regressors(log, tide, MODELS)
    for model in MODELS:
        rows = reg[(reg["participant"] == "p01") & (reg["model"] == model)]
        for q in ("entropy", "surprise", "guess_prob", "prev_surprise"):
            np.testing.assert_allclose(reveal[column_name(q, model)], rows[q], rtol=1e-12)
        np.testing.assert_array_equal(guess[column_name("context", model)].fillna("NA"),
                                      rows["context"].astype(object).fillna("NA"))
    assert "entropy_count_1" in table and "guess_prob_mix_3" in table
    x = trials["stimulus_idx"].to_numpy()
    truth = [tide.context_label(tide.contexts[i]) if i >= 0 else "NA"
             for i in tide.context_indices(x)]
    np.testing.assert_array_equal(guess["context"].fillna("NA"), truth)


def test_sidecar_describes_every_column(files, tide):
    table = files.files["sub-p02_task-tidegauge_events.tsv"]
    side = json.loads(sidecar_json(files.sidecars["sub-p02_task-tidegauge_events.json"]))
    assert list(side) == list(table.columns)
    # BIDS "Task events" / "Tabular files": LongName, Description, Levels, Units per column
    assert all({"LongName", "Description"} <= set(d) for d in side.values())
    assert {k for k, d in side.items() if d.get("Units") == "s"} == {"onset", "duration",
                                                                     "response_time"}
    # bit: unit symbol of IEC 80000-13 (from memory)
    assert side["entropy_count_1"]["Units"] == side["surprise_mix_3"]["Units"] == "bit"
    assert set(side["trial_type"]["Levels"]) == {"guess", "reveal"}
    assert list(side["stimulus"]["Levels"]) == list(tide.symbols)
    assert set(side["context"]["Levels"]) == {tide.context_label(c) for c in tide.contexts}
    used = set(table["context_count_1"].dropna())
    assert set(side["context_count_1"]["Levels"]) == used


def test_bids_labels_are_alphanumeric_unique_and_deterministic():
    ids = ["p_01", "p-01", "P01x2", "p01", "", "--", "Ab", "aB"]
    got = bids_labels(ids)
    # BIDS "Common principles": labels are alphanumeric
    assert all(re.fullmatch(r"[0-9A-Za-z]+", v) for v in got.values())
    assert len({v.lower() for v in got.values()}) == len(ids)
    assert got["p01"] == "p01" and got["P01x2"] == "P01x2"  # valid ids keep their label
    assert got["Ab"] == "Ab" and got["aB"] == "aBx2"  # case-insensitive file systems
    assert got["p-01"] == "p01x3" and got["p_01"] == "p01x4" and got[""] == "x1" and got["--"] == "x2"
    assert bids_labels(reversed(ids)) == got
    assert bids_labels(["lantern-relay"]) == {"lantern-relay": "lanternrelay"}


def test_sessions_and_relabelled_participants(raw, tide):
    frame = raw.copy()
    frame["participant"] = frame["participant"].map({"p01": "s_1", "p02": "s-1"})
    frame["session"] = np.where(frame["block"] == 2, 2, 1)
    log = validate_log(frame, tide)
    out = events_tables(log, tide, ["count-0"])
    assert sorted(out.files) == ["sub-s1_ses-1_task-tidegauge_events.tsv",
                                 "sub-s1_ses-2_task-tidegauge_events.tsv",
                                 "sub-s1x2_ses-1_task-tidegauge_events.tsv",
                                 "sub-s1x2_ses-2_task-tidegauge_events.tsv"]
    assert list(out.labels.columns) == ["participant", "session", "bids_label", "bids_session"]
    assert len(out.labels) == 4 and any("counter" in w for w in out.warnings)
    table = out.files["sub-s1x2_ses-2_task-tidegauge_events.tsv"]
    assert set(table["block"]) == {2}


def test_without_onsets_the_result_warns(raw, tide):
    log = validate_log(raw.drop(columns=["onset", "reveal_onset"]), tide)
    out = events_tables(log, tide, ["count-1"], stimulus_duration=0.8)
    table = read_back(to_tsv(out.files["sub-p01_task-tidegauge_events.tsv"]))
    assert table["onset"].isna().all()
    assert (table["trial_type"].to_numpy()[:4] == ["guess", "reveal", "guess", "reveal"]).all()
    np.testing.assert_allclose(table.loc[table["trial_type"] == "reveal", "duration"], 0.8)
    assert sum("EEG alignment" in w for w in out.warnings) == 2


def test_leaky_models_need_a_leak_and_tsv_refuses_tabs(log, tide):
    with pytest.raises(UsageError, match="needs a leak"):
        events_tables(log, tide, ["count-1-leak"])
    fixed = events_tables(log, tide, ["count-1-leak"], fixed={"leak": 0.2})
    side = fixed.sidecars["sub-p01_task-tidegauge_events.json"]
    assert "leak 0.2" in side["entropy_count_1_leak"]["Description"]
    with pytest.raises(UsageError, match="tab"):
        to_tsv(pd.DataFrame({"onset": [1.0], "note": ["a\tb"]}))


def test_metadata_lines_up_with_an_events_array(log, tide):
    trials = log.frame[log.frame["participant"] == "p02"]
    sfreq = 250.0
    events = np.c_[np.rint(trials["onset"].to_numpy() * sfreq).astype(int) + 1000,
                   np.zeros(len(trials), int), np.ones(len(trials), int)]
    meta = to_metadata(log, tide, events, participant="p02", models=MODELS, sfreq=sfreq)
    assert len(meta) == len(trials) and (meta["event"] == "guess").all()
    np.testing.assert_array_equal(meta["trial"], trials["trial"])
    with pytest.raises(UsageError, match=rf"{len(trials) - 1} EEG events but {len(trials)} trials"):
        to_metadata(log, tide, events[1:], participant="p02", models=MODELS)
    shifted = events.copy()
    shifted[5:, 0] += 50  # 0.2 s: one trigger late
    with pytest.raises(UsageError, match="disagree"):
        to_metadata(log, tide, shifted, participant="p02", models=MODELS, sfreq=sfreq)
    with pytest.raises(UsageError, match="locked"):
        to_metadata(log, tide, events, participant="p02", models=MODELS, locked="stimulus")


def test_epochs_without_mne_say_how_to_install(log, tide, monkeypatch):
    monkeypatch.setitem(sys.modules, "mne", None)
    with pytest.raises(UsageError, match=re.escape("pip install 'foretell[eeg]'")):
        to_metadata(log, tide, object(), participant="p01", models=MODELS)


def test_metadata_attaches_to_mne_epochs(log, tide):
    mne = pytest.importorskip("mne")
    trials = log.frame[log.frame["participant"] == "p01"]
    sfreq, n = 100.0, len(trials)
    samples = np.rint(trials["reveal_onset"].to_numpy() * sfreq).astype(int)
    events = np.c_[samples, np.zeros(n, int), np.ones(n, int)]
    info = mne.create_info(["c1", "c2"], sfreq, ch_types="eeg", verbose=False)
    data = np.random.default_rng(0).normal(size=(n, 2, 20)) * 1e-6
    epochs = mne.EpochsArray(data, info, events=events, verbose=False)
    meta = to_metadata(log, tide, epochs, participant="p01", models=MODELS, locked="reveal")
    epochs.metadata = meta
    assert len(epochs["missed == False"]) == int((~trials["missed"]).sum())
    np.testing.assert_allclose(epochs.metadata["log_onset"], trials["reveal_onset"])
    short = mne.EpochsArray(data[:-1], info, events=events[:-1], verbose=False)
    with pytest.raises(UsageError, match=rf"{n - 1} EEG events but {n} trials"):
        to_metadata(log, tide, short, participant="p01", models=MODELS, locked="reveal")
    epochs.drop([0, 3], verbose=False)  # dropped epochs are matched through epochs.selection
    kept = to_metadata(log, tide, epochs, participant="p01", models=MODELS, locked="reveal")
    np.testing.assert_array_equal(kept["trial"], np.delete(trials["trial"].to_numpy(), [0, 3]))
