"""The RT design check (foretell.steps.design_rt): simulated RTs, power and false-positive tables, the answer."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from scipy.stats import binomtest

from foretell.entropy import entropy_bits
from foretell.errors import UsageError
from foretell.simulate import DEFAULT_RANGES, SpecDrawer
from foretell.simulate_rt import NULLS, RTSimulation, ar1_noise, simulate_dataset
from foretell.steps.design import recover
from foretell.steps.design_rt import RTRecoveryResult, recover_rt
from foretell.steps.rt_power import POWER_COLUMNS, RATE_COLUMNS, power_table, rate_table, rt_answer
from foretell.tasks import Task

PAIRS = Task.from_dict({
    "name": "pairs", "symbols": ["a", "b", "c"], "block_length": 100,
    "contexts": [{"past": [p], "next": {s: 0.8 if s == n else 0.1 for s in "abc"}}
                 for p, n in (("a", "b"), ("b", "c"), ("c", "a"))]})
MODELS = ["count-0", "count-1", "count-2"]
# an invented source whose next symbol is near-certain after a, even after b, uneven after c: a depth-1
# learner's uncertainty varies from trial to trial
UNEVEN = Task.from_dict({
    "name": "uneven", "symbols": ["a", "b", "c"],
    "contexts": [{"past": ["a"], "next": {"a": 0.05, "b": 0.9, "c": 0.05}},
                 {"past": ["b"], "next": {"a": 0.34, "b": 0.33, "c": 0.33}},
                 {"past": ["c"], "next": {"a": 0.6, "b": 0.2, "c": 0.2}}]})


def _drawers(models=MODELS):
    return {m: SpecDrawer(m, False, DEFAULT_RANGES, None) for m in models}


# -- the simulated reaction times ---------------------------------------------------------------------
def test_ar1_noise_has_the_stated_sd_and_lag_one_correlation():
    # a stationary AR(1) has variance sd^2 and lag-k correlation phi^k (Box & Jenkins, 1970; common practice)
    e = ar1_noise(200_000, 0.6, 0.3, np.random.default_rng(0))
    assert e.std() == pytest.approx(0.3, rel=0.02)
    assert np.corrcoef(e[:-1], e[1:])[0, 1] == pytest.approx(0.6, abs=0.01)
    assert np.corrcoef(e[:-2], e[2:])[0, 1] == pytest.approx(0.36, abs=0.01)


def test_the_law_adds_the_learner_term_to_practice_and_noise():
    law = RTSimulation()
    entropy = np.random.default_rng(1).uniform(0, 1.5, 300)
    learner = law.log_rt("count-1", entropy, 0.04, np.random.default_rng(7))
    practice = law.log_rt("practice-only", entropy, 0.04, np.random.default_rng(7))  # same noise draws
    np.testing.assert_allclose(learner - practice, 0.04 / 0.5 * entropy, rtol=1e-12)
    t = np.arange(1, 301)
    noise = practice - math.log(0.5) - np.log1p(0.5 * t ** -0.4)
    np.testing.assert_allclose(noise, ar1_noise(300, 0.5, 0.25, np.random.default_rng(7)), rtol=1e-12)
    drift = law.log_rt("drift-only", entropy, 0.04, np.random.default_rng(7))
    np.testing.assert_allclose(drift, math.log(0.5) + ar1_noise(300, 0.9, 0.25, np.random.default_rng(7)))
    for bad in ({"phi": 1.0}, {"baseline": 0.0}, {"noise_sd": -0.1}):
        with pytest.raises(UsageError):
            RTSimulation(**bad)


def test_simulated_rts_follow_the_generating_learners_entropy():
    frame = simulate_dataset(UNEVEN, _drawers(), "count-1", 2, 3000, 1, 0, 0.04, RTSimulation(noise_sd=0.1))
    assert list(frame["participant"].unique()) == ["p01", "p02"]
    assert list(frame.columns) == ["participant", "session", "block", "trial", "stimulus", "response", "rt"]
    assert frame["rt"].isna().equals(frame["response"] == "")  # no RT where the guess was missed
    one = frame[frame["participant"] == "p01"].reset_index(drop=True)
    from foretell.learners import Counting

    x = one["stimulus"].map({"a": 0, "b": 1, "c": 2}).to_numpy()
    entropy = entropy_bits(Counting(depth=1, alpha=0.5).next_proba(x, 3))
    t = np.arange(1, len(one) + 1)
    ok = one["rt"].notna().to_numpy()
    y = np.log(one["rt"].to_numpy()[ok]) - np.log1p(0.5 * t[ok] ** -0.4)
    X = np.column_stack([np.ones(ok.sum()), entropy[ok]])
    coef = np.linalg.lstsq(X, y, rcond=None)[0]  # least squares (common practice)
    assert entropy[ok].std() > 0.3
    assert coef[0] == pytest.approx(math.log(0.5), abs=0.03)
    assert coef[1] == pytest.approx(0.08, abs=0.02)  # 0.04 s per bit at a 0.5 s baseline


def test_nulls_guess_by_the_learners_in_turn_and_their_rts_ignore_them():
    frame = simulate_dataset(PAIRS, _drawers(), "drift-only", 4, 120, 2, 5, 0.04, RTSimulation())
    again = simulate_dataset(PAIRS, _drawers(), "drift-only", 4, 120, 2, 5, 0.5, RTSimulation())
    pd.testing.assert_frame_equal(frame, again)  # the effect does not reach a null's RTs
    other = simulate_dataset(PAIRS, _drawers(), "drift-only", 4, 120, 3, 5, 0.04, RTSimulation())
    assert not frame["rt"].equals(other["rt"])  # each dataset its own stream
    with pytest.raises(UsageError, match="unknown process"):
        simulate_dataset(PAIRS, _drawers(), "count-9", 1, 50, 1, 0, 0.04, RTSimulation())


# -- the tables and the answer -------------------------------------------------------------------------
def _called(cells):
    """Return dataset rows from {(trials, process): [called, ...]}."""
    return [{"trials": t, "generating": g, "dataset": d, "called": c}
            for (t, g), calls in cells.items() for d, c in enumerate(calls, start=1)]


def _cells(trials, power, false_positives, n=20):
    """Return calls at one trial count: each learner called in ``power`` of n, each null in ``false_positives``."""
    out = {}
    for g in ("count-0", "count-1"):
        k = round(power[g] * n)
        out[(trials, g)] = [g] * k + ["none"] * (n - k)
    for g in NULLS:
        k = round(false_positives[g] * n)
        out[(trials, g)] = ["count-0"] * k + ["none"] * (n - k)
    return out


def test_power_and_false_positive_tables():
    cells = _cells(200, {"count-0": 0.75, "count-1": 0.5}, {"practice-only": 0.1, "drift-only": 0.0})
    cells[(200, "count-1")][0] = "count-0"  # one confusion
    power = power_table(_called(cells), [200], ["count-0", "count-1"])
    assert list(power.columns) == POWER_COLUMNS and len(power) == 4 * 3
    np.testing.assert_allclose(power.groupby(["trials", "generating"])["share"].sum(), 1.0)
    row = power.set_index(["generating", "called"])
    assert row.loc[("count-1", "count-0"), "counts_as"] == "confusion"
    assert row.loc[("count-1", "count-1"), "n_called"] == 9
    assert row.loc[("practice-only", "count-0"), "counts_as"] == "false positive"
    assert row.loc[("drift-only", "none"), "counts_as"] == "not called"
    rates = rate_table(power)
    assert list(rates.columns) == RATE_COLUMNS
    assert list(rates["generating"]) == ["count-0", "count-1", *NULLS]
    r = rates.set_index("generating")
    # exact intervals against scipy.stats.binomtest (Clopper & Pearson, 1934; Virtanen et al., 2020)
    for g, k in (("count-0", 15), ("practice-only", 2)):
        ci = binomtest(k, 20).proportion_ci(0.95, method="exact")
        assert (r.loc[g, "ci95_low"], r.loc[g, "ci95_high"]) == pytest.approx((ci.low, ci.high), abs=1e-10)
    assert r.loc["practice-only", "rate"] == "false positive" and r.loc["practice-only", "share"] == 0.1
    assert not r["shown"].any()  # 15 of 20 is not shown to be >= 80%; 0 of 20 not shown to be <= 5%
    assert r.loc["drift-only", "n_datasets_needed"] == 72  # 0 of 72: upper bound 1 - 0.025^(1/72) < 0.05
    assert binomtest(0, 72).proportion_ci(0.95, method="exact").high <= 0.05 \
        < binomtest(0, 71).proportion_ci(0.95, method="exact").high
    assert pd.isna(r.loc["count-1", "n_datasets_needed"])  # 45% power cannot be shown to reach 80%


def test_answer_names_the_smallest_trial_count_meeting_both_criteria():
    law = RTSimulation().words(0.04)
    weak = _cells(200, {"count-0": 0.9, "count-1": 0.95}, {"practice-only": 0.0, "drift-only": 0.0})
    strong = _cells(600, {"count-0": 1.0, "count-1": 1.0}, {"practice-only": 0.0, "drift-only": 0.0}, n=80)
    rates = rate_table(power_table(_called({**weak, **strong}), [200, 600], ["count-0", "count-1"]))
    text = rt_answer(rates, 10, 80, law)
    assert "600 trials per participant is the smallest listed count that meets both" in text
    assert "about 40 ms per bit" in text and "Cohen, 1988" in text
    rates = rate_table(power_table(_called(weak), [200], ["count-0", "count-1"]))
    text = rt_answer(rates, 10, 20, law)
    assert "No listed trial count meets both. Power is shown for no learner. At 200 trials: power count-0 90% " \
           "(95% CI 68%-99%)" in text
    assert "datasets per process would show both" in text
    fp = _cells(200, {"count-0": 1.0, "count-1": 1.0}, {"practice-only": 0.5, "drift-only": 0.0})
    text = rt_answer(rate_table(power_table(_called(fp), [200], ["count-0", "count-1"])), 10, 20, law)
    assert "Power is shown for count-0 from 200 trials, count-1 from 200 trials." in text
    assert "practice-only's false positive share (50%) is not below 5%" in text
    assert "72 datasets per process would show the other criteria" in text  # drift-only: 0 of 72 would show it


# -- the whole check -----------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def small_check():
    return recover_rt(PAIRS, models=MODELS[:2], n_participants=6, trial_counts=[200], n_datasets=3, seed=2,
                      progress=False)


def test_recover_rt_tables_and_files(small_check):
    assert isinstance(small_check, RTRecoveryResult) and small_check.step == "recover_rt"
    power = small_check.rt_power
    assert set(power["generating"]) == {*MODELS[:2], *NULLS} and (power["n_datasets"] == 3).all()
    assert set(power["called"]) == {*MODELS[:2], "none"}
    np.testing.assert_allclose(power.groupby("generating")["share"].sum(), 1.0)
    pd.testing.assert_frame_equal(small_check.rt_rates, rate_table(power))
    assert small_check.files() == ["figures/rt_power.png", "rt_answer.txt", "rt_power.csv", "rt_rates.csv"]
    assert isinstance(small_check.figures()["rt_power"], Figure)
    assert small_check.settings["n_datasets"] == 3 and small_check.settings["simulation"]["phi"] == 0.5
    assert small_check.answer.startswith("RT design check on 3 simulated datasets of 6 participants")


def test_recover_with_rt_joins_the_rt_check():
    res = recover(PAIRS, models=["count-0", "count-1"], n_participants=3, trial_counts=[100], seed=1,
                  progress=False, rt=True, rt_datasets=2)
    assert res.rt is not None and res.rt.settings["n_datasets"] == 2
    assert {"rt_power", "rt_rates"} <= set(res.tables()) and "rt_answer.txt" in res.texts()
    assert "figures/rt_power.png" in res.files() and res.settings["rt"]["models"] == ["count-0", "count-1"]
    assert "rt_power" not in recover(PAIRS, models=["count-0", "count-1"], n_participants=3, trial_counts=[100],
                                     seed=1, progress=False).tables()


@pytest.mark.parametrize("kwargs, message", [
    ({"models": ["count-0"]}, "at least two"),
    ({"n_datasets": 0}, "n_datasets"),
    ({"effect": -0.1}, "effect"),
    ({"trial_counts": [1]}, "trial count"),
    ({"simulation": {"phi": 0.5}}, "RTSimulation"),
])
def test_bad_arguments_are_usage_errors(kwargs, message):
    args = {"models": MODELS, "n_participants": 2, "trial_counts": [100], **kwargs}
    with pytest.raises(UsageError, match=message):
        recover_rt(PAIRS, **args)
