"""Tests of the sequence step: stimulus sequences drawn from the task's source, and their context check."""

from __future__ import annotations


import numpy as np
import pandas as pd
import pytest
from scipy.stats import chisquare

from foretell.errors import TaskError, UsageError
from foretell.outputs import write
from foretell.steps.sequence import make_sequences, stationary_shares
from foretell.tasks import Task

LEVEL = 0.01
"""Family-wise level of the goodness-of-fit checks (Bonferroni over the contexts tested)."""


def test_next_symbol_frequencies_converge_on_the_source(lantern):
    # Pearson's chi-square goodness of fit (scipy.stats.chisquare, Virtanen et al., 2020): by the
    # Markov property, the symbols that follow each visit to a context are independent draws from
    # that context's distribution, so the test applies per context. Symbols of probability 0 must
    # never follow. The seed is fixed, so the test is deterministic; LEVEL bounds a false alarm.
    result = make_sequences(lantern, n_participants=1, n_blocks=1, trials_per_block=20_000, seed=3)
    table = result.transitions[result.transitions["participant"] == "all"]
    tested = 0
    for _, rows in table.groupby("context", sort=False):
        possible = rows["probability"] > 0
        assert (rows.loc[~possible, "count"] == 0).all()
        counts = rows.loc[possible, "count"].to_numpy()
        if counts.sum() < 50:
            continue
        expected = counts.sum() * rows.loc[possible, "probability"].to_numpy()
        tested += 1
        assert chisquare(counts, expected).pvalue > LEVEL / len(lantern.contexts)
    assert tested >= len(lantern.contexts) - 1


def test_stationary_shares_match_a_brute_force_chain(lantern):
    # Brute force: the transition matrix on pasts of maximal depth built trial by trial from
    # Task.next_proba, its stationary distribution as the left eigenvector of eigenvalue 1.
    m, d = lantern.n_symbols, lantern.max_depth
    pasts = np.array(np.meshgrid(*[range(m)] * d, indexing="ij")).reshape(d, -1).T
    index = {tuple(p): i for i, p in enumerate(pasts)}
    trans = np.zeros((len(pasts), len(pasts)))
    for i, past in enumerate(pasts):
        probs = lantern.next_proba(np.r_[past, 0])[-1]
        for a in range(m):
            trans[i, index[tuple(np.r_[past[1:], a])]] += probs[a]
    values, vectors = np.linalg.eig(trans.T)
    pi = np.real(vectors[:, np.argmin(np.abs(values - 1))])
    pi /= pi.sum()
    contexts = [lantern.context_of(list(p)) for p in pasts]
    expected = np.bincount(contexts, weights=pi, minlength=len(lantern.contexts))
    np.testing.assert_allclose(stationary_shares(lantern), expected, atol=1e-10)


def test_the_same_seed_gives_byte_identical_files(tmp_path, lantern):
    options = dict(n_participants=3, n_blocks=2, trials_per_block=40, min_context_count=1, seed=11)
    write(tmp_path / "a", make_sequences(lantern, **options))
    write(tmp_path / "b", make_sequences(lantern, **options))
    names = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*.csv"))
    assert [str(n) for n in names] == ["blocks.csv", "contexts.csv", "sequences/p01.csv", "sequences/p02.csv",
                                       "sequences/p03.csv", "transitions.csv"]
    for name in names:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()
    other = make_sequences(lantern, **(options | {"seed": 12}))
    assert not other.sequences.equals(make_sequences(lantern, **options).sequences)


def test_each_participant_has_their_own_child_seed(lantern):
    few = make_sequences(lantern, n_participants=2, n_blocks=2, trials_per_block=30, seed=5).sequences
    many = make_sequences(lantern, n_participants=12, n_blocks=2, trials_per_block=30, seed=5).sequences
    assert many["participant"].iloc[0] == "p01" and many["participant"].iloc[-1] == "p12"
    pd.testing.assert_frame_equal(few, many[many["participant"].isin(["p01", "p02"])].reset_index(drop=True))


def test_the_sequence_table_is_what_a_log_expects(lantern):
    result = make_sequences(lantern, n_participants=2, n_blocks=3, seed=0)
    frame = result.sequences
    assert list(frame.columns) == ["participant", "block", "trial", "stimulus"]
    assert len(frame) == 2 * 3 * lantern.block_length and set(frame["stimulus"]) <= set(lantern.symbols)
    assert frame.groupby(["participant", "block"])["trial"].agg(["min", "max"]).eq([1, 120]).all().all()
    for _, rows in frame.groupby("participant"):
        assert lantern.impossible(lantern.encode(rows["stimulus"].tolist())).size == 0
    assert result.settings == {"task": "lantern-relay", "n_participants": 2, "n_blocks": 3,
                               "trials_per_block": 120, "burn_in": None, "min_context_count": 0,
                               "max_redraws": 1000, "seed": 0}


def test_blocks_are_redrawn_until_every_context_occurs_and_say_so(lantern):
    result = make_sequences(lantern, n_participants=2, n_blocks=2, trials_per_block=60, min_context_count=2,
                            seed=2)
    assert (result.blocks["fewest"] >= 2).all() and result.blocks["redraws"].sum() > 0
    for (p, b), rows in result.sequences.groupby(["participant", "block"]):
        shown = result.sequences[(result.sequences["participant"] == p) & (result.sequences["block"] <= b)]
        x = lantern.encode(shown["stimulus"].tolist())
        ctx = lantern.context_indices(x)[-len(rows):]
        assert np.bincount(ctx[ctx >= 0], minlength=len(lantern.contexts)).min() >= 2
    redrawn = int((result.blocks["redraws"] > 0).sum())
    assert any(note.startswith(f"{redrawn} of 4 blocks redrawn") for note in result.notes)


def test_an_impossible_context_check_is_a_usage_error(lantern):
    with pytest.raises(UsageError, match=r"participant p01, block 1: after 5 redraws context '.+' still occurs "
                                         r"fewer than 30 times in 40 trials"):
        make_sequences(lantern, n_participants=1, n_blocks=1, trials_per_block=40, min_context_count=30,
                       max_redraws=5)


def test_a_burn_in_starts_from_a_uniform_past(lantern):
    result = make_sequences(lantern, n_participants=1, n_blocks=1, trials_per_block=50, burn_in=200, seed=4)
    assert result.settings["burn_in"] == 200 and "burn-in" in result.notes[0]
    x = lantern.encode(result.sequences["stimulus"].tolist())
    assert lantern.impossible(x).size == 0


def test_bad_requests(lantern):
    no_blocks = Task.from_dict({"name": "coin", "symbols": ["h", "t"],
                                "contexts": [{"past": [], "next": {"h": 0.5, "t": 0.5}}]})
    with pytest.raises(UsageError, match="gives no block_length: give trials_per_block"):
        make_sequences(no_blocks, n_participants=1, n_blocks=1)
    assert len(make_sequences(no_blocks, n_participants=1, n_blocks=2, trials_per_block=5).sequences) == 10
    with pytest.raises(TaskError, match="gives no source"):
        make_sequences(Task.from_dict({"name": "open", "symbols": ["a", "b"]}), n_participants=1, n_blocks=1,
                       trials_per_block=5)
    with pytest.raises(UsageError, match="n_participants must be a whole number >= 1"):
        make_sequences(lantern, n_participants=0, n_blocks=1)
