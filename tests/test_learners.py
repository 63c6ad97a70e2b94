"""Counting learners, the oracle source and task counting against closed forms and plain loops."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.special import gammaln
from scipy.stats import dirichlet_multinomial

from foretell.errors import UsageError
from foretell.learners import Counting, Source, TaskCounting, TreeMixture
from foretell.tasks import load_task

TASKS = Path(__file__).resolve().parents[1] / "tasks"


def loop_counting(x, m, keys, first, alpha, leak):
    """Plain per-trial loop: predict from the counts of the current node, then decay and count.

    count_t = (1 - leak) count_{t-1} + new_t for every node (the leaky-count
    rule of the issue); keys[t] < 0 or t < first: uniform, not counted.
    """
    counts: dict[int, np.ndarray] = {}
    out = np.full((len(x), m), 1.0 / m)
    for t in range(len(x)):
        k = keys[t]
        if t >= first and k >= 0:
            c = counts.get(k, np.zeros(m))
            out[t] = (c + alpha) / (c.sum() + m * alpha)
        for c in counts.values():
            c *= 1.0 - leak
        if t >= first and k >= 0:
            counts.setdefault(k, np.zeros(m))[x[t]] += 1.0
    return out


def suffix_keys(x, m, depth):
    return [int("".join(map(str, x[t - depth:t])) or "0", m) if t >= depth else -1
            for t in range(len(x))]


def test_kt_closed_form_binary():
    # P_e(a, b) = Gamma(a+1/2) Gamma(b+1/2) / (pi Gamma(a+b+1)) (Krichevsky & Trofimov, 1981; as
    # given in Willems, Shtarkov & Tjalkens, 1995 -- from memory)
    rng = np.random.default_rng(0)
    for n in (1, 7, 60, 1000):
        x = rng.integers(0, 2, n)
        a, b = int((x == 0).sum()), int((x == 1).sum())
        closed = gammaln(a + 0.5) + gammaln(b + 0.5) - math.log(math.pi) - gammaln(a + b + 1)
        assert Counting(depth=0).log_evidence(x, 2) == pytest.approx(closed, rel=1e-12)


@pytest.mark.parametrize("m, alpha", [(3, 0.5), (4, 1.0), (5, 2.5), (8, 0.1)])
def test_dirichlet_multinomial_marginal(m, alpha):
    # scipy.stats.dirichlet_multinomial (reference library; Virtanen et al., 2020) gives the pmf of the counts; the
    # sequential likelihood of one ordering is that pmf divided by the multinomial coefficient.
    x = np.random.default_rng(m).integers(0, m, 200)
    counts = np.bincount(x, minlength=m)
    log_coef = gammaln(len(x) + 1) - gammaln(counts + 1).sum()
    ref = dirichlet_multinomial.logpmf(counts, np.full(m, alpha), len(x)) - log_coef
    assert Counting(depth=0, alpha=alpha).log_evidence(x, m) == pytest.approx(ref, rel=1e-10)


def test_depth_k_evidence_is_a_sum_over_contexts():
    # without leak, depth-k counting is an independent Dirichlet-multinomial per context
    # (scipy.stats.dirichlet_multinomial, divided by each multinomial coefficient)
    m, k, alpha = 3, 2, 0.7
    x = np.random.default_rng(5).integers(0, m, 400)
    ref = 0.0
    for ctx in {tuple(x[t - k:t]) for t in range(k, len(x))}:
        follow = [x[t] for t in range(k, len(x)) if tuple(x[t - k:t]) == ctx]
        c = np.bincount(follow, minlength=m)
        ref += dirichlet_multinomial.logpmf(c, np.full(m, alpha), len(follow)) \
            - (gammaln(len(follow) + 1) - gammaln(c + 1).sum())
    assert Counting(depth=k, alpha=alpha).log_evidence(x, m) == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("depth", [0, 1, 3])
@pytest.mark.parametrize("leak", [0.0, 0.01, 0.3, 0.9])
def test_counting_equals_the_plain_loop(depth, leak):
    m = 3
    x = np.random.default_rng(depth).integers(0, m, 2500)  # long enough for (1-leak)^gap to underflow
    want = loop_counting(x, m, suffix_keys(x, m, depth), depth, 0.5, leak)
    got = Counting(depth=depth, alpha=0.5, leak=leak).next_proba(x, m)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-14)


@settings(max_examples=30, deadline=None)
@given(st.integers(2, 6), st.integers(0, 4), st.integers(0, 10_000), st.integers(0, 200),
       st.floats(0.05, 5.0), st.floats(0.0, 0.95), st.data())
def test_rows_sum_to_one_and_prequential_identity(m, depth, seed, n, alpha, leak, data):
    x = np.random.default_rng(seed).integers(0, m, n)
    model = Counting(depth=depth, alpha=alpha, leak=leak)
    p = model.next_proba(x, m)
    assert p.shape == (n, m)
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(p[:depth], 1.0 / m)
    start = data.draw(st.integers(0, n))
    want = float(np.log(p[np.arange(start, n), x[start:]]).sum())
    assert model.log_evidence(x, m, start=start) == pytest.approx(want, abs=1e-9)


def test_repeated_calls_reuse_the_encoding_and_agree():
    x = np.random.default_rng(2).integers(0, 3, 3000)
    first = Counting(depth=2, leak=0.2).next_proba(x, 3)
    Counting(depth=2, leak=0.5).next_proba(x, 3)
    again = Counting(depth=2, leak=0.2).next_proba(x.tolist(), 3)
    np.testing.assert_array_equal(first, again)


def test_source_is_the_task_probabilities():
    task = load_task(TASKS / "lantern-relay.toml")
    x = task.sample(300, seed=4)
    model = Source(task)
    p = model.next_proba(x, 3)
    d = task.max_depth
    np.testing.assert_allclose(p[:d], 1.0 / 3)
    np.testing.assert_allclose(p[d:], task.next_proba(x)[d:])
    assert model.depth == d
    # the oracle beats a learner on average (the source's own log-likelihood; common practice)
    assert model.log_evidence(x, 3) > Counting(depth=1).log_evidence(x, 3, start=d)


@pytest.mark.parametrize("leak", [0.0, 0.25])
def test_task_counting_equals_the_plain_loop(leak):
    task = load_task(TASKS / "lantern-relay.toml")
    x = task.sample(1500, seed=9)
    keys = task.context_indices(x)
    want = loop_counting(x, 3, keys, task.max_depth, 1.0, leak)
    got = TaskCounting(task, alpha=1.0, leak=leak).next_proba(x, 3)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-14)
    assert TaskCounting(task).depth == task.max_depth


def test_counting_on_the_task_tree_is_a_mixture_limit():
    # a tree mixture restricted to depth k with leaf_prob = 0 is full depth-k counting
    x = np.random.default_rng(8).integers(0, 3, 300)
    full = TreeMixture(max_depth=2, leaf_prob=0.0).log_evidence(x, 3)
    assert full == pytest.approx(Counting(depth=2).log_evidence(x, 3), abs=1e-9)


@pytest.mark.parametrize("kwargs, word", [
    ({"depth": -1}, "depth"), ({"depth": 1.5}, "depth"), ({"alpha": 0.0}, "alpha"),
    ({"alpha": -2}, "alpha"), ({"leak": 1.0}, "leak"), ({"leak": -0.1}, "leak"),
    ({"alpha": float("nan")}, "alpha"),
])
def test_bad_hyperparameters_are_refused(kwargs, word):
    with pytest.raises(UsageError, match=word):
        Counting(**kwargs)


def test_bad_inputs_are_refused():
    model = Counting(depth=1)
    with pytest.raises(UsageError, match=r"\[0, 3\)"):
        model.next_proba(np.array([0, 1, 3]), 3)
    with pytest.raises(UsageError, match="1-D"):
        model.next_proba(np.zeros((2, 2), dtype=int), 3)
    with pytest.raises(UsageError, match="n_symbols"):
        model.next_proba(np.array([0, 1]), 1)
    with pytest.raises(UsageError, match="start"):
        model.log_evidence(np.array([0, 1, 2]), 3, start=4)
    task = load_task(TASKS / "tide-gauge.toml")
    with pytest.raises(UsageError, match="2 symbols"):
        Source(task).next_proba(np.array([0, 1, 2]), 3)
    with pytest.raises(UsageError, match="Task"):
        TaskCounting("tide-gauge")
