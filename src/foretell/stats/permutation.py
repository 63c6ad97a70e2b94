"""Permutation tests of a difference in means, and Holm's correction for multiple tests."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy import stats

DEFAULT_PERMUTATIONS = 9999
"""Random permutations per test (exact enumeration when there are fewer distinct splits)."""


def _mean_difference(x: np.ndarray, y: np.ndarray, axis: int) -> np.ndarray:
    return np.mean(x, axis=axis) - np.mean(y, axis=axis)


def permutation_p(values: np.ndarray, reference: np.ndarray, *, n_permutations: int = DEFAULT_PERMUTATIONS,
                  rng: np.random.Generator) -> float:
    """Return the two-sided permutation p-value of mean(values) - mean(reference).

    The Fisher-Pitman permutation test of a difference in means between two
    independent samples: the observed difference is set against its
    distribution over random re-splits of the pooled values into groups of
    the same sizes (:func:`scipy.stats.permutation_test`; exact enumeration
    when there are at most ``n_permutations`` distinct splits).

    Parameters
    ----------
    values, reference : numpy.ndarray
        The two samples.
    n_permutations : int, default :data:`DEFAULT_PERMUTATIONS`
        Random re-splits.
    rng : numpy.random.Generator
        The test's own random stream (:func:`foretell.validation.child_rng`).

    Returns
    -------
    float

    References
    ----------
    Pitman, E. J. G. (1937). Significance tests which may be applied to
    samples from any populations. J. R. Stat. Soc. Suppl. 4, 119-130.
    """
    res = stats.permutation_test((np.asarray(values, float), np.asarray(reference, float)), _mean_difference,
                                 permutation_type="independent", vectorized=True,
                                 n_resamples=int(n_permutations), alternative="two-sided", rng=rng)
    return float(res.pvalue)


def holm(p: Sequence[float]) -> np.ndarray:
    """Return Holm-adjusted p-values; NaN entries stay NaN and do not count as tests.

    With the m finite p-values sorted, p_(1) <= ... <= p_(m), the adjusted
    value of p_(i) is min(1, max_{j <= i} (m - j + 1) p_(j)): the step-down
    procedure that rejects at family-wise level alpha exactly the tests whose
    adjusted value is at most alpha.

    Parameters
    ----------
    p : sequence of float
        Unadjusted p-values (NaN: no test).

    Returns
    -------
    numpy.ndarray
        Adjusted p-values in the input's order.

    References
    ----------
    Holm, S. (1979). A simple sequentially rejective multiple test procedure.
    Scand. J. Statist. 6, 65-70.

    Examples
    --------
    >>> holm([0.01, 0.04, 0.03]).round(3).tolist()
    [0.03, 0.06, 0.06]
    """
    p = np.asarray(p, dtype=float)
    out = np.full(p.shape, np.nan)
    finite = np.flatnonzero(np.isfinite(p))
    order = finite[np.argsort(p[finite])]
    m = len(order)
    out[order] = np.minimum(np.maximum.accumulate(p[order] * np.arange(m, 0, -1)), 1.0)
    return out
