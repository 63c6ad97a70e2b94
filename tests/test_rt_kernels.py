"""The kernels behind the RT analysis: AR(1) GLS, data-driven HAC, splines, held-out choice, unit likelihoods, calls."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.interpolate import CubicSpline
from scipy.stats import multivariate_normal, norm
from statsmodels.stats.sandwich_covariance import cov_hac_simple

from foretell.errors import UsageError
from foretell.hierarchical import sampling
from foretell.hierarchical.gate import Diagnostics, Gate
from foretell.hierarchical.loo import compare_loo
from foretell.hierarchical.measure_model import (PooledUnits, UnitStats, gaussian_unit_loglik, leave_out,
                                                 unit_statistics)
from foretell.measure import baseline_terms
from foretell.stats.heldout import held_out_loglik, moving_blocks, selection_bootstrap, unit_sums
from foretell.stats.regression import andrews_lags, ar1_filter, gls_ar1, leverages, ols
from foretell.stats.splines import natural_spline, spline_knots


def _ar1(n: int, rho: float, rng: np.random.Generator) -> np.ndarray:
    e = np.empty(n)
    e[0] = rng.normal() / math.sqrt(1 - rho * rho)
    for t in range(1, n):
        e[t] = rho * e[t - 1] + rng.normal()
    return e


# -- regression ----------------------------------------------------------------------------------------
def test_andrews_lag_follows_the_ar1_plug_in_formula():
    rng = np.random.default_rng(0)
    v = _ar1(600, 0.9, rng)
    rho = (v[1:] * v[:-1]).sum() / (v[:-1] ** 2).sum()
    # Andrews (1991), Bartlett kernel: S = 1.1447 (alpha(1) T)^(1/3), alpha(1) = 4 rho^2 / ((1-rho)^2 (1+rho)^2)
    expected = math.floor(1.1447 * (4 * rho ** 2 / ((1 - rho) ** 2 * (1 + rho) ** 2) * 600) ** (1 / 3))
    assert andrews_lags(v[None])[0] == expected
    assert 25 <= expected <= 60  # persistent errors get tens of lags, where floor(4 (n/100)^(2/9)) gives 5
    assert andrews_lags(rng.normal(size=(1, 600)))[0] <= 2


def test_hac_at_a_given_lag_matches_statsmodels_with_and_without_hc3():
    rng = np.random.default_rng(1)
    n, lags = 150, 7
    X = np.column_stack([np.ones(n), rng.gamma(2, 0.5, n), np.cumsum(rng.normal(size=n)) / 10])
    y = X @ [0.2, 0.5, -0.3] + _ar1(n, 0.6, rng)
    fit = ols(X[None], y, lags=lags)
    # statsmodels reference (Seabold & Perktold, 2010): OLS with HAC at the same lag and small-sample factor
    ref = sm.OLS(y, X).fit(cov_type="HAC", cov_kwds={"maxlags": lags, "use_correction": True})
    np.testing.assert_allclose(fit.coef[0], ref.params, rtol=1e-10)
    np.testing.assert_allclose(fit.cov_hac[0], ref.cov_params(), rtol=1e-8)
    # HC3 scores u_t / (1 - h_t) (MacKinnon & White, 1985) in statsmodels' own Bartlett sandwich
    adjusted = ols(X[None], y, lags=lags, hc3=True)
    h = leverages(X[None])[0]
    scores = X * (ref.resid / (1 - h))[:, None]
    expected = cov_hac_simple((scores, np.linalg.inv(X.T @ X)), nlags=lags, use_correction=True)
    np.testing.assert_allclose(adjusted.cov_hac[0], expected, rtol=1e-8)


def test_ar1_gls_gives_the_exact_gaussian_likelihood_across_gaps_and_sessions():
    rng = np.random.default_rng(2)
    n = 120
    x = np.cumsum(rng.normal(size=n)) / 5
    X = np.column_stack([np.ones(n), x])
    y = 1.0 + 0.4 * x + _ar1(n, 0.8, rng)
    keep = np.ones(n, bool)
    keep[[30, 31, 77]] = False  # trials left out: gaps of 2 and 1
    times = np.flatnonzero(keep)
    runs = np.zeros(len(times), bool)
    runs[60] = True  # a second session starts
    fit = gls_ar1(X[None, keep], y[keep], times, runs, lags=0, hc3=False)
    rho, b = fit.rho[0], fit.coef[0]
    assert 0.5 < rho < 0.95
    a, c = ar1_filter(np.array([rho]), times, runs)
    r = y[keep] - X[keep] @ b
    w = c[0] * (r - a[0] * np.r_[r[:1], r[:-1]])
    s2 = np.mean(w * w)
    session = np.cumsum(runs)
    cov = np.where(session[:, None] == session[None, :],
                   rho ** np.abs(times[:, None] - times[None, :]) / (1 - rho * rho), 0.0)
    # scipy.stats reference (Virtanen et al., 2020): the stationary AR(1) Gaussian density of the residuals
    assert fit.loglik[0] == pytest.approx(multivariate_normal(np.zeros(len(r)), s2 * cov).logpdf(r), rel=1e-10)
    # the Cochrane-Orcutt quasi-differences of statsmodels' GLSAR (Seabold & Perktold, 2010)
    a, c = ar1_filter(np.array([0.6]), np.arange(n))
    np.testing.assert_allclose((c[0] * (y - a[0] * np.r_[y[:1], y[:-1]]))[1:], sm.GLSAR(y, X, rho=0.6).whiten(y),
                               rtol=1e-12)


def test_natural_spline_spans_scipys_natural_cubic_spline():
    x = np.linspace(0.0, 6.4, 300)
    knots = spline_knots(x, 4)
    assert len(knots) == 5
    basis = np.column_stack([np.ones_like(x), natural_spline(x, knots)])
    rng = np.random.default_rng(3)
    # scipy reference (Virtanen et al., 2020): an interpolating cubic spline with natural ends is in the span
    target = CubicSpline(knots, rng.normal(size=len(knots)), bc_type="natural")(x)
    coef = np.linalg.lstsq(basis, target, rcond=None)[0]
    np.testing.assert_allclose(basis @ coef, target, atol=1e-9)
    beyond = natural_spline(np.array([7.0, 8.0, 9.0]), knots)
    np.testing.assert_allclose(np.diff(beyond, 2, axis=0), 0.0, atol=1e-9)  # linear past the last knot
    with pytest.raises(ValueError):
        natural_spline(x, [1.0])


def test_baseline_terms_are_checked():
    assert baseline_terms(None, "guess") == ("blocks", "trial_spline", "prev_correct")
    assert baseline_terms(None, "reaction") == ("blocks", "trial_spline")
    assert baseline_terms("", "guess") == ()
    for bad in ("blocks,block_trend", "trial_spline,log_trial", "trial-spline"):
        with pytest.raises(UsageError):
            baseline_terms(bad, "guess")
    with pytest.raises(UsageError, match="reaction"):
        baseline_terms("prev_correct", "reaction")


# -- held-out choice and the bootstrap that repeats it ---------------------------------------------------
def test_held_out_score_is_leave_one_unit_out_least_squares():
    rng = np.random.default_rng(4)
    X = rng.normal(size=(3, 90, 2))
    y = rng.normal(size=90)
    unit = np.repeat(np.arange(3), 30)
    got = held_out_loglik(*unit_sums(X, y, unit, 3))
    for c in range(3):  # brute force: refit without each unit, score it (common practice; Stone, 1974)
        total = 0.0
        for u in range(3):
            train = unit != u
            b = np.linalg.lstsq(X[c, train], y[train], rcond=None)[0]
            s = math.sqrt(np.mean((y[train] - X[c, train] @ b) ** 2))
            total += norm.logpdf(y[~train], X[c, ~train] @ b, s).sum()
        assert got[c] == pytest.approx(total, rel=1e-10)


def test_moving_blocks_resample_whole_runs_of_trials():
    counts = moving_blocks(100, 7, 50, np.random.default_rng(5))
    assert counts.shape == (50, 100) and (counts.sum(axis=1) == 100).all()
    slopes, chosen = selection_bootstrap(np.random.default_rng(6).normal(size=(4, 100, 2)),
                                         np.random.default_rng(7).normal(size=100), np.repeat(np.arange(4), 25),
                                         5, 40, np.random.default_rng(8))
    assert slopes.shape == (40,) and set(chosen) <= {0, 1, 2, 3} and np.isfinite(slopes).all()


# -- units of the hierarchical model -------------------------------------------------------------------
def test_unit_likelihood_with_its_own_level_integrated_out():
    rng = np.random.default_rng(9)
    n = np.array([1, 5, 40])
    start = np.r_[0, np.cumsum(n)[:-1]]
    w = np.column_stack([np.ones(n.sum()), rng.normal(size=(n.sum(), 2))])
    y = w @ [0.3, -0.2, 0.5] + rng.normal(size=n.sum())
    stats = unit_statistics(y, w, start)
    theta = rng.normal(size=(2, 3, 3))  # two draws, three units, three columns
    sigma = rng.uniform(0.5, 1.5, size=(2, 3))
    tau = np.array([[0.4], [0.0]])
    got = gaussian_unit_loglik(theta, sigma, np.log(sigma), stats, tau=tau)
    plain = gaussian_unit_loglik(theta, sigma, np.log(sigma), stats)
    for d in range(2):
        for u in range(3):
            at = slice(start[u], start[u] + n[u])
            mean = w[at] @ theta[d, u]
            # scipy.stats reference (Virtanen et al., 2020): y_u ~ Normal(W theta, sigma^2 I + tau^2 1 1')
            cov = sigma[d, u] ** 2 * np.eye(n[u]) + tau[d, 0] ** 2 * np.ones((n[u], n[u]))
            assert got[d, u] == pytest.approx(multivariate_normal(mean, cov).logpdf(y[at]), rel=1e-10)
            assert plain[d, u] == pytest.approx(norm.logpdf(y[at], mean, sigma[d, u]).sum(), rel=1e-10)


def test_a_left_out_unit_adds_nothing_and_keeps_its_likelihood():
    rng = np.random.default_rng(10)
    n = np.array([20, 30, 25])
    w = np.column_stack([np.ones(n.sum()), rng.normal(size=n.sum())])
    stats = unit_statistics(rng.normal(size=n.sum()), w, np.r_[0, np.cumsum(n)[:-1]])
    pooled = PooledUnits(stats, np.array([0, 0, 1]), ("a", "b"), np.zeros(2, int), ("all",), ("u1", "u2", "u3"),
                         0, False, True, True, 1.0, 1.0)
    without, every = leave_out(pooled, 1)
    theta, sigma = rng.normal(size=(3, 2)), np.full(3, 0.8)
    assert gaussian_unit_loglik(theta, sigma, np.log(sigma), without.stats, tau=0.3)[1] == pytest.approx(0, abs=1e-12)
    assert every is pooled
    for name in UnitStats.__dataclass_fields__:
        np.testing.assert_array_equal(getattr(without.stats, name)[[0, 2]], getattr(stats, name)[[0, 2]])


# -- the ELPD call --------------------------------------------------------------------------------------
def _loo(pointwise: np.ndarray):
    import arviz as az

    draws = pointwise[None, None, :] + np.random.default_rng(0).normal(0, 1e-3, size=(2, 200, len(pointwise)))
    idata = az.from_dict(posterior={"x": np.zeros((2, 200))}, log_likelihood={"y": draws})
    with sampling.quiet():
        return az.loo(idata, pointwise=True)


def _passed(ok: bool = True) -> Diagnostics:
    return Diagnostics("pymc", 4, 1000, 1.0, 4000.0, 0, 0.3, ok, False, () if ok else ("1 divergent transitions",))


def test_elpd_calls_need_a_margin_of_four_and_two_standard_errors_over_participants():
    rng = np.random.default_rng(11)
    base = rng.normal(-50, 5, size=40)  # 20 participants x 2 blocks
    clusters = np.repeat(np.arange(20), 2)
    loos = {"count-1": _loo(base + 0.6), "none": _loo(base), "count-2": _loo(base - 1.0 + rng.normal(0, 1, 40))}
    table, notes = compare_loo(loos, {m: _passed() for m in loos}, Gate(), clusters=clusters, baseline="none")
    first = table.iloc[0]
    assert first["model"] == "count-1" and first["called"] and first["evidence"] == "first"
    assert (table["evidence"].iloc[1:] == "distinct").all()
    # the SE of a difference sums units within a participant first: sqrt(P var(per-participant sums))
    d = np.bincount(clusters, loos["none"].loo_i.values - loos["count-1"].loo_i.values)
    assert table.set_index("model").loc["none", "elpd_diff_se"] == pytest.approx(math.sqrt(20 * np.var(d)))
    assert "called: count-1" in notes[-1] and "Sivula" in notes[-1]
    close = {"count-1": _loo(base + 0.05), "none": _loo(base)}  # 2 nats in all: below the margin of 4
    table, notes = compare_loo(close, {m: _passed() for m in close}, Gate(), clusters=clusters, baseline="none")
    assert not table["called"].any() and table["evidence"].iloc[1] == "indistinct"
    assert "cannot be told apart from none" in notes[-1]


def test_a_model_that_fails_the_gate_is_left_out_and_the_others_compared():
    rng = np.random.default_rng(12)
    base = rng.normal(-50, 5, size=30)
    loos = {"count-1": _loo(base + 1.0), "count-2": _loo(base), "none": _loo(base - 0.5)}
    diagnostics = {"count-1": _passed(False), "count-2": _passed(), "none": _passed()}
    table, notes = compare_loo(loos, diagnostics, Gate(), baseline="none")
    left = table.set_index("model").loc["count-1"]
    assert left["evidence"] == "left-out" and not left["called"] and np.isnan(left["elpd_loo"])
    assert list(table["model"].iloc[:2]) == ["count-2", "none"]  # the two that passed, compared
    assert any(n.startswith("left out of the ELPD comparison, failed the gate: count-1") for n in notes)
    diagnostics["none"] = _passed(False)
    table, notes = compare_loo(loos, diagnostics, Gate(), baseline="none")
    assert not table["called"].any() and any("no ELPD comparison" in n for n in notes)


# -- divergences are met with smaller steps -----------------------------------------------------------
def test_a_divergent_posterior_is_sampled_again_at_a_higher_target_acceptance(monkeypatch):
    import arviz as az

    tried = []

    def fake_nuts(model, data, *, target_accept, draws, chains, **_):
        tried.append(target_accept)
        diverging = np.zeros((chains, draws), bool)
        diverging[0, 0] = target_accept < 0.99  # divergent at the default 0.95 only
        return az.from_dict(posterior={"x": np.zeros((chains, draws))}, sample_stats={"diverging": diverging}), []

    monkeypatch.setattr(sampling, "_nuts", fake_nuts)
    idata, _, messages = sampling.sample(object(), draws=10, tune=10, chains=2, seed=0)
    assert tried == [0.95, 0.99] and idata.sample_stats.attrs["target_accept"] == 0.99
    assert messages == ["1 divergent transitions at target acceptance 0.95: sampled again at 0.99"]
    tried.clear()
    sampling.sample(object(), draws=10, tune=10, chains=2, seed=0, target_accept=0.9)
    assert tried == [0.9]  # one value: no second try
    with pytest.raises(UsageError):
        sampling.sample(object(), draws=10, tune=10, chains=2, seed=0, target_accept=1.2)
