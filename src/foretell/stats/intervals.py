"""Intervals: highest density intervals of posterior draws, exact binomial intervals, inverted permutation tests."""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from foretell.errors import UsageError

HDI_PROB = 0.95
"""Probability mass of the reported highest density intervals: 95%, our own choice, to match the
95% confidence intervals reported beside them (Kruschke, 2015, on HDIs)."""
CI_LEVEL = 0.95
"""Level of the exact binomial (Clopper-Pearson) and permutation intervals (common practice)."""


def _check_level(level: float, what: str) -> float:
    if not 0.0 < level < 1.0:
        raise UsageError(f"the {what}'s probability must lie strictly between 0 and 1, got {level!r}")
    return float(level)


def hdi(draws: np.ndarray, prob: float = HDI_PROB) -> tuple[float, float]:
    """Return the highest density interval of ``draws`` (all axes pooled) holding ``prob`` of them.

    With the n draws sorted, x_(0) <= ... <= x_(n-1), and k = floor(prob n),
    the interval is the narrowest [x_(i), x_(i+k)] (the first, on ties): the
    shortest interval between draws that spans k + 1 of them, the
    Monte Carlo estimate of the HDI of a unimodal posterior.

    Parameters
    ----------
    draws : numpy.ndarray
        Posterior draws, any shape.
    prob : float, default :data:`HDI_PROB`
        The share of draws the interval holds, in (0, 1).

    Returns
    -------
    (float, float)
        The interval's ends.

    Raises
    ------
    UsageError
        When ``prob`` is not in (0, 1) or there are too few draws to span.

    References
    ----------
    Chen, M.-H., & Shao, Q.-M. (1999). Monte Carlo estimation of Bayesian
    credible and HPD intervals. J. Comput. Graph. Stat. 8, 69-92.
    Kruschke, J. K. (2015). Doing Bayesian Data Analysis, 2nd ed.

    Examples
    --------
    >>> hdi(np.arange(100.0), 0.9)
    (0.0, 90.0)
    """
    _check_level(prob, "HDI")
    values = np.sort(np.asarray(draws, dtype=float).ravel())
    n = len(values)
    k = int(np.floor(prob * n))
    if n - k < 1:
        raise UsageError(f"{n} draws are too few for a {prob:g} HDI")
    i = int(np.argmin(values[k:] - values[: n - k]))
    return float(values[i]), float(values[i + k])


def clopper_pearson(k: np.ndarray, n: np.ndarray, level: float = CI_LEVEL) -> tuple[np.ndarray, np.ndarray]:
    """Return the exact (Clopper-Pearson) two-sided interval for k successes in n trials.

    Parameters
    ----------
    k, n : numpy.ndarray
        Successes and trials (k may be fractional: the formula's Beta
        quantiles are defined for any 0 <= k <= n).
    level : float, default :data:`CI_LEVEL`

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        low = the a/2 quantile of Beta(k, n - k + 1) (0 when k = 0), high = the
        1 - a/2 quantile of Beta(k + 1, n - k) (1 when k = n), a = 1 - level;
        NaN where n = 0.

    References
    ----------
    Clopper, C. J., & Pearson, E. S. (1934). The use of confidence or fiducial
    limits illustrated in the case of the binomial. Biometrika 26, 404-413.

    Examples
    --------
    >>> low, high = clopper_pearson(np.array([0]), np.array([10]))
    >>> float(low[0]), round(float(high[0]), 4)
    (0.0, 0.3085)
    """
    k, n = np.asarray(k, dtype=float), np.asarray(n, dtype=float)
    a = 1.0 - _check_level(level, "interval")
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(k > 0, stats.beta.ppf(a / 2, np.maximum(k, 1e-300), n - k + 1), 0.0)
        high = np.where(k < n, stats.beta.ppf(1 - a / 2, k + 1, np.maximum(n - k, 1e-300)), 1.0)
    empty = n <= 0
    return np.where(empty, np.nan, low), np.where(empty, np.nan, high)


def trials_to_show(share: float, target: float, level: float = CI_LEVEL, *, most: int = 1_000_000) -> float:
    """Return the smallest n at which a share observed as ``share`` has its lower Clopper-Pearson bound at ``target``.

    The bound is that of :func:`clopper_pearson` (two-sided, ``level``) at
    k = share x n successes out of n: the a/2 quantile of
    Beta(share n, n - share n + 1), a = 1 - level, taken at the fractional
    k share x n so that n does not jump with rounding. For a perfect record
    (share 1, k = n of n) the bound is (a/2)^(1/n), so
    n = ceil(ln(a/2) / ln(target)). The bound rises with n towards the share,
    so n is found by doubling and bisection.

    Parameters
    ----------
    share : float
        The observed share, in [0, 1].
    target : float
        The bound to reach, in (0, 1).
    level : float, default :data:`CI_LEVEL`
    most : int, default 1,000,000
        The largest n searched.

    Returns
    -------
    float
        n as a whole number, or NaN when the share is not above the target
        (no n shows it) or n would exceed ``most``.

    References
    ----------
    Clopper, C. J., & Pearson, E. S. (1934). Biometrika 26, 404-413.

    Examples
    --------
    >>> trials_to_show(1.0, 0.9)  # 36 of 36: lower bound 0.9026; 35 of 35: 0.89997
    36.0
    """
    a = 1.0 - _check_level(level, "interval")
    _check_level(target, "target")
    if not share > target:
        return math.nan
    if share >= 1.0:
        n = math.ceil(math.log(a / 2) / math.log(target))
        return float(n) if n <= most else math.nan

    def reaches(n: int) -> bool:
        return bool(stats.beta.ppf(a / 2, share * n, n - share * n + 1) >= target)

    high = 1
    while not reaches(high):
        if high >= most:
            return math.nan
        high = min(2 * high, most)
    low = high // 2  # does not reach (or 0)
    while high - low > 1:
        mid = (low + high) // 2
        low, high = (low, mid) if reaches(mid) else (mid, high)
    return float(high)


def permutation_interval(values: np.ndarray, reference: np.ndarray, *, n_permutations: int,
                         rng: np.random.Generator, level: float = CI_LEVEL) -> tuple[float, float]:
    """Return the interval of mean(values) - mean(reference) that inverts the two-sided permutation test.

    The interval holds every shift delta that the Fisher-Pitman permutation
    test does not reject at a = 1 - level when delta is taken from ``values``:
    with d = mean(values) - mean(reference) and, for each random re-split pi
    of the pooled values (the same re-splits for every delta), the permuted
    difference T_pi(delta) = S_pi - delta c_pi (S_pi the re-split's
    difference at delta = 0, c_pi = k_pi / n_1 - (n_1 - k_pi) / n_2, k_pi of
    the n_1 ``values`` drawn into the first group),
    p(delta) = (1 + #{pi: |T_pi(delta)| >= |d - delta|}) / (n_permutations + 1);
    the ends are where p(delta) falls to a, found by bisection. It covers 0
    exactly when the permutation test of no difference does not reject
    (up to the random re-splits). An end is infinite when no shift however
    large is rejected (groups too small for the level).

    Parameters
    ----------
    values, reference : numpy.ndarray
        The two samples.
    n_permutations : int
        Random re-splits.
    rng : numpy.random.Generator
        The interval's own random stream (:func:`foretell.validation.child_rng`).
    level : float, default :data:`CI_LEVEL`

    Returns
    -------
    (float, float)

    References
    ----------
    Ernst, M. D. (2004). Permutation methods: a basis for exact inference.
    Statistical Science 19, 676-685.
    Phipson, B., & Smyth, G. K. (2010). Permutation p-values should never be
    zero. Stat. Appl. Genet. Mol. Biol. 9, 39.
    """
    alpha = 1.0 - _check_level(level, "interval")
    a, b = np.asarray(values, float), np.asarray(reference, float)
    n1, n2 = len(a), len(b)
    pooled = np.r_[a, b]
    first = rng.permuted(np.tile(np.arange(n1 + n2), (int(n_permutations), 1)), axis=1)[:, :n1]
    s = pooled[first].sum(axis=1) / n1 - (pooled.sum() - pooled[first].sum(axis=1)) / n2
    k = (first < n1).sum(axis=1)
    c = k / n1 - (n1 - k) / n2
    d = a.mean() - b.mean()
    tol = 1e-12 * max(1.0, float(np.abs(pooled).max()))

    def kept(delta: float) -> bool:
        p = (1 + np.count_nonzero(np.abs(s - delta * c) >= abs(d - delta) - tol)) / (len(s) + 1)
        return p > alpha

    step = float(np.ptp(pooled)) or 1.0

    def end(sign: float) -> float:
        inside, outside = d, d + sign * step
        for _ in range(60):
            if not kept(outside):
                break
            inside, outside = outside, d + 2 * (outside - d)
        else:
            return sign * math.inf
        for _ in range(100):
            middle = (inside + outside) / 2
            inside, outside = (middle, outside) if kept(middle) else (inside, middle)
            if abs(outside - inside) <= 1e-10 * step:
                break
        return float((inside + outside) / 2)

    return end(-1.0), end(1.0)
