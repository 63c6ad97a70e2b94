"""The choice rule: a learner's predictive distribution -> guess probabilities (and their gradient)."""

from __future__ import annotations

import math

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


def sample_choices(proba: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Return the symbol drawn on each trial from guess probabilities ``proba`` (n, m) and uniforms ``u``.

    Inverse-CDF sampling (common practice): the draw is the first a with
    u < P(guess <= a). ``u`` has shape (..., n) (e.g. replicates x trials); the
    result has the shape of ``u``.
    """
    m = proba.shape[-1]
    return np.minimum((np.cumsum(proba, axis=-1) < np.asarray(u)[..., None]).sum(axis=-1), m - 1)


def choice_terms(log_pred: np.ndarray, guess: np.ndarray, inv_temp: float,
                 lapse: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return per-trial log P(guess) and its derivatives in inv_temp and in lapse.

    With s = log_softmax(inv_temp * log p) and P = (1 - lapse) e^{s_g} + lapse/m:
    d log P / d inv_temp = (1 - lapse) e^{s_g} (log p_g - sum_a e^{s_a} log p_a) / P and
    d log P / d lapse = (1/m - e^{s_g}) / P (differentiating the choice rule of
    :func:`choice_log_proba`; softmax derivative, common practice).
    ``log_pred`` has shape (n, m), ``guess`` holds n symbol indices.
    """
    n, m = log_pred.shape
    rows = np.arange(n)
    z = inv_temp * log_pred
    z -= z.max(axis=1, keepdims=True)
    expz = np.exp(z)
    total = expz.sum(axis=1)
    softmax = expz / total[:, None]
    s_g = z[rows, guess] - np.log(total)  # log softmax at the guess
    if lapse > 0.0:
        logp = np.logaddexp(math.log1p(-lapse) + s_g, math.log(lapse / m))
    else:
        logp = s_g
    share = np.exp(math.log1p(-lapse) + s_g - logp)  # (1 - lapse) e^{s_g} / P
    d_inv_temp = share * (log_pred[rows, guess] - (softmax * log_pred).sum(axis=1))
    with np.errstate(over="ignore"):
        d_lapse = (1.0 / m - np.exp(s_g)) * np.exp(-logp)
    return logp, d_inv_temp, d_lapse
