"""The rt step's random-effects calls: models with the same evidence are compared once; the console ranking."""

from __future__ import annotations

import numpy as np
import pandas as pd

from foretell.steps.measure_calls import ranking_text, rfx_selection, same_evidence


def _fits(bic: dict[str, list[float]]) -> pd.DataFrame:
    return pd.DataFrame([{"participant": f"p{i:02d}", "group": "A", "model": m, "bic": b}
                         for m, values in bic.items() for i, b in enumerate(values)])


def test_models_with_the_same_evidence_for_everyone_are_compared_once():
    rng = np.random.default_rng(0)
    base = rng.normal(100, 5, 10)
    fits = _fits({"count-0": base, "count-1": base - 8, "count-0-leak": base, "count-1-leak": base - 8 + 0.5,
                  "none": base + 3})
    # count-1-leak differs for every participant: kept apart; count-0-leak equals count-0: merged into it
    assert same_evidence(fits, []) == [("count-0", "count-0-leak")]
    assert same_evidence(fits, [("count-1", "count-1-leak")]) == [("count-0", "count-0-leak"),
                                                                  ("count-1", "count-1-leak")]


def test_a_duplicate_no_longer_halves_the_frequency_of_its_model():
    # Random-effects selection (Stephan et al., 2009) shares a model's frequency with an exact copy of it: ten
    # participants whose best model is count-1 by 10 BIC units, plus a copy of count-1. Compared once, count-1
    # keeps its whole share.
    base = np.full(10, 100.0)
    fits = _fits({"count-0": base, "count-1": base - 10, "count-1-leak": base - 10, "none": base + 2})
    apart = rfx_selection(fits, seed=0).query("group == 'all'").set_index("model")
    once = rfx_selection(fits, seed=0, merge=same_evidence(fits, [])).query("group == 'all'").set_index("model")
    assert apart.loc["count-1", "expected_freq"] < 0.5 < once.loc["count-1", "expected_freq"]
    assert "count-1-leak" not in once.index


def test_the_console_ranking_shows_only_columns_with_numbers_and_never_rounds_onto_one():
    compare = pd.DataFrame({"model": ["count-1", "none"], "rank": [1, 2], "protected_exceedance": [0.99987, 0.00013],
                            "expected_freq": [0.8, 0.2], "d_bic_sum": [0.0, 41.27], "elpd_diff": [np.nan, np.nan],
                            "n_participants": [10, 10], "evidence": ["clear", "behind"]})
    text = ranking_text(compare)
    assert "elpd_diff" not in text and "> 0.999" in text and "< 0.001" in text and "41.3" in text
    assert max(len(line) for line in text.splitlines()) < 100


def test_no_usable_fits_give_no_merge_and_a_ranking_that_says_so():
    # every participant with too few kept trials: the fits table has no bic column (a case the fuzz test found)
    fits = pd.DataFrame({"participant": ["p01", "p01"], "model": ["count-0", "count-1"], "note": "too few"})
    assert same_evidence(fits, [("count-0", "count-1")]) == [("count-0", "count-1")]
    assert same_evidence(fits, []) == []
    assert ranking_text(pd.DataFrame(columns=["model", "rank"])).startswith("no model ranking")
