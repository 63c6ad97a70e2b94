"""Simulated participants, the RT law and the embedded demo study."""

from __future__ import annotations

import importlib.util
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from foretell.demo import demo_log, demo_task, demo_truth, make_demo_data
import foretell
from foretell.tasks import load_task, shipped_tasks
from foretell.errors import UsageError
from foretell.learners import Counting, Source
from foretell.logs import load_log, validate_log
from foretell.simulate import ParticipantSpec, RTLaw, simulate_participant, simulate_participants

ROOT = Path(__file__).resolve().parents[1]
TASKS = ROOT / "tasks"


def test_same_seed_same_frames_and_canonical_format(lantern):
    groups = {"a": ["count-1", ParticipantSpec("count-0-leak", leak=(0.2, 0.4))],
              "b": ["mix-4", "count-task", "source"]}
    log, truth = simulate_participants(lantern, 5, 2, groups=groups, seed=3)
    again, truth2 = simulate_participants(lantern, 5, 2, groups=groups, seed=3)
    pd.testing.assert_frame_equal(log, again)
    pd.testing.assert_frame_equal(truth, truth2)
    other, _ = simulate_participants(lantern, 5, 2, groups=groups, seed=4)
    assert not log["response"].equals(other["response"])
    assert list(log.columns) == ["participant", "group", "session", "block", "trial", "stimulus",
                                 "response", "rt", "onset", "reveal_onset"]
    assert sorted(log.participant.unique()) == ["p01", "p02", "p03", "p04", "p05"]
    assert len(log) == 5 * 2 * lantern.block_length
    checked = validate_log(log, lantern).frame  # the canonical validator accepts it as it is
    missed = log.response == ""
    assert (checked["missed"].to_numpy() == missed.to_numpy()).all()
    assert log.loc[missed, "rt"].isna().all() and log.loc[~missed, "rt"].notna().all()
    assert ((log.reveal_onset - log.onset)[~missed] - log.rt[~missed]).abs().max() < 2e-3
    assert (np.diff(log.onset.to_numpy())[np.diff(log.trial.to_numpy()) == 1] > 0).all()
    assert list(truth.model) == ["count-1", "mix-4", "count-0-leak", "count-task", "count-1"]
    assert list(truth.group) == ["a", "b", "a", "b", "a"]
    for col in ("inv_temp", "lapse", "alpha", "leak", "rt_shift", "rt_per_bit", "rt_sigma"):
        assert col in truth.columns
    leaky = truth.model == "count-0-leak"
    assert truth.leak[leaky].between(0.2, 0.4).all()
    assert (truth.leak[truth.model == "count-1"] == 0).all() and truth.leak[truth.model == "mix-4"].isna().all()
    assert truth.inv_temp.between(0.5, 4.0).all() and truth.lapse.between(0.01, 0.06).all()


def test_a_participant_does_not_depend_on_how_many_others_are_simulated(lantern):
    few, few_truth = simulate_participants(lantern, 2, 1, models=["count-1", "count-0"], seed=8)
    many, many_truth = simulate_participants(lantern, 5, 1, models=["count-1", "count-0"], seed=8)
    pd.testing.assert_frame_equal(few, many[many["participant"].isin(["p01", "p02"])].reset_index(drop=True))
    pd.testing.assert_frame_equal(few_truth, many_truth.iloc[:2])
    generator, _ = simulate_participants(lantern, 2, 1, models=["count-1"], seed=np.random.default_rng(8))
    assert generator["participant"].nunique() == 2  # a Generator seeds the run too


def test_probability_matching_reproduces_the_source(compass):
    # inv_temp = 1, lapse = 0: guesses are drawn from the learner's prediction (probability
    # matching; common practice); with the oracle of an i.i.d. source the guess frequencies
    # approach the source probabilities (binomial standard error about 0.004 here)
    rng = np.random.default_rng(0)
    frame = simulate_participant(compass, Source(compass), 1.0, 0.0, 15_000, rng, miss_rate=0.0)
    freq = frame.response.value_counts(normalize=True).reindex(list(compass.symbols)).to_numpy()
    np.testing.assert_allclose(freq, compass.next_probs[0], atol=0.015)


def test_large_inv_temp_guesses_the_most_probable_symbol(lantern):
    rng = np.random.default_rng(1)
    frame = simulate_participant(lantern, Source(lantern), 200.0, 0.0, 2000, rng, miss_rate=0.0)
    x = lantern.encode(frame.stimulus)
    p = lantern.next_proba(x)
    best = np.asarray(lantern.symbols)[p.argmax(axis=1)]
    clear = (np.sort(p, axis=1)[:, -1] > np.sort(p, axis=1)[:, -2] + 0.1)  # no tie for the top
    clear[: lantern.max_depth] = False
    assert clear.sum() > 1000
    assert (frame.response.to_numpy()[clear] == best[clear]).mean() > 0.99


def test_lapse_one_guesses_uniformly(lantern):
    rng = np.random.default_rng(2)
    frame = simulate_participant(lantern, Counting(depth=1), 5.0, 1.0, 9000, rng, miss_rate=0.0)
    freq = frame.response.value_counts(normalize=True).to_numpy()
    np.testing.assert_allclose(freq, 1 / 3, atol=0.02)


def test_rt_law_is_shifted_lognormal_in_entropy(compass):
    # log(rt - shift) ~ N(mu, sigma) with mu = log_scale + per_bit H - per_block (block - 1);
    # the oracle of an i.i.d. source has constant entropy H
    law = RTLaw()
    rng = np.random.default_rng(5)
    frame = simulate_participant(compass, Source(compass), 1.0, 0.0, 20_000, rng, rt=law,
                                 miss_rate=0.0, block_length=4000)
    p = compass.next_probs[0]
    h = float(-(p * np.log2(p)).sum())
    z = np.log(frame.rt.to_numpy() - law.shift)
    mu = law.log_location(h, frame.block.to_numpy())
    resid = z - mu
    assert abs(resid.mean()) < 0.01 and abs(resid.std() - law.sigma) < 0.01
    later = frame.block == 5
    assert frame.rt[later].median() < frame.rt[frame.block == 1].median()  # practice speed-up


def test_rt_defaults_follow_hick_hyman():
    # choice RTs of a few hundred ms, rising about 0.1-0.2 s per bit of information
    # (Hick, 1952; Hyman, 1953; from memory)
    law = RTLaw()
    median = lambda h: law.shift + math.exp(law.log_location(h, 1))
    assert 0.3 < median(0.0) < 0.6 and 0.5 < median(math.log2(3)) < 0.9
    slope = (median(math.log2(3)) - median(0.0)) / math.log2(3)
    assert 0.1 <= slope <= 0.2


def test_misses_happen_at_the_given_rate(lantern):
    rng = np.random.default_rng(6)
    frame = simulate_participant(lantern, Counting(depth=1), 2.0, 0.02, 10_000, rng, miss_rate=0.05)
    assert abs((frame.response == "").mean() - 0.05) < 0.01


def test_bad_specifications_are_refused(lantern):
    with pytest.raises(UsageError, match="leak"):
        ParticipantSpec("count-1", leak=(0.1, 0.2))
    with pytest.raises(UsageError, match="inv_temp"):
        ParticipantSpec("count-1", inv_temp=(3.0, 1.0))
    with pytest.raises(UsageError, match="not both"):
        simulate_participants(lantern, 2, 1, groups={"a": ["count-0"]}, models=["count-1"])
    with pytest.raises(UsageError, match="unknown model"):
        simulate_participants(lantern, 2, 1, models=["count-x"])
    with pytest.raises(UsageError, match="n_participants"):
        simulate_participants(lantern, 0, 1)
    with pytest.raises(UsageError, match="sigma"):
        RTLaw(sigma=0.0)


def test_demo_data_regenerates_exactly_and_loads():
    task = demo_task()
    assert task.name == "lantern-relay" and shipped_tasks()["lantern-relay"].is_file()
    log, truth = make_demo_data()
    shipped = (Path(__file__).resolve().parents[1] / "src/foretell/data/demo_log.csv").read_text()
    assert log.to_csv(index=False) == shipped
    assert truth.to_csv(index=False) == \
        (ROOT / "src/foretell/data/demo_truth.csv").read_text()
    frame = demo_log()
    assert len(frame) == len(log) and frame.participant.nunique() == 28
    assert set(frame.group) == {"rested", "sleep-restricted"}
    assert (frame.response == "").sum() == (log.response == "").sum()
    assert frame.rt.isna().sum() == log.rt.isna().sum()
    loaded = load_log(ROOT / "src/foretell/data/demo_log.csv", task).frame
    assert loaded["missed"].sum() == (log.response == "").sum()
    assert list(demo_truth().participant) == list(truth.participant)


def test_regeneration_script_refuses_to_overwrite(tmp_path):
    spec = importlib.util.spec_from_file_location("make_demo_data", ROOT / "examples/make_demo_data.py")
    script = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(script)
    assert script.main([str(tmp_path), "--seed", "1"]) == 0
    first = (tmp_path / "demo_log.csv").read_text()
    assert script.main([str(tmp_path), "--seed", "2"]) == 2
    assert (tmp_path / "demo_log.csv").read_text() == first
    assert script.main([str(tmp_path), "--seed", "2", "--force"]) == 0
    assert (tmp_path / "demo_log.csv").read_text() != first


def test_a_leaky_model_id_simulates_with_leak_and_fit_recovers_it():
    # The truth table must describe what was simulated: a count-K-leak participant forgets.
    task = load_task("tide-gauge")
    log, truth = simulate_participants(task, 6, 3, models=["count-1-leak"], seed=11, block_length=150)
    assert truth["leak"].between(0.05, 0.4).all() and truth["leak"].nunique() == 6
    result = foretell.fit(log, task, models=["count-1", "count-1-leak"], seed=0)
    best = result.winners.query("block == 'all'").set_index("participant")["best_model"]
    assert (best == "count-1-leak").mean() >= 5 / 6
    fitted = result.fits.query("model == 'count-1-leak'").set_index("participant")["leak"]
    true = truth.set_index("participant")["leak"]
    # recovered, not merely nonzero: rank agreement and small error (common practice in recovery checks)
    assert np.corrcoef(fitted[true.index], true)[0, 1] > 0.7
    assert np.abs(fitted[true.index] - true).median() < 0.1


def test_a_leaky_model_with_zero_leak_is_refused():
    with pytest.raises(UsageError, match="above 0"):
        ParticipantSpec("count-0-leak", leak=(0.0, 0.2))
