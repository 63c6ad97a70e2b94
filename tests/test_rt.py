"""Models of reaction times and other per-trial measures: kernels, rankings, slopes, the Bayesian gate."""

from __future__ import annotations

import math
import warnings
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.stats import linregress, norm

from foretell.hierarchical.sampling import Gate, choose_by_strength, diagnose, exact_units, pareto_k, psis_loo
from foretell.errors import UsageError
from foretell.learners import Counting
from foretell.logs import validate_log
from foretell.steps.measures import (UnitStats, _Pooled, analyse_rt, gaussian_unit_loglik, huber, leave_out,
                         newey_west_lags, ols, unit_statistics)
from foretell.simulate import ParticipantSpec, RTLaw, simulate_participants
from foretell.tasks import Task

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import arviz as az


# -- kernels -----------------------------------------------------------------------------------------
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
    # statsmodels reference, same lag and correction
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
    assert newey_west_lags(1000) == 6  # floor(4 (1000/100)^(2/9)) (Newey & West, 1994)


def test_huber_matches_statsmodels_rlm():
    X, y = _design(3, n=200)
    y[::17] += 4.0  # outliers
    # reference library: statsmodels RLM with Huber's T norm (Huber, 1964; Seabold & Perktold, 2010)
    ref = sm.RLM(y, X, M=sm.robust.norms.HuberT()).fit(scale_est="mad", tol=1e-12)
    np.testing.assert_allclose(huber(X[None], y)[0], ref.params, rtol=1e-6)


# -- simulated studies ---------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def guess_log(tide):
    frame, _ = simulate_participants(tide, 6, 3, models=["count-1"], seed=11, block_length=100)
    return validate_log(frame, tide)


def test_depth_one_learner_explains_rts_best_by_summed_bic(guess_log, tide):
    result = analyse_rt(guess_log, tide, ["count-0", "count-1", "count-2"], bayes=False)
    assert result.compare["model"].iloc[0] == "count-1"
    assert (result.compare["criterion"] == "bic_sum").all()
    assert result.compare["elpd"].isna().all()
    fits = result.fits
    assert {"n_trials", "n_dropped", "r2", "bic", "slope_ms_per_bit", "slope_low", "slope_high",
            "slope_robust_ms_per_bit"} <= set(fits.columns)
    assert (fits.groupby("participant")["n_trials"].nunique() == 1).all()  # same trials per model
    assert (fits["n_dropped_warmup"] == 2).all()
    blocks = result.blocks
    assert set(blocks["block"]) == {"1", "2", "3"}
    assert (blocks.groupby("block")["rank"].min() == 1).all()
    assert set(result.tables()) == {"rt_fits", "rt_compare", "rt_blocks", "rt_diagnostics",
                                    "regressors"}


def test_reported_slope_interval_covers_a_known_slope(guess_log, tide):
    frame = guess_log.frame.copy()
    rng = np.random.default_rng(5)
    b = 0.25  # log seconds per bit
    for pid, rows in frame.groupby("participant"):
        h = -(lambda p: (p * np.log2(p)).sum(axis=1))(
            Counting(depth=1).next_proba(rows["stimulus_idx"].to_numpy(), 2))
        frame.loc[rows.index, "rt"] = np.exp(math.log(0.5) + b * h + 0.05 * rng.normal(size=len(h)))
    log = validate_log(frame[["participant", "group", "session", "block", "trial", "stimulus",
                              "response", "rt"]], tide)
    fits = analyse_rt(log, tide, ["count-1"], bayes=False).fits
    kept_median = fits["median_rt_s"].to_numpy()
    truth = 1000 * b * kept_median  # ms per bit at the median RT
    covered = (fits["slope_low"] <= truth) & (truth <= fits["slope_high"])
    assert covered.sum() >= 5  # 95% intervals: at most one miss in six is expected
    assert np.all(np.abs(fits["b_per_bit"] - b) < 0.15)


def _reaction_log(n_participants: int = 4, n_trials: int = 400, seed: int = 2):
    """Serial RT: the next stimulus mostly repeats the last one; RT follows count-1 surprise."""
    task = Task.from_dict({"name": "chain", "symbols": ["a", "b", "c"], "response": "reaction",
                           "contexts": [{"past": [s], "next": {t: (0.8 if t == s else 0.1)
                                                               for t in "abc"}} for s in "abc"]})
    rng = np.random.default_rng(seed)
    parts = []
    for i in range(n_participants):
        x = task.sample(n_trials, seed=rng)
        p = Counting(depth=1).next_proba(x, 3)
        surprise = -np.log2(p[np.arange(n_trials), x])
        rt = np.exp(math.log(0.35) + 0.12 * surprise + 0.12 * rng.normal(size=n_trials))
        response = x.copy()
        wrong = rng.random(n_trials) < 0.05
        response[wrong] = (x[wrong] + 1) % 3
        parts.append(pd.DataFrame({"participant": f"s{i + 1}", "block": np.arange(n_trials) // 100 + 1,
                                   "trial": np.arange(1, n_trials + 1),
                                   "stimulus": np.array(task.symbols)[x],
                                   "response": np.array(task.symbols)[response], "rt": rt}))
    frame = pd.concat(parts, ignore_index=True)
    return validate_log(frame, task), task


def test_reaction_design_count_one_beats_count_zero():
    log, task = _reaction_log()
    result = analyse_rt(log, task, ["count-0", "count-1"], bayes=False)
    assert result.compare["model"].iloc[0] == "count-1"
    fits = result.fits
    errors = (log.frame["response"] != log.frame["stimulus"]).groupby(log.frame["participant"]).sum()
    per = fits.drop_duplicates("participant").set_index("participant")
    assert (per["n_dropped_error"] <= errors).all() and per["n_dropped_error"].sum() > 0
    assert (per["n_dropped_after_error"] > 0).all()
    assert (per["n_dropped_block_start"] > 0).all()
    assert result.regressors["guess_prob"].isna().all()


def test_any_numeric_measure_and_its_names(guess_log, tide):
    rng = np.random.default_rng(1)
    amplitude = pd.Series(rng.normal(size=len(guess_log.frame)), index=guess_log.frame.index)
    result = analyse_rt(guess_log, tide, ["count-1"], measure=amplitude, locked="reveal",
                        bayes=False)
    assert result.measure == "measure"
    assert "slope_per_bit" in result.fits.columns
    assert (result.fits["n_dropped_screen"] == 0).all()  # missed guesses keep their measure
    assert set(result.tables("p300")) >= {"p300_fits", "p300_compare"}
    with pytest.raises(UsageError):
        analyse_rt(guess_log, tide, ["count-1"], measure="nonexistent", bayes=False)
    with pytest.raises(UsageError):
        analyse_rt(guess_log, tide, ["count-1"], regressors=["guess_prob"], bayes=False)


# -- the Bayesian gate -----------------------------------------------------------------------------------
def _idata(shift: float, chains: int = 4, draws: int = 1000, seed: int = 0):
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=(chains, draws)) + shift * np.arange(chains)[:, None]
    return az.from_dict(posterior={"theta": theta},
                        sample_stats={"diverging": np.zeros((chains, draws), bool)},
                        log_likelihood={"y": rng.normal(-1, 0.01, size=(chains, draws, 20))})


def test_gate_passes_good_chains_and_names_what_fails():
    good = diagnose(_idata(0.0), "test")
    assert good.ok and not good.provisional and good.rhat_max < 1.01
    bad = diagnose(_idata(2.0), "test")  # chains that disagree: R-hat far above 1.01 (Vehtari et al., 2021)
    assert not bad.ok and any("R-hat" in r for r in bad.reasons)
    short = diagnose(_idata(0.0, chains=2, draws=300), "test", Gate())
    assert short.provisional


def test_sufficient_statistics_give_the_trial_by_trial_gaussian_loglik():
    rng = np.random.default_rng(7)
    n = np.array([1, 2, 57, 200, 13])
    start = np.r_[0, np.cumsum(n)[:-1]]
    x = rng.gamma(2.0, 0.6, size=n.sum())
    y = -0.7 + 0.3 * x + 0.25 * rng.standard_normal(n.sum())
    stats = unit_statistics(y, x, start)
    level = rng.normal(-0.7, 0.2, size=(3, len(n)))  # three parameter draws
    slope = rng.normal(0.3, 0.2, size=(3, len(n)))
    sigma = rng.uniform(0.1, 0.5, size=(3, len(n)))
    got = gaussian_unit_loglik(level, slope, sigma, np.log(sigma), stats)
    unit = np.repeat(np.arange(len(n)), n)
    for d in range(3):  # scipy.stats reference (Virtanen et al., 2020): the Gaussian log-density, trial by trial
        ref = np.bincount(unit, norm.logpdf(y, level[d, unit] + slope[d, unit] * x,
                                            sigma[d, unit]))
        np.testing.assert_allclose(got[d], ref, rtol=0, atol=1e-9)


def test_parameterisation_follows_the_strength_of_the_data_and_can_be_set():
    rng = np.random.default_rng(3)
    se = np.full(30, 0.02)
    spread = rng.normal(0.4, 0.2, size=30) + se * rng.standard_normal(30)
    assert choose_by_strength(spread, se)[0] == "centred"  # tau ~ 0.2 >> mean SE
    same = 0.4 + se * rng.standard_normal(30)
    form, reason = choose_by_strength(same, se)
    assert form == "non-centred" and "tau" in reason  # tau ~ 0: the funnel of the centred form
    assert choose_by_strength(spread, np.full(30, 0.5))[0] == "non-centred"  # weak data
    groups = np.repeat([0, 1], 15)  # two groups far apart, no spread within them
    assert choose_by_strength(same + 3.0 * groups, se, groups)[0] == "non-centred"
    assert choose_by_strength(same[:1], se[:1])[0] == "non-centred"
    assert choose_by_strength(same, se, requested="centred") == ("centred", "requested")
    with pytest.raises(UsageError):
        choose_by_strength(same, se, requested="sideways")


def _gate_study(task, n_participants, n_blocks, block_length, per_bit):
    """RTs from the hierarchical model's own law: log RT Gaussian, linear in entropy and block."""
    specs = [ParticipantSpec("count-1", rt=RTLaw(shift=0.0, per_bit=v)) for v in per_bit]
    frame, _ = simulate_participants(task, n_participants, n_blocks, models=specs, seed=8,
                                     block_length=block_length)
    return validate_log(frame, task)


@pytest.mark.parametrize("shape", ["many_trials", "sparse"])
def test_hierarchical_model_passes_the_gate(lantern, shape):
    # Ten blocks per participant: a left-out unit is a tenth of its participant's trials. With
    # four blocks of 100 the same data gave Pareto k 0.74 (a unit's pull on its participant's
    # own a_i, b_i, sigma_i grows with its share of their trials).
    if shape == "many_trials":  # 10 participants x 400 trials, slopes far apart: centred
        log = _gate_study(lantern, 10, 10, 40, np.linspace(0.1, 0.9, 10))
    else:  # 30 participants x 30 trials, one shared RT law: non-centred
        log = _gate_study(lantern, 30, 10, 3, [0.4])
    result = analyse_rt(log, lantern, ["count-1"], draws=1000, tune=500, chains=2, seed=2)
    diag = result.diagnostics.iloc[0]
    assert diag["ok"], diag["reasons"]  # the default Gate (Vehtari et al., 2021; 2017)
    assert diag["provisional"]  # 2 chains are short of the full run
    form = "centred" if shape == "many_trials" else "non-centred"
    assert diag["slope_form"] == form and diag["intercept_form"] == form
    assert diag["form_reason"].startswith("intercept: auto")


def test_hierarchical_run_reports_its_gate(tide):
    frame, _ = simulate_participants(tide, 3, 2, models=["count-1"], seed=4, block_length=30)
    log = validate_log(frame, tide)
    result = analyse_rt(log, tide, ["count-0", "count-1"], draws=50, tune=50, chains=2, seed=1,
                        refits=0)  # exact refits: test_units_with_a_high_pareto_k_are_refitted
    diag = result.diagnostics
    assert list(diag["model"]) == ["count-0", "count-1"]
    assert (diag["slope_form"] == "non-centred").all() and diag["provisional"].all()
    assert set(result.posteriors) == {"count-0", "count-1"}
    idata = result.posteriors["count-1"]
    assert idata.log_likelihood["y"].shape[-1] == 6  # 3 participants x 2 blocks
    compare = result.compare
    assert (compare["criterion"] == "elpd_loo_participant_block").all()
    if diag["ok"].all():
        assert compare["called"].all() and compare["provisional"].all()
    else:
        assert not compare["called"].any()
        assert any(n.startswith("ELPD comparison not called") for n in result.notes)


# -- exact leave-one-out where PSIS is unreliable --------------------------------------------------
def test_exact_units_match_arviz_reloo():
    # ArviZ's reloo (Kumar et al., 2019) refits through a SamplingWrapper; a stub that returns
    # given held-out log-likelihoods makes it the reference for the update of the LOO estimate.
    import xarray as xr

    idata = _idata(0.0)
    loo = psis_loo(idata)
    k = np.asarray(loo.pareto_k)
    threshold = float(np.sort(k)[-4])  # the three units with the largest k are refitted
    rng = np.random.default_rng(5)
    held = {int(u): rng.normal(-1.2, 0.3, size=(4, 1000)) for u in np.flatnonzero(k > threshold)}

    class Stub(az.SamplingWrapper):
        def sel_observations(self, idx):
            unit = int(np.ravel(idx)[0])
            return unit, unit

        def sample(self, modified_observed_data):
            return modified_observed_data

        def get_inference_data(self, fitted_model):
            return fitted_model

        def log_likelihood__i(self, excluded_obs, idata__i):
            return xr.DataArray(held[excluded_obs])

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # reloo announces itself as experimental
        ref = az.reloo(Stub(None, idata_orig=idata), loo_orig=loo, k_thresh=threshold, verbose=False)
    got = exact_units(loo, held)
    assert len(held) == 3
    for name in ("elpd_loo", "se", "p_loo"):
        assert got[name] == pytest.approx(ref[name], rel=1e-12), name
    np.testing.assert_allclose(got.loo_i, ref.loo_i, rtol=1e-12)
    np.testing.assert_array_equal(got.pareto_k, ref.pareto_k)
    assert float(loo.elpd_loo) != pytest.approx(float(got.elpd_loo))  # the input is left as it was


def test_leaving_a_unit_out_equals_pooling_the_other_units():
    rng = np.random.default_rng(11)
    n = np.array([40, 25, 60, 30, 45])
    participant = np.array([0, 0, 1, 1, 2])
    order = np.array([0.0, 1.0, 0.0, 1.0, 0.0])
    x_raw = rng.gamma(2.0, 0.6, size=n.sum())
    y = -0.6 + 0.2 * x_raw + 0.2 * rng.standard_normal(n.sum())
    unit = np.repeat(np.arange(len(n)), n)

    def pooled_from(keep: np.ndarray) -> _Pooled:  # as foretell.steps.measures._pool builds it: centred over kept trials
        at = np.isin(unit, keep)
        x = x_raw[at] - x_raw[at].mean()
        t = order[unit[at]] - order[unit[at]].mean()
        starts = np.r_[0, np.cumsum(n[keep])[:-1]]
        return _Pooled(unit_statistics(y[at], x, starts), t[starts], participant[keep], ("a", "b", "c"),
                       np.zeros(3, int), ("all",), tuple(map(str, keep)), float(y[at].mean()))

    full = pooled_from(np.arange(len(n)))
    u = 2
    without, every = leave_out(full, u)
    rest = np.delete(np.arange(len(n)), u)
    ref = pooled_from(rest)
    assert without.y_mean == pytest.approx(ref.y_mean, rel=1e-12)
    for name in UnitStats.__dataclass_fields__:
        np.testing.assert_allclose(getattr(without.stats, name)[rest], getattr(ref.stats, name),
                                   rtol=1e-9, atol=1e-12, err_msg=name)
    np.testing.assert_allclose(without.trend[rest], ref.trend, atol=1e-12)
    assert without.stats.n[u] == 0 and every.stats.n[u] == n[u]
    # at any parameters, the left-out unit adds exactly nothing, and keeps its own likelihood
    # in the shifted coordinates (scipy.stats reference (Virtanen et al., 2020), trial by trial)
    level, slope, sigma = rng.normal(-0.6, 0.1, 5), rng.normal(0.2, 0.1, 5), rng.uniform(0.1, 0.4, 5)
    ll = gaussian_unit_loglik(level, slope, sigma, np.log(sigma), without.stats)
    assert ll[u] == 0.0
    x_rest = x_raw[np.isin(unit, rest)].mean()
    at = unit == u
    direct = norm.logpdf(y[at], level[u] + slope[u] * (x_raw[at] - x_rest), sigma[u]).sum()
    assert gaussian_unit_loglik(level, slope, sigma, np.log(sigma), every.stats)[u] == pytest.approx(direct)


def test_units_with_a_high_pareto_k_are_refitted(tide):
    frame, _ = simulate_participants(tide, 2, 2, models=["count-1"], seed=4, block_length=40)
    log = validate_log(frame, tide)
    run = {"draws": 150, "tune": 150, "chains": 2, "seed": 1}
    loose = Gate(rhat_max=1.2, ess_bulk_per_chain=10, max_divergences=10)  # short runs; k is the point
    capped = analyse_rt(log, tide, ["count-1"], gate=replace(loose, pareto_k_max=0.0), refits=0, **run)
    diag = capped.diagnostics.iloc[0]  # every unit above the limit, no refit allowed
    assert diag["loo_refits"] == 0 and not diag["ok"] and "Pareto k" in diag["reasons"]
    assert any("would need as many refits" in n for n in capped.notes)
    k = pareto_k(capped.posteriors["count-1"])
    limit = float(np.sort(k)[-2])  # the same seed gives the same posterior: one unit above this
    result = analyse_rt(log, tide, ["count-1"], gate=replace(loose, pareto_k_max=limit), refits=1, **run)
    diag = result.diagnostics.iloc[0]
    assert diag["loo_refits"] == 1
    assert diag["pareto_k_max"] <= limit  # the refitted unit is exact: no importance sampling left above
    assert any("estimated by exact leave-one-out refits" in n for n in result.notes)
    hopeless = analyse_rt(log, tide, ["count-1"], gate=replace(loose, pareto_k_max=0.0,
                                                               ess_bulk_per_chain=1e9), **run)
    assert hopeless.diagnostics.iloc[0]["loo_refits"] == 0  # no refits when the gate fails anyway
    assert any("not refitted" in n for n in hopeless.notes)
    with pytest.raises(UsageError, match="refits"):
        analyse_rt(log, tide, ["count-1"], refits=-1)


@pytest.mark.slow
def test_depth_one_learner_ranks_first_by_elpd(guess_log, tide):
    result = analyse_rt(guess_log, tide, ["count-0", "count-1"], draws=500, tune=500, chains=2,
                        seed=3)
    assert result.compare["model"].iloc[0] == "count-1"
    assert result.compare["d_elpd"].iloc[1] < 0
