"""Edge cases with defined behaviour: odd participants, tiny blocks, big alphabets, few people."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import foretell
from foretell.errors import LogError
from foretell.tasks import Task, load_task

MODELS = ["count-0", "count-1"]


def _log(task: Task, n_participants: int = 3, n_trials: int = 60, seed: int = 0,
         block_length: int = 20) -> pd.DataFrame:
    from foretell.simulate import simulate_participants

    frame, _ = simulate_participants(task, n_participants, n_trials // block_length,
                                     models=["count-1"], seed=seed, block_length=block_length)
    return frame


def test_a_participant_who_always_guesses_the_same_symbol_is_fitted():
    task = load_task("tide-gauge")
    frame = _log(task)
    frame.loc[frame["participant"] == "p01", "response"] = "up"
    result = foretell.fit(frame, task, models=MODELS, n_starts=1)
    mine = result.fits[result.fits["participant"] == "p01"]
    assert len(mine) == 2 and mine["loglik"].notna().all()
    assert result.excluded.empty


def test_a_participant_with_every_guess_missed_is_left_out_and_named():
    task = load_task("tide-gauge")
    frame = _log(task)
    frame.loc[frame["participant"] == "p02", "response"] = ""
    result = foretell.fit(frame, task, models=MODELS, n_starts=1)
    assert result.excluded["participant"].tolist() == ["p02"]
    assert "every guess missed" in result.excluded["reason"].iloc[0]
    assert "p02" not in set(result.fits["participant"])
    assert any("p02" in note for note in result.notes)


def test_nobody_to_score_is_an_error():
    task = load_task("tide-gauge")
    frame = _log(task).assign(response="")
    with pytest.raises(LogError, match="no participant has a scored trial"):
        foretell.fit(frame, task, models=MODELS, n_starts=1)


def test_a_block_of_one_trial():
    task = load_task("tide-gauge")
    frame = _log(task, n_trials=60)
    frame.loc[frame["trial"] == 60, "block"] = 4  # the last trial alone in its block
    result = foretell.fit(frame, task, models=MODELS, n_starts=1)
    last = result.blocks[result.blocks["block"].astype(str) == "4"]
    assert not last.empty  # otherwise the checks below would pass on nothing
    assert (last["n_trials"] <= 1).all()
    # one trial cannot pin down two parameters: the block's BIC exists but nothing is "strong"
    winners = result.winners[result.winners["block"].astype(str) == "4"]
    assert not winners.empty
    assert not winners["strength"].isin(["strong", "very-strong"]).any()


def test_a_symbol_that_never_occurs():
    task = Task.from_dict({"name": "three-lights", "symbols": ["red", "green", "blue"],
                           "contexts": [{"past": [], "next": {"red": 0.5, "green": 0.5, "blue": 0.0}}]})
    frame = _log(task)
    assert "blue" not in set(frame["stimulus"])
    result = foretell.fit(frame, task, models=MODELS, n_starts=1)
    assert len(result.fits) == 3 * len(MODELS)
    assert result.fits["converged"].all()
    assert np.isfinite(result.fits["loglik"]).all()


def test_an_alphabet_of_eight_symbols():
    symbols = [f"s{i}" for i in range(8)]
    task = Task.from_dict({"name": "octet", "symbols": symbols,
                           "contexts": [{"past": [s], "next": {t: (0.65 if t == symbols[(i + 1) % 8] else 0.05)
                                                                for t in symbols}}
                                        for i, s in enumerate(symbols)]})
    result = foretell.fit(_log(task, n_trials=120), task, models=MODELS, n_starts=1)
    assert set(result.fits["model"]) == set(MODELS) and result.fits["converged"].all()
    assert {f"p_{s}" for s in symbols} <= set(result.predictions.columns)


def test_two_participants_only():
    task = load_task("tide-gauge")
    result = foretell.fit(_log(task, n_participants=2), task, models=MODELS, n_starts=1)
    assert result.selection["n_participants"].max() == 2
    assert "group all" in result.summary


def test_a_fit_at_a_bound_is_flagged():
    # A participant who always picks the source's most probable symbol needs inv_temp at its bound.
    task = load_task("tide-gauge")
    frame = _log(task, n_participants=2, n_trials=100)
    best = []
    for _, part in frame.groupby("participant", sort=False):
        p = task.next_proba(task.encode(part["stimulus"]))
        best += [task.symbols[i] for i in p.argmax(axis=1)]
    frame["response"] = best
    result = foretell.fit(frame, task, models=["source"], n_starts=1)
    assert len(result.fits) == 2
    assert (result.fits["at_bound"].str.contains("inv_temp")).all()
    assert result.fits["converged"].all()
    assert "inv_temp at its upper bound 50" in result.summary
