"""The choice rule against reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import expit, softmax

from foretell.choice import choice_log_proba, choice_proba


def test_softmax_part_matches_scipy() -> None:
    # With lapse 0 the rule is softmax(inv_temp * log p): scipy.special.softmax (Virtanen et al., 2020).
    rng = np.random.default_rng(0)
    pred = rng.dirichlet(np.ones(4), size=50)
    for beta in (0.3, 1.0, 7.5):
        assert np.allclose(choice_proba(pred, beta, 0.0), softmax(beta * np.log(pred), axis=1))


def test_two_symbols_is_a_logistic_of_the_log_odds() -> None:
    # P(a) = sigmoid(beta (log p_a - log p_b)) for m = 2 (common practice; scipy.special.expit).
    p = np.linspace(0.01, 0.99, 40)
    pred = np.stack([p, 1 - p], axis=1)
    assert np.allclose(choice_proba(pred, 2.5, 0.0)[:, 0], expit(2.5 * (np.log(p) - np.log(1 - p))))


def test_lapse_mixes_with_uniform() -> None:
    pred = np.array([[0.7, 0.2, 0.1]])
    sharp = choice_proba(pred, 40.0, 0.0)
    mixed = choice_proba(pred, 40.0, 0.3)
    assert np.allclose(mixed, 0.7 * sharp + 0.1)
    assert np.allclose(choice_proba(pred, 1.0, 1.0), 1 / 3)
    assert np.allclose(choice_proba(pred, 1.0, 0.0), pred)  # inv_temp 1 = probability matching


def test_log_space_survives_extreme_inverse_temperature() -> None:
    pred = np.array([[1e-12, 1 - 1e-12]])
    out = choice_log_proba(pred, 50.0, 1e-4)
    assert np.all(np.isfinite(out))
    assert out[0, 0] == pytest.approx(np.log(1e-4 / 2), rel=1e-6)


def test_sample_choices_inverts_the_cumulative_distribution():
    # inverse-CDF sampling (common practice): u below the first cut gives symbol 0, and so on
    from foretell.choice import sample_choices

    proba = np.array([[0.2, 0.5, 0.3], [1.0, 0.0, 0.0]])
    u = np.array([[0.1, 0.99], [0.25, 0.5], [0.69, 0.0], [0.71, 0.999999]])
    assert sample_choices(proba, u).tolist() == [[0, 0], [1, 0], [1, 0], [2, 0]]
    draws = sample_choices(proba[:1], np.random.default_rng(0).random((20_000, 1)))[:, 0]
    assert np.allclose(np.bincount(draws, minlength=3) / 20_000, proba[0], atol=0.015)
