"""The RT analysis names no learner where there is none: null simulations, true effects, leaks, post-error slowing."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.stats import t as student
from statsmodels.stats.sandwich_covariance import cov_hac_simple

from foretell.logs import validate_log
from foretell.measure import choose_measure
from foretell.models import model_specs
from foretell.regressors import regressors
from foretell.simulate import ParticipantSpec, RTLaw, simulate_participants
from foretell.stats.regression import ar1_filter, leverages
from foretell.steps.measures import analyze_rt
from foretell.tasks import Task

LEARNERS = ["count-0", "count-1", "count-2", "mix-3"]
LEVEL = 0.10
"""Most participants whose 95% slope interval may exclude 0 on null data (twice the nominal 5%)."""


def null_log_rt(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    """Return log RTs that follow no learner: a power-law practice curve, slow AR(1) drift, or white noise.

    Practice: RT = A + B t^-c (Newell & Rosenbloom, 1981) with participant
    values around A = 0.45 s, B = 0.6 s, c = 0.4, times log-normal noise.
    """
    t = np.arange(1, n + 1)
    if kind == "practice":
        a, b, c = 0.45 * math.exp(rng.normal(0, 0.1)), 0.6 * math.exp(rng.normal(0, 0.2)), 0.35 + 0.1 * rng.random()
        return np.log(a + b * t ** -c) + 0.25 * rng.normal(size=n)
    if kind == "drift":  # AR(1), phi = 0.9, stationary SD 0.25
        e = np.empty(n)
        e[0] = rng.normal(0, 0.25)
        for i in range(1, n):
            e[i] = 0.9 * e[i - 1] + rng.normal(0, 0.25 * math.sqrt(1 - 0.81))
        return math.log(0.6) + e
    return math.log(0.6) + 0.25 * rng.normal(size=n)


def _null_study(task: Task, kind: str, seed: int, n_participants: int, n_blocks: int, block_length: int):
    """Guesses from count-1, count-2 and mix-4 learners; RTs replaced by ``kind`` (independent of every learner)."""
    frame, _ = simulate_participants(task, n_participants, n_blocks, models=["count-1", "count-2", "mix-4"],
                                     seed=seed, block_length=block_length)
    rng = np.random.default_rng(seed + 1000)
    frame["rt"] = np.concatenate([np.exp(null_log_rt(kind, len(rows), rng))
                                  for _, rows in frame.groupby("participant", sort=False)])
    return validate_log(frame, task)


def _excluded(fits: pd.DataFrame) -> pd.DataFrame:
    """Return per learner: participants whose slope interval excludes 0, and participants with an interval."""
    rows = fits[fits["slope_low"].notna()]
    out = (rows["slope_low"] > 0) | (rows["slope_high"] < 0)
    return pd.DataFrame({"excluded": out.groupby(rows["model"]).sum(), "n": rows.groupby("model").size()})


def _null_check(task: Task, kind: str, seeds: range, n_participants: int, n_blocks: int, block_length: int):
    counts, calls = None, []
    for seed in seeds:
        result = analyze_rt(_null_study(task, kind, seed, n_participants, n_blocks, block_length), task,
                            models=LEARNERS, bayes=False, seed=seed)
        counts = _excluded(result.fits) if counts is None else counts + _excluded(result.fits)
        calls.append(result.verdict())
    rate = counts["excluded"] / counts["n"]
    assert (rate <= LEVEL).all(), f"{kind}: intervals exclude 0 for {rate.round(3).to_dict()}"
    assert sum(c is not None for c in calls) <= len(calls) // 2, f"{kind}: learners called on null data: {calls}"
    return result


@pytest.mark.parametrize("kind", ["practice", "drift", "white"])
def test_null_rts_keep_the_interval_level_and_call_no_learner(lantern, kind):
    result = _null_check(lantern, kind, range(2), 16, 4, 120)
    assert (result.compare["criterion"] == "rfx_bms_bic").all() and "none" in set(result.compare["model"])


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["practice", "drift", "white"])
def test_null_rts_keep_the_interval_level_and_call_no_learner_in_many_studies(lantern, kind):
    _null_check(lantern, kind, range(10, 20), 16, 5, 120)


def test_slopes_and_errors_match_statsmodels_on_the_same_design_and_lag(lantern):
    frame, _ = simulate_participants(lantern, 2, 3, models=[ParticipantSpec("count-1", miss_rate=0.0)], seed=3,
                                     block_length=120)  # no missed guess: every kept trial follows the last
    frame["rt"] = np.exp(null_log_rt("drift", len(frame), np.random.default_rng(4)))
    log = validate_log(frame, lantern)
    result = analyze_rt(log, lantern, models=["count-1"], bayes=False)
    row = result.fits[(result.fits["participant"] == "p01") & (result.fits["model"] == "count-1")].iloc[0]
    specs = model_specs(["count-1"], lantern)
    chosen = choose_measure(log, lantern, specs, "rt", log.frame["rt"].to_numpy())
    table = regressors(log, lantern, specs)
    columns = {c: table[c].to_numpy() for c in ("entropy", "leak", "alpha", "params_from")}
    rows = slice(0, int((log.frame["participant"] == "p01").sum()))
    design = chosen.design(rows, chosen.model_columns(columns, rows, 1)[0])
    a, c = ar1_filter(np.array([row["ar1_rho"]]), design.times, design.runs)
    X, y = design.learners[0], design.y
    Xw = c[0][:, None] * (X - a[0][:, None] * np.r_[X[:1], X[:-1]])
    yw = c[0] * (y - a[0] * np.r_[y[:1], y[:-1]])
    # statsmodels reference (Seabold & Perktold, 2010): OLS on the whitened design, Bartlett sandwich at the
    # same lag, with the scores' HC3 adjustment (MacKinnon & White, 1985); no trial is left out here, so the
    # trial axis is the row axis
    assert np.array_equal(design.times, np.arange(design.times[0], design.times[0] + len(y)))
    ref = sm.OLS(yw, Xw).fit(cov_type="HAC", cov_kwds={"maxlags": int(row["hac_lags"]), "use_correction": True})
    assert row["b_per_bit"] == pytest.approx(ref.params[1], rel=1e-8)
    scores = Xw * (ref.resid / (1 - leverages(Xw[None])[0]))[:, None]
    cov = cov_hac_simple((scores, np.linalg.inv(Xw.T @ Xw)), nlags=int(row["hac_lags"]), use_correction=True)
    assert row["b_se_hac"] == pytest.approx(math.sqrt(cov[1, 1]), rel=1e-8)
    influence = np.linalg.solve(Xw.T @ Xw, Xw.T)[1]  # Satterthwaite (1946): (sum w^2)^2 / sum w^4
    assert row["slope_df"] == pytest.approx((influence ** 2).sum() ** 2 / (influence ** 4).sum(), rel=1e-8)
    assert row["slope_high"] - row["slope_low"] == pytest.approx(  # scipy.stats (Virtanen et al., 2020)
        2 * student.ppf(0.975, row["slope_df"]) * row["b_se_hac"] * 1000 * row["median_rt_s"], rel=1e-8)
    assert row["hac_lags"] >= 0 and 0.5 < row["ar1_rho"] < 1.0  # the drift is seen as serial dependence


@pytest.mark.parametrize("practice", [False, True])
def test_rts_that_follow_a_learner_name_it(lantern, practice):
    for generator in ("count-1", "count-2"):
        spec = ParticipantSpec(generator, rt=RTLaw(per_bit=0.25))
        frame, _ = simulate_participants(lantern, 12, 4, models=[spec], seed=5, block_length=120)
        if practice:  # a practice curve on top: RT x (1 + 0.8 t^-0.4)
            t = frame.groupby("participant").cumcount().to_numpy() + 1
            frame["rt"] = frame["rt"] * (1 + 0.8 * t ** -0.4)
        result = analyze_rt(validate_log(frame, lantern), lantern, models=LEARNERS, bayes=False, seed=1)
        assert result.verdict() == generator
        assert result.compare["model"].iloc[0] == generator and result.compare["called"].iloc[0]


def test_post_error_slowing_does_not_pass_for_an_entropy_effect(lantern):
    frame, _ = simulate_participants(lantern, 16, 4, models=["count-1", "count-2"], seed=7, block_length=120)
    rng = np.random.default_rng(8)
    wrong = (frame["response"] != frame["stimulus"]).to_numpy()
    after = np.r_[False, wrong[:-1]] & (frame.groupby("participant").cumcount().to_numpy() > 0)
    frame["rt"] = np.exp(math.log(0.6) + math.log(1.12) * after + 0.25 * rng.normal(size=len(frame)))
    result = analyze_rt(validate_log(frame, lantern), lantern, models=LEARNERS, bayes=False)
    assert "prev_correct" in result.settings["baseline"]
    rate = _excluded(result.fits)
    assert ((rate["excluded"] / rate["n"]) <= LEVEL).all(), rate
    assert result.verdict() is None


def _chain_task() -> Task:
    """A serial reaction task: the next stimulus mostly repeats the current one (an invented scenario)."""
    return Task.from_dict({"name": "chain", "symbols": ["a", "b", "c"], "response": "reaction",
                           "contexts": [{"past": [s], "next": {t: (0.8 if t == s else 0.1) for t in "abc"}}
                                        for s in "abc"]})


def _chain_study(task: Task, rng: np.random.Generator, n_participants: int, n_trials: int) -> pd.DataFrame:
    """A reaction-design log of the chain task with white-noise RTs."""
    parts = []
    for i in range(n_participants):
        x = task.sample(n_trials, seed=rng)
        response = np.where(rng.random(n_trials) < 0.04, (x + 1) % 3, x)
        parts.append(pd.DataFrame({"participant": f"s{i + 1:02d}", "block": np.arange(n_trials) // 100 + 1,
                                   "trial": np.arange(1, n_trials + 1), "stimulus": np.array(task.symbols)[x],
                                   "response": np.array(task.symbols)[response],
                                   "rt": np.exp(math.log(0.4) + 0.2 * rng.normal(size=n_trials))}))
    return pd.concat(parts, ignore_index=True)


def test_a_leak_chosen_on_held_out_blocks_finds_no_leak_where_there_is_none():
    # RTs driven by a depth-1 learner without a leak, on top of a power-law practice curve: the leak chosen
    # on held-out blocks must stay near 0 and the slope interval must see the effect. (Scoring blocks with
    # the session-wide spline of log trial chose leaks near 1 for half of such participants.)
    task = _chain_task()
    rng = np.random.default_rng(21)
    frame = _chain_study(task, rng, 8, 400)
    surprise = regressors(validate_log(frame, task), task, ["count-1"])["surprise"].to_numpy()
    practice = -0.1 * np.log(frame["trial"].to_numpy())
    frame["rt"] = np.exp(math.log(0.5) + 0.08 * np.nan_to_num(surprise) + practice + 0.2 * rng.normal(size=len(frame)))
    result = analyze_rt(validate_log(frame, task), task, models=["count-1-leak"], bayes=False, bootstrap=50)
    fits = result.fits[result.fits["model"] == "count-1-leak"]
    assert (fits["params_from"] == "held_out").all()
    assert fits["leak"].median() <= 0.05, fits["leak"].tolist()
    assert (fits["slope_low"] > 0).mean() >= 0.75, fits[["slope_low", "slope_high"]]


def test_a_leak_chosen_on_held_out_blocks_keeps_the_interval_level():
    task = _chain_task()
    log = validate_log(_chain_study(task, np.random.default_rng(9), 16, 400), task)  # white noise: no learner
    result = analyze_rt(log, task, models=["count-0-leak", "count-1-leak"], bayes=False, bootstrap=100)
    fits = result.fits[result.fits["model"] != "none"]
    assert (fits["params_from"] == "held_out").all() and (fits["interval"] == "block_bootstrap_leak_choice").all()
    rate = _excluded(fits)
    assert ((rate["excluded"] / rate["n"]) <= LEVEL).all(), rate
    assert any("chosen per participant on held-out blocks" in n and "100 moving-block resamples" in n
               for n in result.notes)
    assert result.verdict() is None
