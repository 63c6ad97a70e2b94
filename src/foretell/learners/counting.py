"""Counting learners: Dirichlet posterior-predictive on the last k symbols, with optional forgetting."""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from foretell.params import PARAMS

from .base import Grouping, Learner, check_depth, dirichlet_predict, suffix_codes


def counting_predict(grouping: Grouping, alpha: float, leak: float) -> np.ndarray:
    """Return (n, m) predictions of Dirichlet(alpha) counting over the nodes of ``grouping``.

    Row t = (c_a + alpha) / (sum_b c_b + m alpha), c = the (forgotten, if
    leak > 0) counts of what followed the trial's node before t; rows of
    trials outside the grouping are uniform.
    """
    if leak > 0:  # the leaky counts are a new array: normalise them in place
        counts = grouping.leaky_prior_counts(leak)
        return dirichlet_predict(counts, alpha, out=counts)
    return dirichlet_predict(grouping.prior_counts, alpha)


@lru_cache(maxsize=32)
def suffix_grouping(x_bytes: bytes, n_symbols: int, depth: int, first: int) -> Grouping:
    """Return the grouping of trials t >= first by their last ``depth`` symbols (cached).

    ``x_bytes`` is the session as int64 bytes. The fitter reruns the same
    session with new alpha/leak at every optimiser step; the sort by context
    and the counts depend only on (x, m, depth, first), so they are kept.
    """
    x = np.frombuffer(x_bytes, dtype=np.int64)
    return Grouping.build(suffix_codes(x, n_symbols, depth, first), x, n_symbols)


@dataclass(frozen=True)
class Counting(Learner):
    """Dirichlet counting on the last ``depth`` symbols, optionally with exponential forgetting.

    P(x_t = a | x[:t]) = (c_a + alpha) / (sum_b c_b + m alpha), c = what followed
    the current context x[t-k:t] on earlier trials t' >= k. With ``leak`` every
    count of every context is multiplied by (1 - leak) after each trial before
    the new observation is added (count_t = (1 - leak) count_{t-1} + new_t);
    alpha is never decayed. alpha = 1/2 is the Krichevsky-Trofimov estimator
    (Krichevsky & Trofimov, 1981), alpha = 1 Laplace's rule; depth 0 is the
    plain frequency learner.
    """

    depth: int = 0
    alpha: float = 0.5
    leak: float = 0.0

    def __post_init__(self) -> None:
        check_depth("Counting depth", self.depth)
        PARAMS["alpha"].check(self.alpha, "Counting")
        PARAMS["leak"].check(self.leak, "Counting")

    def _predict(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        grouping = suffix_grouping(x.tobytes(), n_symbols, self.depth, self.depth)
        return counting_predict(grouping, self.alpha, self.leak)
