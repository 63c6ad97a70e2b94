"""The pure statistical kernels: OLS with Newey-West errors, Huber, permutation tests, Holm, HDI."""

from __future__ import annotations

import math
from itertools import combinations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.stats import linregress

from foretell.errors import UsageError
from foretell.stats.intervals import hdi
from foretell.stats.permutation import holm, permutation_p
from foretell.stats.regression import huber, newey_west_lags, ols


# -- regression --------------------------------------------------------------------------------------
def _design(seed: int, n: int = 120):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    e = np.convolve(rng.normal(size=n + 3), [1.0, 0.6, 0.3, 0.1], "valid")  # autocorrelated noise
    y = 0.5 + 0.8 * x + e
    return np.stack([np.ones(n), x], axis=1), y


def test_ols_matches_lstsq_and_linregress():
    X, y = _design(0)
    fit = ols(np.stack([X, X[:, ::-1]]), y)
    coef = np.linalg.lstsq(X, y, rcond=None)[0]  # numpy reference
    np.testing.assert_allclose(fit.coef[0], coef, rtol=1e-10)
    np.testing.assert_allclose(fit.coef[1], coef[::-1], rtol=1e-10)
    ref = linregress(X[:, 1], y)  # scipy.stats reference (Virtanen et al., 2020)
    assert fit.coef[0, 1] == pytest.approx(ref.slope, rel=1e-10)
    assert fit.r2[0] == pytest.approx(ref.rvalue ** 2, rel=1e-10)
    rss = ((y - X @ coef) ** 2).sum()
    n = len(y)  # Gaussian log-likelihood at the MLE variance (common practice)
    assert fit.loglik[0] == pytest.approx(-n / 2 * (math.log(2 * math.pi * rss / n) + 1), rel=1e-10)


def test_newey_west_matches_a_hand_built_sandwich():
    X, y = _design(1, n=60)
    lags = 3
    fit = ols(X[None], y, lags=lags)
    # Newey & West (1987): (X'X)^-1 [sum_l w_l sum_t u_t u_{t-l} x_t x_{t-l}'] (X'X)^-1, Bartlett
    # w_l = 1 - l/(L+1), both orders of each lag; times n/(n-k) as statsmodels' use_correction.
    u = y - X @ np.linalg.lstsq(X, y, rcond=None)[0]
    n, k = X.shape
    meat = np.zeros((k, k))
    for t in range(n):
        for s in range(n):
            lag = abs(t - s)
            if lag <= lags:
                meat += (1 - lag / (lags + 1)) * u[t] * u[s] * np.outer(X[t], X[s])
    bread = np.linalg.inv(X.T @ X)
    np.testing.assert_allclose(fit.cov_hac[0], bread @ meat @ bread * n / (n - k), rtol=1e-10)
    # statsmodels reference (Seabold & Perktold, 2010), same lag and correction
    ref = sm.OLS(y, X).fit(cov_type="HAC", cov_kwds={"maxlags": lags, "use_correction": True})
    np.testing.assert_allclose(fit.cov_hac[0], ref.cov_params(), rtol=1e-8)


def test_newey_west_counts_lags_in_trials_across_left_out_trials():
    X, y = _design(2, n=50)
    keep = np.ones(50, bool)
    keep[[10, 11, 30]] = False
    gapped = ols(X[None, keep], y[keep], times=np.flatnonzero(keep), lags=2)
    # a left-out trial is a zero score: same as the full-length sums with those rows zeroed
    u = y[keep] - X[keep] @ np.linalg.lstsq(X[keep], y[keep], rcond=None)[0]
    scores = np.zeros((50, 2))
    scores[keep] = u[:, None] * X[keep]
    meat = scores.T @ scores
    for lag in (1, 2):
        g = scores[lag:].T @ scores[:-lag]
        meat += (1 - lag / 3) * (g + g.T)
    bread = np.linalg.inv(X[keep].T @ X[keep])
    n = keep.sum()
    np.testing.assert_allclose(gapped.cov_hac[0], bread @ meat @ bread * n / (n - 2), rtol=1e-10)
    assert newey_west_lags(1000) == 6  # floor(4 (1000/100)^(2/9)) = floor(6.66) (Newey & West, 1994)


def test_huber_matches_statsmodels_rlm():
    X, y = _design(3, n=200)
    y[::17] += 4.0  # outliers
    # reference library: statsmodels RLM with Huber's T norm (Huber, 1964; Seabold & Perktold, 2010)
    ref = sm.RLM(y, X, M=sm.robust.norms.HuberT()).fit(scale_est="mad", tol=1e-12)
    np.testing.assert_allclose(huber(X[None], y)[0], ref.params, rtol=1e-6)


# -- permutation tests and Holm --------------------------------------------------------------------
def test_permutation_p_is_the_exact_two_sided_test():
    a, b = np.array([1.2, 2.5, 3.1]), np.array([0.1, 0.4, 1.0, 0.3])
    pooled = np.r_[a, b]
    stat = [pooled[list(i)].mean() - np.delete(pooled, list(i)).mean() for i in combinations(range(7), 3)]
    obs = a.mean() - b.mean()
    stat = np.asarray(stat)
    # Fisher-Pitman exact test by enumerating all 35 splits, two-sided as twice the smaller tail
    # (common practice)
    exact = min(1.0, 2 * min(np.mean(stat <= obs + 1e-12), np.mean(stat >= obs - 1e-12)))
    assert permutation_p(a, b, rng=np.random.default_rng(0)) == pytest.approx(exact)


def test_holm_on_a_worked_example():
    # The worked example of the Holm-Bonferroni method in Wikipedia's article of that name (from
    # memory; the procedure is Holm, 1979): four tests, alpha = 0.05, p = (0.01, 0.04, 0.03, 0.005).
    # Step down: 0.005 <= 0.05/4 = 0.0125 rejects H4; 0.01 <= 0.05/3 = 0.0167 rejects H1;
    # 0.03 > 0.05/2 = 0.025 stops, so H3 and H2 stand. By hand, the adjusted values
    # min(1, max_{j <= i} (m - j + 1) p_(j)) over the sorted p (0.005, 0.01, 0.03, 0.04):
    # 4 x 0.005 = 0.02; max(0.02, 3 x 0.01) = 0.03; max(0.03, 2 x 0.03) = 0.06; max(0.06, 0.04) = 0.06.
    p = np.array([0.01, 0.04, 0.03, 0.005])
    adjusted = holm(p)
    np.testing.assert_allclose(adjusted, [0.03, 0.06, 0.06, 0.02], rtol=1e-12)
    assert (adjusted <= 0.05).tolist() == [True, False, False, True]


def test_holm_skips_missing_tests_and_caps_at_one():
    # A NaN is no test: m counts the finite p-values only. By hand: m = 3, sorted (0.2, 0.5, 0.6):
    # 3 x 0.2 = 0.6; max(0.6, 2 x 0.5) = 1.0; max(1.0, 0.6) = 1.0 (capped at 1).
    adjusted = holm([0.5, np.nan, 0.2, 0.6])
    assert np.isnan(adjusted[1])
    np.testing.assert_allclose(adjusted[[0, 2, 3]], [1.0, 0.6, 1.0], rtol=1e-12)
    assert np.isnan(holm([np.nan])[0])


# -- highest density intervals ---------------------------------------------------------------------
def test_hdi_is_the_shortest_interval_holding_the_share():
    # By construction: 90 draws packed in [0, 1] and 10 spread out from 5 to 14. A 0.9 interval must
    # span floor(0.9 x 100) + 1 = 91 sorted draws, so the shortest takes the packed 90 and the
    # nearest outlier: [0, 5] (width 5; the next candidate [1/89, 6] is wider).
    draws = np.r_[np.linspace(0.0, 1.0, 90), np.arange(5.0, 15.0)]
    np.random.default_rng(0).shuffle(draws)
    assert hdi(draws.reshape(4, 25), 0.9) == (0.0, 5.0)  # every axis pooled
    # mirrored, the interval mirrors
    assert hdi(-draws, 0.9) == (-5.0, -0.0)


def test_hdi_of_a_skewed_law_starts_at_its_mode():
    # The HDI of an Exponential(1) law holding share q is [0, -ln(1 - q)] (its density falls from
    # the mode at 0; common practice), unlike the equal-tailed interval. Draws: the law's
    # quantiles at (i + 1/2) / n.
    n = 200_000
    draws = -np.log1p(-(np.arange(n) + 0.5) / n)
    low, high = hdi(draws, 0.94)
    assert low == pytest.approx(0.0, abs=1e-4)
    assert high == pytest.approx(-math.log(0.06), abs=1e-3)
    with pytest.raises(UsageError):
        hdi(draws, 1.0)
