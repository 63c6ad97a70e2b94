"""Tests of the learner-free context report (response trees) and its comparison with the source tree."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pandas as pd

from foretell.contexts import STATUSES, context_agreement, context_report
from foretell.learners import TreeMixture
from foretell.tasks import load_task

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
    assert (deep["status"] == "merged").all() and (deep["response_leaf"] == "green").all()


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
    assert agree["status"].tolist() == ["split-deeper"] and agree["response_leaf"].tolist() == [""]
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
