"""Tests of the learner-free context report (response trees) and its comparison with the source tree."""

from __future__ import annotations

import tomllib
from functools import partial
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from foretell.choice import choice_proba
from foretell.contexts import STATUSES, context_agreement, context_report, response_tree_depth
from foretell.learners.mixture import MAX_TREE_DEPTH
from foretell.errors import UsageError
from foretell.learners import Counting, TreeMixture
from foretell.logs import validate_log
from foretell.simulate import ParticipantSpec, simulate_participants
from foretell.tasks import Task, load_task

TASKS = Path(__file__).resolve().parents[1] / "tasks"


def _log(x, guesses, block, session=1, participant="p1", missed=None):
    missed = np.zeros(len(x), dtype=bool) if missed is None else missed
    return pd.DataFrame(dict(participant=participant, group="g", session=session, block=block,
                             trial=np.arange(len(x)), stimulus_idx=x,
                             response_idx=np.where(missed, -1, guesses), missed=missed))


def _depth1_rule(x, m):
    """Guess the most frequent successor of the last stimulus (a depth-1 rule); trial 0 guesses 0."""
    succ = np.zeros((m, m))
    np.add.at(succ, (x[:-1], x[1:]), 1)
    return np.r_[0, succ.argmax(axis=1)[x[:-1]]]


def test_depth1_rule_gives_a_depth1_response_tree(lantern):
    # A guesser whose guess is a function of the last stimulus only has a
    # depth-1 response tree: the root splits, its children are leaves. With a
    # deterministic rule the Bayesian context-tree posterior concentrates on
    # that tree (consistency of the MAP tree, Kontoyiannis et al., 2022; from memory).
    x = lantern.sample(1500, seed=1)
    guesses = _depth1_rule(x, lantern.n_symbols)
    rep = context_report(_log(x, guesses, block=np.repeat([1, 2, 3], 500)), lantern)
    whole = rep[rep["block"] == "all"].set_index("context")
    assert whole.loc["*", "leaf_prob"] < 0.01
    depth1 = whole[whole["depth"] == 1]
    assert len(depth1) == lantern.n_symbols
    assert (depth1["leaf_prob"] > 0.99).all() and depth1["in_map_tree"].all()
    assert not whole.loc[whole["depth"] != 1, "in_map_tree"].any()
    # Each trial's context has exactly one leaf on its path, so leaf
    # probabilities along a path sum to 1 and over a depth level to at most 1
    # (the prior of Willems et al., 1995, is a distribution over trees).
    assert whole.loc[whole["depth"] >= 2, "leaf_prob"].sum() < 0.01
    # in_source_tree marks exactly the contexts of the task file itself (read here with tomllib).
    spec = tomllib.loads((TASKS / "lantern-relay.toml").read_text())
    pasts = {"-".join(c["past"]) or "*" for c in spec["contexts"]}
    assert set(whole.index[whole["in_source_tree"]]) == pasts
    agree = context_agreement(rep, lantern)
    overall = agree[agree["block"] == "all"].set_index("source_context")
    assert overall.loc["red", "status"] == "distinguished"
    assert overall.loc["blue", "status"] == "distinguished"
    deep = overall[overall["depth"] >= 2]
    assert (deep["status"] == "merged into shorter").all() and (deep["response_leaf"] == "green").all()


def test_source_argmax_guesser_distinguishes_every_source_context(lantern):
    # Guessing the most probable next symbol of the true context: the response
    # tree is the source tree wherever sibling contexts call for different
    # guesses, which holds for every split of lantern-relay (see the task file).
    x = lantern.sample(5000, seed=7)
    probs = lantern.next_proba(x)
    guesses = probs.argmax(axis=1)
    rep = context_report(_log(x, guesses, block=1), lantern, blocks=False)
    agree = context_agreement(rep, lantern)
    assert set(agree["block"]) == {"all"}
    assert (agree["status"] == "distinguished").all(), agree


def test_deeper_rule_than_the_source_shows_split_deeper():
    # A memoryless source whose guesser uses the last stimulus: the guesses
    # split the source's only context (the root).
    task = load_task(TASKS / "compass-fair.toml")
    x = task.sample(800, seed=3)
    rep = context_report(_log(x, np.r_[0, x[:-1]], block=1), task, blocks=False)
    agree = context_agreement(rep, task)
    assert agree["status"].tolist() == ["split into longer"] and agree["response_leaf"].tolist() == [""]
    const = context_agreement(context_report(_log(x, np.zeros_like(x), block=1), task), task)
    assert (const["status"] == "distinguished").all()
    assert set(agree["status"]) <= set(STATUSES)


def test_blocks_count_only_their_own_guesses(lantern):
    # Block 1: a constant guess (no context); block 2: the depth-1 rule.
    x = lantern.sample(1200, seed=5)
    guesses = np.where(np.arange(1200) < 600, 1, _depth1_rule(x, lantern.n_symbols))
    block = np.where(np.arange(1200) < 600, 1, 2)
    rep = context_report(_log(x, guesses, block), lantern)
    root = rep[rep["context"] == "*"].set_index("block")["n_obs"]
    d = lantern.max_depth + 1
    assert root["all"] == 1200 - d and root["1"] == 600 - d and root["2"] == 600
    b1 = rep[rep["block"] == "1"].set_index("context")
    b2 = rep[rep["block"] == "2"].set_index("context")
    assert b1.loc["*", "in_map_tree"] and b1.loc["*", "leaf_prob"] > 0.95
    assert not b2.loc["*", "in_map_tree"] and (b2.loc[b2["depth"] == 1, "leaf_prob"] > 0.99).all()
    assert rep["block"].map(type).eq(str).all() and (rep["n_obs"] > 0).all()


def test_sessions_pool_by_summing_node_counts_and_missed_guesses_are_skipped(lantern):
    # The documented pooling: counts of the pooled rows equal the sums of the
    # per-session counts of the mixture run on each session alone.
    rng = np.random.default_rng(2)
    d = lantern.max_depth + 1
    logs, per_session = [], []
    for s, n in [(1, 400), (2, 300)]:
        x = lantern.sample(n, seed=10 + s)
        missed = rng.random(n) < 0.05
        g = _depth1_rule(x, lantern.n_symbols)
        logs.append(_log(x, g, block=1, session=s, missed=missed))
        post = TreeMixture(max_depth=d).posterior(x, lantern.n_symbols, targets=np.where(missed, -1, g))[0]
        per_session.append(pd.Series(post.n_obs, index=[lantern.context_label(c) for c in post.contexts]))
    rep = context_report(pd.concat(logs, ignore_index=True), lantern)
    pooled = rep[rep["block"] == "all"].set_index("context")["n_obs"]
    expected = per_session[0].add(per_session[1], fill_value=0)
    expected = expected[expected > 0]
    pd.testing.assert_series_equal(pooled.sort_index().astype(float), expected.sort_index().astype(float),
                                   check_names=False)
    # blocks keep their session: block 1 of session 1 and block 1 of session 2
    assert set(zip(rep["session"], rep["block"])) == {("all", "all"), ("1", "1"), ("2", "1")}
    root = rep[rep["context"] == "*"].set_index("session")["n_obs"]
    assert root["1"] == per_session[0]["*"] and root["2"] == per_session[1]["*"]


# -- the winning model's baseline (posterior predictive check) ----------------------------------

def _memoryless_task():
    return Task.from_dict({"name": "three-beads", "symbols": ["a", "b", "c"], "block_length": 100,
                           "contexts": [{"past": [], "next": {"a": 0.5, "b": 0.3, "c": 0.2}}]})


def _simulated(task, spec, n, n_blocks, seed, block_length=None):
    log, truth = simulate_participants(task, n, n_blocks, models=[spec], seed=seed,
                                       block_length=block_length)
    return validate_log(log, task).frame, truth


def _tables(truth, model=None):
    """Fits and winners that name the generating model (or ``model``) at the true parameters."""
    model = truth["model"] if model is None else model
    fits = truth[[c for c in ("participant", "inv_temp", "lapse", "leak") if c in truth]].assign(model=model)
    winners = truth[["participant"]].assign(block="all", best_model=model)
    return fits, winners


def test_recency_alone_splits_the_tree_but_stays_within_the_winning_model():
    # Leaky depth-0 guessers on a memoryless source guess what they have just
    # seen: their response trees split the root deeper, though they count no
    # context. Against their own (winning) model the split is expected.
    task = _memoryless_task()
    log, truth = _simulated(task, ParticipantSpec("count-0-leak", inv_temp=(2.0, 4.0), leak=(0.3, 0.4)),
                            8, 2, seed=11)
    fits, winners = _tables(truth)
    rep = context_report(log, task, fits=fits, winners=winners, n_replicates=8, seed=1)
    agree = context_agreement(rep, task)
    whole = agree[agree["block"] == "all"]
    assert (whole["status"] == "split into longer").mean() >= 0.75  # the defect the baseline answers
    assert (whole["model"] == "count-0-leak").all() and (whole["n_replicates"] == 8).all()
    assert agree["beyond_model"].mean() <= 0.25
    # The same trees against a non-leaky count-0 winner are beyond that model.
    fits0, winners0 = _tables(truth.assign(leak=np.nan), model="count-0")
    agree0 = context_agreement(context_report(log, task, fits=fits0, winners=winners0,
                                              n_replicates=8, seed=1), task)
    whole0 = agree0[agree0["block"] == "all"]
    assert whole0.loc[whole0["status"] == "split into longer", "beyond_model"].mean() >= 0.75


def test_context_use_deeper_than_the_winning_model_is_beyond_it(tide):
    # Guesses from a depth-2 counting learner, while the winners table says
    # count-0: the response tree distinguishes the source's contexts, which a
    # count-0 guesser does not do.
    log, truth = _simulated(tide, ParticipantSpec("count-2", inv_temp=(4.0, 6.0)), 6, 2, seed=5,
                            block_length=150)
    fits, winners = _tables(truth.drop(columns="leak"), model="count-0")
    rep = context_report(log, tide, fits=fits, winners=winners, n_replicates=8, seed=2)
    agree = context_agreement(rep, tide)
    deep = agree[agree["depth"] == 2]
    assert (deep["status"] == "distinguished").mean() >= 0.75
    assert deep["beyond_model"].mean() >= 0.75
    assert (deep["expected_status_share"] < 0.05).mean() >= 0.75
    # the report's shares are shares of replicates: they sum to 1 on every visited context
    shares = rep[["expected_distinguished", "expected_merged", "expected_split_deeper"]].sum(axis=1)
    np.testing.assert_allclose(shares, 1.0)
    assert ((rep["expected_leaf_prob"] >= 0) & (rep["expected_leaf_prob"] <= 1)).all()


def test_a_deterministic_winner_reproduces_the_observed_tree(tide):
    # Guesses that are the argmax of the source's probabilities (tide-gauge has
    # no ties), two sessions with missed trials; the winner "source" with a
    # near-deterministic choice rule (inv_temp 1000, lapse 0) draws the very
    # same guesses on every counted trial, so each replicate tree is the observed tree.
    rng = np.random.default_rng(4)
    logs = []
    for s, n in [(1, 300), (2, 240)]:
        x = tide.sample(n, seed=20 + s)
        missed = rng.random(n) < 0.05
        logs.append(_log(x, tide.next_proba(x).argmax(axis=1), block=np.arange(n) // 120 + 1,
                         session=s, missed=missed))
    log = pd.concat(logs, ignore_index=True)
    fits = pd.DataFrame({"participant": ["p1"], "model": ["source"], "inv_temp": [1000.0], "lapse": [0.0]})
    winners = pd.DataFrame({"participant": ["p1"], "block": ["all"], "best_model": ["source"]})
    rep = context_report(log, tide, fits=fits, winners=winners, n_replicates=3, seed=0)
    np.testing.assert_allclose(rep["expected_leaf_prob"], rep["leaf_prob"], rtol=1e-9, atol=1e-300)
    assert (rep["expected_distinguished"] == rep["in_map_tree"].astype(float)).all()
    agree = context_agreement(rep, tide)
    assert set(zip(agree["session"], agree["block"])) == {("all", "all"), ("1", "1"), ("1", "2"),
                                                         ("1", "3"), ("2", "1"), ("2", "2")}
    assert (agree["status"] == "distinguished").all()
    assert (agree["expected_status_share"] == 1.0).all() and not agree["beyond_model"].any()


def test_replicates_restart_the_learner_at_each_session_and_follow_the_choice_rule(lantern):
    # Frequencies of the replicate guesses against the choice rule applied to
    # the learner run on each session alone (binomial sampling error, R = 4000:
    # sd <= 0.008; the bound 0.04 is 5 sd).
    from foretell.contexts import _Winner, _replicate_guesses
    x1, x2 = lantern.sample(150, seed=1), lantern.sample(100, seed=2)
    x, session = np.r_[x1, x2], np.repeat([1, 2], [150, 100])
    learner, m = Counting(depth=1), lantern.n_symbols
    winner = _Winner("count-1", learner, 2.0, 0.1)
    guesses = _replicate_guesses(winner, x, session, np.ones(len(x), dtype=bool), m, 4000,
                                 np.random.default_rng(0))
    freq = np.stack([(guesses == a).mean(axis=0) for a in range(m)], axis=1)
    restarted = choice_proba(np.r_[learner.next_proba(x1, m), learner.next_proba(x2, m)], 2.0, 0.1)
    assert np.abs(freq - restarted).max() < 0.04
    carried_on = choice_proba(learner.next_proba(x, m), 2.0, 0.1)
    assert np.abs(carried_on - restarted).max() > 0.1  # the check can tell the two apart
    counted = np.arange(len(x)) % 2 == 0
    masked = _replicate_guesses(winner, x, session, counted, m, 2, np.random.default_rng(0))
    assert (masked[:, ~counted] == -1).all() and (masked[:, counted] >= 0).all()


def test_replicates_are_reproducible_and_keyed_by_participant(tide):
    log, truth = _simulated(tide, ParticipantSpec("count-1", inv_temp=(1.0, 3.0)), 3, 2, seed=8,
                            block_length=60)
    fits, winners = _tables(truth.drop(columns="leak"))
    run = partial(context_report, task=tide, fits=fits, winners=winners, n_replicates=4)
    first = run(log, seed=7)
    pd.testing.assert_frame_equal(first, run(log, seed=7))
    # the same participant's rows whatever the order of the log or the other participants
    shuffled = log.sample(frac=1.0, random_state=0)
    pd.testing.assert_frame_equal(first, run(shuffled, seed=7))
    alone = run(log[log["participant"] == "p02"], seed=7)
    pd.testing.assert_frame_equal(alone.reset_index(drop=True),
                                  first[first["participant"] == "p02"].reset_index(drop=True))
    other = run(log, seed=8)
    assert not np.allclose(other["expected_leaf_prob"], first["expected_leaf_prob"])
    pd.testing.assert_frame_equal(other.iloc[:, :11], first.iloc[:, :11])  # the observed columns


def test_without_a_winner_the_baseline_columns_are_empty(tide):
    log, truth = _simulated(tide, ParticipantSpec("count-1"), 2, 1, seed=3, block_length=80)
    plain = context_report(log, tide)
    assert plain["model"].isna().all() and (plain["n_replicates"] == 0).all()
    assert plain[["expected_leaf_prob", "expected_distinguished"]].isna().all().all()
    agree = context_agreement(plain, tide)
    assert agree["beyond_model"].isna().all() and agree["expected_status_share"].isna().all()
    # p02 has no usable fit (inv_temp NaN): only p01 gets replicates
    fits, winners = _tables(truth.drop(columns="leak"))
    fits.loc[fits["participant"] == "p02", "inv_temp"] = np.nan
    agree = context_agreement(context_report(log, tide, fits=fits, winners=winners, n_replicates=2), tide)
    by = agree.groupby("participant")
    assert by["beyond_model"].count().to_dict() == {"p01": len(agree[agree["participant"] == "p01"]), "p02": 0}
    assert set(agree.loc[agree["participant"] == "p01", "model"]) == {"count-1"}


def test_bad_baseline_arguments_are_usage_errors(tide):
    log, truth = _simulated(tide, ParticipantSpec("count-1"), 1, 1, seed=3, block_length=40)
    fits, winners = _tables(truth.drop(columns="leak"))
    with pytest.raises(UsageError, match="both"):
        context_report(log, tide, fits=fits)
    with pytest.raises(UsageError, match="best_model"):
        context_report(log, tide, fits=fits, winners=winners.drop(columns="best_model"))
    with pytest.raises(UsageError, match="n_replicates"):
        context_report(log, tide, fits=fits, winners=winners, n_replicates=0)
    with pytest.raises(UsageError, match="level"):
        context_agreement(context_report(log, tide), tide, level=1.5)


def test_response_trees_look_one_symbol_deeper_than_the_task_within_the_limit(tide):
    assert response_tree_depth(tide) == tide.max_depth + 1
    assert response_tree_depth(tide, 0) == 0 and response_tree_depth(tide, MAX_TREE_DEPTH) == MAX_TREE_DEPTH
    deep = Task.from_dict({"name": "deep", "symbols": ["a", "b"], "contexts": [
        {"past": ["a"] * MAX_TREE_DEPTH, "next": {"a": 0.5, "b": 0.5}}] + [
        {"past": ["b"] + ["a"] * k, "next": {"a": 0.5, "b": 0.5}} for k in range(MAX_TREE_DEPTH)]})
    assert response_tree_depth(deep) == MAX_TREE_DEPTH
    for bad in (-1, MAX_TREE_DEPTH + 1, 2.5, True):
        with pytest.raises(UsageError, match="response-tree depth"):
            response_tree_depth(tide, bad)
