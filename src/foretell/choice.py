"""The choice rule: a learner's predictive distribution -> guess probabilities."""

from __future__ import annotations

import numpy as np
from scipy.special import log_softmax

_TINY = 1e-300


def choice_log_proba(pred: np.ndarray, inv_temp: float, lapse: float) -> np.ndarray:
    """Return log P(guess = a) for every row of ``pred`` (shape (n, m)).

    P(guess = a) = (1 - lapse) * softmax(inv_temp * log p)_a + lapse / m

    ``inv_temp = 1`` is probability matching; ``inv_temp -> inf`` approaches
    always guessing the most probable symbol (softmax choice rule with a lapse,
    common practice in reinforcement-learning and sequence-learning models).
    Computed in log space: log((1-l) e^{s_a} + l/m) with s = log_softmax.
    """
    pred = np.asarray(pred, dtype=float)
    m = pred.shape[-1]
    s = log_softmax(inv_temp * np.log(np.maximum(pred, _TINY)), axis=-1)
    if lapse <= 0.0:
        return s
    with np.errstate(divide="ignore"):  # lapse = 1: log(0) + s = -inf, the softmax term vanishes
        return np.logaddexp(np.log1p(-lapse) + s, np.log(lapse / m))


def choice_proba(pred: np.ndarray, inv_temp: float, lapse: float) -> np.ndarray:
    """Return P(guess = a) for every row of ``pred``; see :func:`choice_log_proba`."""
    return np.exp(choice_log_proba(pred, inv_temp, lapse))
