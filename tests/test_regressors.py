"""Per-trial regressors: entropy, surprise, guess probability, lagged terms, contexts, learner values."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy.stats import entropy as scipy_entropy

from foretell.errors import UsageError
from foretell.learners import Counting, TreeMixture
from foretell.logs import validate_log
from foretell.models import parse_model
from foretell.models import model_specs
from foretell.measure import choose_measure
from foretell.regressors import REGRESSORS, kept_by_fit, learner_values, regressors, stack_tables
from foretell.simulate import simulate_participants
from foretell.tasks import Task


@pytest.fixture(scope="module")
def small(tide):
    frame, _ = simulate_participants(tide, 2, 2, models=["count-1"], seed=3, block_length=40)
    return validate_log(frame, tide)


def test_entropy_and_surprise_match_the_learner(small, tide):
    table = regressors(small, tide, ["count-1"])
    rows = table[table["participant"] == "p01"]
    x = small.frame.loc[small.frame["participant"] == "p01", "stimulus_idx"].to_numpy()
    pred = Counting(depth=1).next_proba(x, 2)
    # Shannon entropy in bits against scipy.stats.entropy (reference library; Virtanen et al., 2020)
    np.testing.assert_allclose(rows["entropy"], scipy_entropy(pred, base=2, axis=1), rtol=1e-12)
    np.testing.assert_allclose(rows["surprise"], -np.log2(pred[np.arange(len(x)), x]), rtol=1e-12)
    np.testing.assert_allclose(rows["prev_surprise"].to_numpy()[1:],
                               rows["surprise"].to_numpy()[:-1])
    assert np.isnan(rows["prev_surprise"].iloc[0]) and np.isnan(rows["prev_correct"].iloc[0])


def test_guess_prob_and_prev_correct_follow_the_responses(small, tide):
    table = regressors(small, tide, ["count-0"])
    frame = small.frame
    missed = frame["missed"].to_numpy()
    assert np.isnan(table["guess_prob"].to_numpy()[missed]).all()
    assert np.isfinite(table["guess_prob"].to_numpy()[~missed]).all()
    correct = np.where(missed, np.nan, (frame["response_idx"] == frame["stimulus_idx"]).astype(float))
    for pid in small.participants:
        at = (frame["participant"] == pid).to_numpy()
        np.testing.assert_array_equal(table.loc[at, "prev_correct"].to_numpy()[1:], correct[at][:-1])
    assert list(table.columns[:6]) == ["participant", "group", "session", "block", "trial", "model"]
    assert set(REGRESSORS) <= set(table.columns)
    assert len(table) == len(frame)  # every trial stays, missed or screened


def test_contexts_name_the_symbols_the_learner_used(small, tide):
    table = regressors(small, tide, ["count-2", "mix-3"])
    frame = small.frame[small.frame["participant"] == "p01"]
    labels = frame["stimulus"].to_numpy()
    rows = table[(table["participant"] == "p01") & (table["model"] == "count-2")]
    context = rows["context"].astype(object).to_numpy()
    assert pd.isna(context[0]) and pd.isna(context[1])
    assert all(context[t] == f"{labels[t - 2]}-{labels[t - 1]}" for t in range(2, len(labels)))
    mix = table[(table["participant"] == "p01") & (table["model"] == "mix-3")]
    depth = np.rint(TreeMixture(max_depth=3).mean_depth(frame["stimulus_idx"].to_numpy(), 2))
    got = mix["context"].astype(object).to_numpy()[3:]
    lengths = [0 if c == "*" else len(c.split("-")) for c in got]
    np.testing.assert_array_equal(lengths, depth[3:])


def test_learner_values_come_from_fits_then_fixed(tide):
    spec = parse_model("count-1-leak", tide)
    fits = pd.DataFrame({"participant": ["p01"], "model": ["count-1-leak"], "leak": [0.2],
                         "alpha": [np.nan]})
    assert learner_values(spec, "p01", fits=fits) == ({"leak": 0.2}, "fits")
    assert learner_values(spec, "p02", fits=fits, fixed={"leak": 0.1}) == ({"leak": 0.1}, "fixed")
    assert learner_values(spec, "p02", fits=fits)[1] == "held_out"
    plain = parse_model("count-1", tide)
    assert learner_values(plain, "p02") == ({}, "default")


def test_a_free_leak_needs_a_value_or_a_score(small, tide):
    with pytest.raises(UsageError, match="needs a leak"):
        regressors(small, tide, ["count-1-leak"])
    table = regressors(small, tide, ["count-1-leak"], fixed={"leak": 0.3})
    assert (table["leak"] == 0.3).all() and (table["params_from"] == "fixed").all()
    picked = regressors(small, tide, ["count-1-leak"], leak_grid=(0.0, 0.5),
                        score=lambda pid, model, cands: np.array([0.0, 1.0 if model == "count-1-leak" else -1.0]))
    assert (picked["leak"] == 0.5).all() and (picked["params_from"] == "held_out").all()


def test_symbols_only_task_loads_and_refuses_models_needing_the_source():
    bare = Task.from_dict({"name": "bare", "symbols": ["a", "b", "c"], "response": "reaction"})
    assert not bare.has_source and bare.response == "reaction"
    assert parse_model("count-2", bare).depth == 2
    for model in ("source", "count-task"):
        with pytest.raises(UsageError):
            parse_model(model, bare)


def test_reaction_design_has_no_guess_probability():
    bare = Task.from_dict({"name": "bare", "symbols": ["a", "b"], "response": "reaction"})
    rng = np.random.default_rng(0)
    stim = np.array(["a", "b"])[rng.integers(0, 2, 30)]
    frame = pd.DataFrame({"participant": "p1", "block": 1, "trial": np.arange(1, 31),
                          "stimulus": stim, "response": stim, "rt": 0.4})
    table = regressors(validate_log(frame, bare), bare, ["count-1"])
    assert table["guess_prob"].isna().all()
    assert (table["prev_correct"].dropna() == 1.0).all()


def test_batches_of_participants_stack_to_the_whole_table(tide):
    frame, _ = simulate_participants(tide, 3, 2, models=["count-1"], seed=4, block_length=30)
    log = validate_log(frame, tide)
    models = ["count-0", "count-2", "mix-3"]
    whole = regressors(log, tide, models, fixed={"leak": 0.1})
    cut = int(np.flatnonzero(log.frame["participant"].to_numpy() == "p02")[0])
    parts = [regressors(replace(log, frame=log.frame.iloc[rows].reset_index(drop=True)), tide, models,
                        fixed={"leak": 0.1})
             for rows in (slice(0, cut), slice(cut, None))]
    stacked = stack_tables(parts)
    pd.testing.assert_frame_equal(stacked, whole)  # values, dtypes and category order
    assert list(stacked["context"].cat.categories) == list(whole["context"].cat.categories)


def test_participants_a_fit_left_out_are_named_and_masked(small):
    excluded = pd.DataFrame({"participant": ["p02"], "group": ["g"], "reason": ["every guess missed"]})
    keep, notes = kept_by_fit(small, excluded)
    assert (keep == (small.frame["participant"] != "p02").to_numpy()).all()
    assert notes == ["participant p02 left out, as in the fit: every guess missed"]
    assert kept_by_fit(small, None)[0].all() and kept_by_fit(small, None)[1] == []
    with pytest.raises(UsageError, match="every participant"):
        kept_by_fit(small, pd.concat([excluded, excluded.assign(participant=["p01"])]))


def test_trials_left_out_of_a_measure_are_counted_by_reason(small, tide):
    specs = model_specs(["count-2"], tide)
    chosen = choose_measure(small, tide, specs, "rt", small.frame["rt"].to_numpy(float))
    frame = small.frame
    first = frame.groupby(["participant", "session"]).cumcount().to_numpy() < 2  # warm-up of depth 2
    screened = ~frame["rt_ok"].to_numpy()
    assert ((chosen.reason == 1) == screened).all()  # screened first, then warm-up
    assert ((chosen.reason == 2) == (first & ~screened)).all()
    assert chosen.main == "entropy" and chosen.log_transform and chosen.slope_name == "ms_per_bit"
    with pytest.raises(UsageError):
        choose_measure(small, tide, specs, "rt", chosen.values, names=["prev_correct"])  # not in bits


def test_the_baseline_columns_span_the_time_on_task_terms(small, tide):
    specs = model_specs(["count-1"], tide)
    chosen = choose_measure(small, tide, specs, "rt", small.frame["rt"].to_numpy(float))
    assert chosen.baseline == ("blocks", "trial_spline", "prev_correct")
    kept = chosen.reason == 0
    z = chosen.nuisance[kept]  # 4 spline columns and prev_correct: centred, uncorrelated, unit variance
    assert z.shape[1] == 5
    np.testing.assert_allclose(z.T @ z / kept.sum(), np.eye(5), atol=1e-9)
    frame = small.frame
    position = frame.groupby(["participant", "session"]).cumcount().to_numpy()
    right = (frame["response_idx"] == frame["stimulus_idx"]).to_numpy() & ~frame["missed"].to_numpy()
    previous = np.where(position > 0, np.r_[True, right[:-1]], True).astype(float)
    raw = np.column_stack([np.ones(len(frame)), np.log1p(position), previous])[kept]
    span = np.column_stack([np.ones(kept.sum()), z])
    np.testing.assert_allclose(span @ np.linalg.lstsq(span, raw, rcond=None)[0], raw, atol=1e-8)  # in the span
    rows = slice(0, int((frame["participant"] == "p01").sum()))
    cols = [{"entropy": np.ones(rows.stop)}]
    design = chosen.design(rows, cols)
    assert design.dummies == 1 and design.learners.shape[2] == 1 + 1 + 1 + 5  # 1, entropy, block 2, baseline
    assert design.runs[0] and not design.runs[1:].any()
