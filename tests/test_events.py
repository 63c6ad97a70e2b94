"""BIDS events files and MNE metadata of per-trial learner quantities."""

from __future__ import annotations

import io
import json
import math
import re
import sys

import numpy as np
import pandas as pd
import pytest

from foretell.errors import UsageError
from foretell.logs import validate_log
from foretell.regressors import regressors
from foretell.simulate import simulate_participants
from foretell.steps.bids import bids_labels, column_name, sidecar_json, to_tsv
from foretell.steps.epochs import to_metadata
from foretell.steps.events import EventsResult, default_event_models, export_events
from foretell.steps.guesses import fit
from foretell.tasks import Task

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
    return export_events(log, tide, models=MODELS)


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


def test_the_result_writes_the_participants_table_and_every_events_file(files):
    assert isinstance(files, EventsResult) and files.step == "events"
    assert list(files.tables()) == ["participants"] and files.tables()["participants"] is files.labels
    blobs = files.blobs()
    assert set(blobs) == set(files.files) | set(files.sidecars)
    assert blobs["sub-p01_task-tidegauge_events.tsv"] == to_tsv(files.files["sub-p01_task-tidegauge_events.tsv"])
    assert files.settings["models"] == MODELS and files.model_ids == MODELS


def test_the_files_do_not_depend_on_n_jobs(files, log, tide):
    two = export_events(log, tide, models=MODELS, n_jobs=2)
    assert two.blobs() == files.blobs() and two.labels.equals(files.labels) and two.notes == files.notes


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
    out = export_events(log, tide, models=["count-0"])
    assert sorted(out.files) == ["sub-s1_ses-1_task-tidegauge_events.tsv",
                                 "sub-s1_ses-2_task-tidegauge_events.tsv",
                                 "sub-s1x2_ses-1_task-tidegauge_events.tsv",
                                 "sub-s1x2_ses-2_task-tidegauge_events.tsv"]
    assert list(out.labels.columns) == ["participant", "session", "bids_label", "bids_session"]
    assert len(out.labels) == 4 and any("counter" in w for w in out.notes)
    table = out.files["sub-s1x2_ses-2_task-tidegauge_events.tsv"]
    assert set(table["block"]) == {2}


def test_without_onsets_the_result_warns(raw, tide):
    log = validate_log(raw.drop(columns=["onset", "reveal_onset"]), tide)
    out = export_events(log, tide, models=["count-1"], stimulus_duration=0.8)
    table = read_back(to_tsv(out.files["sub-p01_task-tidegauge_events.tsv"]))
    assert table["onset"].isna().all()
    assert (table["trial_type"].to_numpy()[:4] == ["guess", "reveal", "guess", "reveal"]).all()
    np.testing.assert_allclose(table.loc[table["trial_type"] == "reveal", "duration"], 0.8)
    assert sum("EEG alignment" in w for w in out.notes) == 2


def test_leaky_models_need_a_leak_and_tsv_refuses_tabs(log, tide):
    with pytest.raises(UsageError, match="needs a leak"):
        export_events(log, tide, models=["count-1-leak"])
    fixed = export_events(log, tide, models=["count-1-leak"], fixed={"leak": 0.2})
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


# -- issue regressions ---------------------------------------------------------------------------------
GATE = Task.from_dict({"name": "gate", "symbols": ["a", "b"], "contexts": [
    {"past": ["a"], "next": {"a": 0.0, "b": 1.0}}, {"past": ["b"], "next": {"a": 0.5, "b": 0.5}}]})


def test_bids_files_hold_na_never_inf_or_minus_zero():
    # A sequence the task makes impossible ("a" after "a") gives the source an infinite surprise, and a
    # certain symbol a surprise of -log2(1) = -0.0: BIDS tabular files hold n/a for a value that is
    # missing or undefined (BIDS, "Common principles: tabular files"), never inf, and no "-0".
    stimuli = list("abaabbabaabab")
    n = len(stimuli)
    frame = pd.DataFrame({"participant": "p1", "block": 1, "trial": range(1, n + 1), "stimulus": stimuli,
                          "response": list("bbabbaabbabba"), "rt": 0.5, "onset": np.arange(n) * 2.0,
                          "reveal_onset": np.arange(n) * 2.0 + 1.0})
    result = export_events(validate_log(frame, GATE), GATE, models=["source", "count-0"])
    text = result.blobs()["sub-p1_task-gate_events.tsv"].decode("utf-8")
    rows = [line.split("\t") for line in text.splitlines()]
    header, cells = rows[0], [c for row in rows[1:] for c in row]
    numbers = [float(c) for c in cells if re.fullmatch(r"[-+]?(\d+\.?\d*(e[-+]?\d+)?|inf)", c, re.I)]
    assert numbers and all(math.isfinite(v) for v in numbers)
    assert not any(v == 0 and math.copysign(1.0, v) < 0 for v in numbers)
    table = read_back(text.encode("utf-8"))
    reveal = table[table["trial_type"] == "reveal"].reset_index(drop=True)
    impossible = [t for t in range(1, n) if stimuli[t - 1] == stimuli[t] == "a"]
    assert reveal.loc[impossible, "surprise_source"].isna().all()
    assert (reveal["surprise_source"].dropna() >= 0).all() and header[:2] == ["onset", "duration"]
    side = json.loads(result.blobs()["sub-p1_task-gate_events.json"])
    assert "probability 0" in side["surprise_source"]["Description"]


def test_no_guess_locked_row_carries_what_only_the_reveal_tells(files, log, tide):
    # The surprise of a trial's symbol is known only once the symbol is revealed: guess rows (and
    # guess-locked epochs) are n/a there, reveal rows carry it; the sidecar says which is which.
    for name, table in files.files.items():
        surprise = [c for c in table.columns if c.startswith("surprise_")]
        assert surprise and table.loc[table["trial_type"] == "guess", surprise].isna().all().all()
        assert table.loc[table["trial_type"] == "reveal", surprise].notna().any().all()
        side = files.sidecars[name.replace(".tsv", ".json")]
        assert "n/a on guess rows" in side["surprise_mix_3"]["Description"]
        assert "known at the guess prompt" in side["entropy_mix_3"]["Description"]
    trials = log.frame[log.frame["participant"] == "p01"]
    events = np.c_[np.arange(len(trials)) * 100, np.zeros(len(trials), int), np.ones(len(trials), int)]
    guess = to_metadata(log, tide, events, participant="p01", models=MODELS)
    reveal = to_metadata(log, tide, events, participant="p01", models=MODELS, locked="reveal")
    columns = [column_name("surprise", m) for m in MODELS]
    assert guess[columns].isna().all().all() and reveal[columns].notna().any().all()
    assert guess["entropy_mix_3"].equals(reveal["entropy_mix_3"])


def test_participants_the_fit_left_out_get_no_events_file(raw, tide):
    # A participant who missed every guess has no fit, so no leak for count-0-leak: the events step
    # leaves them out, as the fit did, and says so (it used to stop: "needs a leak for participant p02").
    frame = raw.copy()
    frame.loc[frame["participant"] == "p02", ["response", "rt"]] = ["", np.nan]
    log = validate_log(frame, tide)
    fitted = fit(log, tide, models=["count-0", "count-0-leak"], n_starts=1, n_replicates=2)
    assert fitted.excluded["participant"].tolist() == ["p02"]
    out = export_events(log, tide, fit=fitted)
    assert sorted(out.files) == ["sub-p01_task-tidegauge_events.tsv"]
    assert out.labels["participant"].tolist() == ["p01"]
    assert any("participant p02 left out" in note and "every guess missed" in note for note in out.notes)
    assert "entropy_count_0_leak" in out.files["sub-p01_task-tidegauge_events.tsv"]
    assert default_event_models(tide, fitted) == ["count-0", "count-0-leak"]
    assert "count-0-leak" not in default_event_models(tide) and "count-1" in default_event_models(tide)
