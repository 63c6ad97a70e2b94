"""The rt step: reaction times and other per-trial measures by learner model and baseline; calls, slopes, Bayes."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

from foretell.errors import UsageError
from foretell.hierarchical import sampling
from foretell.hierarchical.gate import Gate
from foretell.hierarchical.loo import pareto_k
from foretell.hierarchical.measure_fit import fit_measure_model
from foretell.hierarchical.measure_model import pool_measure
from foretell.learners import Counting
from foretell.logs import validate_log
from foretell.measure import choose_measure
from foretell.models import model_specs
from foretell.regressors import regressors
from foretell.simulate import ParticipantSpec, RTLaw, simulate_participants
from foretell.steps.guesses import fit
from foretell.steps.measure_calls import in_play
from foretell.steps.measures import RTResult, analyze_rt
from foretell.tasks import Task
from foretell.validation import child_int


# -- simulated studies ---------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def guess_log(tide):
    frame, _ = simulate_participants(tide, 6, 3, models=["count-1"], seed=11, block_length=100)
    return validate_log(frame, tide)


@pytest.fixture(scope="module")
def lantern_log(lantern):
    frame, _ = simulate_participants(lantern, 8, 3, models=["count-1"], seed=11, block_length=120)
    return validate_log(frame, lantern)


def test_depth_one_learner_is_called_by_random_effects_selection_with_the_baseline(lantern_log, lantern):
    result = analyze_rt(lantern_log, lantern, models=["count-0", "count-1", "count-2"], bayes=False)
    compare = result.compare
    assert list(compare["model"].iloc[:1]) == ["count-1"] and set(compare["model"]) == {"count-0", "count-1",
                                                                                         "count-2", "none"}
    assert (compare["criterion"] == "rfx_bms_bic").all() and compare["elpd_loo"].isna().all()
    assert compare["called"].tolist() == [True, False, False, False]
    assert compare["evidence"].iloc[0] in ("clear", "ahead") and (compare["evidence"].iloc[1:] == "behind").all()
    assert result.verdict() == "count-1" and result.verdict("sim") == "count-1"
    selection = result.selection  # group x model, as the guess side's selection.csv
    assert {"group", "model", "expected_freq", "exceedance", "protected_exceedance", "omnibus_risk", "n_participants",
            "criterion", "method", "called", "note"} <= set(selection.columns)
    assert set(selection["group"]) == {"all", "sim"} and selection.groupby("group")["called"].sum().eq(1).all()
    fits = result.fits
    assert {"n_trials", "n_dropped", "r2", "bic", "d_bic_none", "evidence", "slope_ms_per_bit", "slope_low",
            "slope_high", "slope_robust_ms_per_bit", "ar1_rho", "hac_lags", "interval"} <= set(fits.columns)
    assert (fits.groupby("participant")["n_trials"].nunique() == 1).all()  # same trials per model, baseline too
    frame = lantern_log.frame  # warm-up: the first 2 trials of a session (depth 2), unless screened already
    warm = (frame.groupby("participant").cumcount() < 2) & frame["rt_ok"]
    expected = warm.groupby(frame["participant"]).sum()
    assert (fits["n_dropped_warmup"].to_numpy() == expected[fits["participant"]].to_numpy()).all()
    none = fits[fits["model"] == "none"]
    assert len(none) == 8 and none["slope_ms_per_bit"].isna().all() and (none["d_bic_none"] == 0).all()
    blocks = result.blocks
    assert set(blocks["block"]) == {"1", "2", "3"} and "none" in set(blocks["model"])
    assert (blocks.groupby("block")["rank"].min() == 1).all()
    assert {"protected_exceedance", "omnibus_risk", "called", "evidence"} <= set(blocks.columns)
    assert set(result.tables()) == {"rt_fits", "rt_compare", "rt_selection", "rt_blocks", "rt_diagnostics",
                                    "rt_population", "regressors"}
    assert any("called: count-1 beats the baseline and the other learners" in n for n in result.notes)


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
    fits = analyze_rt(log, tide, models=["count-1"], bayes=False).fits
    fits = fits[fits["model"] == "count-1"]
    kept_median = fits["median_rt_s"].to_numpy()
    truth = 1000 * b * kept_median  # ms per bit at the median RT
    covered = (fits["slope_low"] <= truth) & (truth <= fits["slope_high"])
    assert covered.sum() >= 5  # 95% intervals: at most one miss in six is expected
    assert np.all(np.abs(fits["b_per_bit"] - b) < 0.15)


def _reaction_log(n_participants: int = 8, n_trials: int = 400, seed: int = 2):
    """Simulated serial RT: the next stimulus mostly repeats the last one; RT follows count-1 surprise."""
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
    log, task = _reaction_log()  # simulated: a depth-1 learner explains RTs better than depth 0 and the baseline
    result = analyze_rt(log, task, models=["count-0", "count-1"], bayes=False)
    assert result.compare["model"].iloc[0] == "count-1" and result.verdict() == "count-1"
    assert result.settings["baseline"] == ["blocks", "trial_spline"]  # no prev_correct: error trials are dropped
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
    result = analyze_rt(guess_log, tide, models=["count-1"], measure=amplitude, locked="reveal",
                        bayes=False)
    assert result.measure == "measure"
    assert "slope_per_bit" in result.fits.columns
    assert (result.fits["n_dropped_screen"] == 0).all()  # missed guesses keep their measure
    assert set(result.tables()) >= {"measure_fits", "measure_compare", "regressors"}
    with pytest.raises(UsageError):
        analyze_rt(guess_log, tide, models=["count-1"], measure="nonexistent", bayes=False)
    with pytest.raises(UsageError):
        analyze_rt(guess_log, tide, models=["count-1"], regressors=["guess_prob"], bayes=False)


def test_the_result_follows_the_step_contract(guess_log, tide):
    result = analyze_rt(guess_log, tide, models=["count-1"], bayes=False, seed=np.random.default_rng(1))
    assert isinstance(result, RTResult) and result.step == "rt" and result.model_ids == ["count-1"]
    assert result.task is tide and result.blobs() == {}
    assert result.texts() == {"summary.txt": "".join(f"{n}\n" for n in result.notes)}
    assert {"models", "measure", "bayes", "draws", "chains", "tune", "seed", "refits", "gate", "baseline",
            "bootstrap"} <= set(result.settings)
    assert isinstance(result.settings["seed"], int)  # a Generator gives one seed, recorded
    for bad in ({"chains": 1}, {"draws": 0}, {"n_jobs": 0}, {"seed": -1}, {"locked": "later"},
                {"baseline": "blocks,block_trend"}, {"bootstrap": -1}):
        with pytest.raises(UsageError):  # R-hat needs two chains (Vehtari et al., 2021)
            analyze_rt(guess_log, tide, models=["count-1"], **bad)
    with pytest.raises(UsageError, match="no group"):
        result.verdict("nobody")


def test_the_baseline_can_be_changed(guess_log, tide):
    result = analyze_rt(guess_log, tide, models=["count-1"], baseline="block_trend", bayes=False)
    assert result.settings["baseline"] == ["block_trend"]
    assert any("a line over blocks" in n for n in result.notes)
    plain = analyze_rt(guess_log, tide, models=["count-1"], baseline=[], bayes=False)
    assert (plain.fits["n_params"] == [4, 3] * 6).all()  # 1 + entropy + sigma + rho; the baseline 1 + sigma + rho


def test_participants_the_fit_left_out_are_left_out_with_a_note(guess_log, tide):
    frame = guess_log.frame[["participant", "group", "session", "block", "trial", "stimulus", "response", "rt"]]
    frame = frame.assign(response=frame["response"].where(frame["participant"] != "p03", ""))
    log = validate_log(frame, tide)  # p03 missed every guess: the fit has nothing to score for them
    fitted = fit(log, tide, models=["count-0", "count-1-leak"], seed=0)
    assert list(fitted.excluded["participant"]) == ["p03"]
    result = analyze_rt(log, tide, fit=fitted, bayes=False)
    assert result.model_ids == ["count-0", "count-1-leak"]  # the fit's models
    assert "p03" not in set(result.fits["participant"]) and "p03" not in set(result.regressors["participant"])
    assert any(n.startswith("participant p03 left out, as in the fit") for n in result.notes)
    leaky = result.fits[result.fits["model"] == "count-1-leak"]
    assert (leaky["params_from"] == "fits").all()  # the fitted leak, not one chosen on the RTs


# -- the hierarchical models ---------------------------------------------------------------------------
def _gate_study(task, n_participants, n_blocks, block_length, per_bit):
    """RTs from the hierarchical model's own law: log RT Gaussian, linear in entropy and block."""
    specs = [ParticipantSpec("count-1", rt=RTLaw(shift=0.0, per_bit=v)) for v in per_bit]
    frame, _ = simulate_participants(task, n_participants, n_blocks, models=specs, seed=8,
                                     block_length=block_length)
    return validate_log(frame, task)


@pytest.mark.slow
def test_hierarchical_model_passes_the_gate(lantern):
    # Ten blocks per participant: a left-out unit is a tenth of its participant's trials (with four
    # blocks a unit's pull on its participant's own parameters gave Pareto k above 0.7).
    log = _gate_study(lantern, 10, 10, 40, np.linspace(0.1, 0.9, 10))  # slopes far apart: centred
    result = analyze_rt(log, lantern, models=["count-1"], draws=1000, tune=1000, chains=4, seed=2, loo=True)
    diag = result.diagnostics.set_index("model")
    assert list(diag.index) == ["count-1", "none"] and not diag["provisional"].any()  # the full run
    assert diag.loc["count-1", "ok"], diag.loc["count-1", "reasons"]  # the default Gate (Vehtari et al., 2021; 2017)
    assert diag.loc["count-1", "slope_form"] == "centred" and diag.loc["count-1", "intercept_form"] == "centred"
    assert diag.loc["count-1", "form_reason"].startswith("intercept: auto")
    compare = result.compare.set_index("model")
    # Slopes this far apart leave the baseline misfitting its participants' first blocks, whose Pareto k then
    # needs exact refits; the comparison is called only when the baseline passes the gate too.
    if diag.loc["none", "ok"]:
        assert compare.index[0] == "count-1" and compare.loc["count-1", "called"]
    else:
        assert not compare["called"].any() and compare.loc["none", "evidence"] == "left-out"
        assert any("ELPD comparison" in n and "failed the gate: none" in n for n in result.notes)


def test_hierarchical_run_reports_its_gate(tide):
    frame, _ = simulate_participants(tide, 3, 2, models=["count-1"], seed=4, block_length=30)
    log = validate_log(frame, tide)
    result = analyze_rt(log, tide, models=["count-0", "count-1"], draws=50, tune=50, chains=2, seed=1,
                        refits=0, hierarchical_models="all", loo=True)  # refits: test_units_with_a_high_pareto_k_...
    diag = result.diagnostics
    assert list(diag["model"]) == ["count-0", "count-1", "none"]
    assert (diag["slope_form"].iloc[:2] == "non-centred").all() and diag["provisional"].all()
    assert (diag["target_accept"] >= 0.95).all()
    assert set(result.posteriors) == {"count-0", "count-1", "none"}
    idata = result.posteriors["count-1"]
    assert idata.log_likelihood["y"].shape[-1] == 6  # 3 participants x 2 blocks
    compare = result.compare
    assert (compare["criterion"] == "elpd_loo_participant_block").all()
    passed = set(diag.loc[diag["ok"], "model"])
    assert set(compare.loc[compare["evidence"] == "left-out", "model"]) == {"count-0", "count-1", "none"} - passed
    if len(passed) < 2:
        assert not compare["called"].any() and any(n.startswith("no ELPD comparison") for n in result.notes)
    blobs = result.blobs()  # the posteriors as netCDF files (HDF5 or classic netCDF signatures)
    assert set(blobs) == {"posterior_count-0.nc", "posterior_count-1.nc", "posterior_none.nc"}
    assert all(data[:4] in (b"\x89HDF", b"CDF\x01", b"CDF\x02") for data in blobs.values())


def test_units_with_a_high_pareto_k_are_refitted(tide):
    frame, _ = simulate_participants(tide, 4, 2, models=["count-1"], seed=4, block_length=60)
    log = validate_log(frame, tide)
    specs = model_specs(["count-1"], tide)
    chosen = choose_measure(log, tide, specs, "rt", log.frame["rt"].to_numpy())
    table = regressors(log, tide, specs)
    columns = {c: table[c].to_numpy() for c in ("entropy", "leak", "alpha", "params_from")}
    pooled = pool_measure(chosen, log.frame, columns, 0, 1)
    loose = Gate(rhat_max=1.2, ess_bulk_per_chain=5, max_divergences=10)  # short runs; k is the point
    run = {"draws": 150, "tune": 150, "chains": 2, "seed": 1, "labels": ("rt", "count-1"),
           "requested": {"intercept": "auto", "practice": "auto", "slope": "auto"}}
    capped = fit_measure_model(pooled, "count-1", gate=replace(loose, pareto_k_max=0.0), refits=0, **run)
    assert capped.refits == 0 and not capped.diagnostics.ok and "Pareto k" in capped.diagnostics.reasons[0]
    assert any("would need as many refits" in n for n in capped.notes)
    k = pareto_k(capped.posterior)
    limit = float(np.sort(k)[-2])  # the same seed gives the same posterior: one unit above this
    fit = fit_measure_model(pooled, "count-1", gate=replace(loose, pareto_k_max=limit), refits=1, **run)
    assert fit.refits == 1
    assert fit.diagnostics.pareto_k_max <= limit  # the refitted unit is exact: no importance sampling left above
    assert any("count-1: 1 participant x block unit has Pareto k" in n and "exact leave-one-out refits" in n
               for n in fit.notes)
    hopeless = fit_measure_model(pooled, "count-1", gate=replace(loose, pareto_k_max=0.0, ess_bulk_per_chain=1e9),
                                 refits=10, **run)
    assert hopeless.refits == 0 and any("not refitted" in n for n in hopeless.notes)  # the gate fails anyway
    with pytest.raises(UsageError, match="refits"):
        analyze_rt(log, tide, models=["count-1"], refits=-1)


def test_a_raw_measure_gets_priors_on_its_own_scale(lantern):
    # An invented single-trial amplitude in microvolts: 3.35 uV per bit of count-1's entropy, noise SD 8.
    frame, _ = simulate_participants(lantern, 10, 3, models=["count-1"], seed=12, block_length=80)
    log = validate_log(frame, lantern)
    table = regressors(log, lantern, ["count-1"])
    rng = np.random.default_rng(13)
    level = rng.normal(5.0, 2.0, size=10)[log.frame["participant"].astype("category").cat.codes.to_numpy()]
    amplitude = level + 3.35 * table["entropy"].to_numpy() + 8.0 * rng.normal(size=len(table))
    result = analyze_rt(log, lantern, models=["count-1"], measure=pd.Series(amplitude), locked="guess", draws=300,
                        tune=300, chains=2, seed=3, refits=0, gate=Gate(ess_bulk_per_chain=50),
                        hierarchical_models="all")
    population = result.population.set_index(["model", "parameter"])
    slope = population.loc[("count-1", "slope_mean")]
    assert slope["unit"] == "per_bit" and slope["ci95_low"] < 3.35 < slope["ci95_high"]
    sigma = population.loc[("count-1", "sigma")]
    assert sigma["mean"] == pytest.approx(8.0, rel=0.05) and sigma["ci95_low"] < 8.0 < sigma["ci95_high"]
    per_participant = result.fits[result.fits["model"] == "count-1"]["slope_per_bit"].mean()
    assert abs(per_participant - slope["mean"]) < 1.0  # the two paths agree


def _prior_as_posterior(fails: dict):
    """Return a stand-in for one NUTS run: prior draws as the posterior, divergent where ``fails`` says.

    ``fails`` maps a model's sampling seed to the target acceptances at which it reports divergences.
    """
    import arviz as az
    import pymc as pm

    def nuts(shared, data, *, draws, chains, seed, target_accept, **_):
        with shared.model:
            pm.set_data(data)
            prior = pm.sample_prior_predictive(draws=chains * draws, random_seed=seed).prior
        posterior = {name: prior[name].to_numpy().reshape(chains, draws, *prior[name].shape[2:])
                     for name in prior.data_vars}
        diverging = np.zeros((chains, draws), bool)
        diverging[0, :3] = target_accept in fails.get(seed, ())
        return az.from_dict(posterior=posterior, sample_stats={"diverging": diverging}), []

    return nuts


def test_a_model_that_keeps_diverging_is_left_out_and_the_others_compared(tide, monkeypatch):
    frame, _ = simulate_participants(tide, 4, 2, models=["count-1"], seed=4, block_length=30)
    log = validate_log(frame, tide)
    seed = 5
    fails = {child_int(seed, "rt", "count-0"): (0.95, 0.99), child_int(seed, "rt", "count-1"): (0.95,)}
    monkeypatch.setattr(sampling, "_nuts", _prior_as_posterior(fails))
    gate = Gate(rhat_max=math.inf, ess_bulk_per_chain=0, pareto_k_max=math.inf)  # divergences are the point
    result = analyze_rt(log, tide, models=["count-0", "count-1"], draws=40, tune=0, chains=2, seed=seed,
                        gate=gate, hierarchical_models="all", loo=True)
    diag = result.diagnostics.set_index("model")
    assert diag.loc["count-0", "target_accept"] == 0.99 and not diag.loc["count-0", "ok"]
    assert "3 divergent transitions" in diag.loc["count-0", "reasons"]
    assert diag.loc["count-1", "target_accept"] == 0.99 and diag.loc["count-1", "ok"]  # resampled, then passed
    assert diag.loc["none", "target_accept"] == 0.95
    compare = result.compare.set_index("model")
    assert compare.loc["count-0", "evidence"] == "left-out" and not compare.loc["count-0", "called"]
    assert set(compare.index[compare["evidence"] != "left-out"]) == {"count-1", "none"}  # still compared
    assert compare.loc[["count-1", "none"], "elpd_loo"].notna().all()
    assert any(n.startswith("left out of the ELPD comparison, failed the gate: count-0") for n in result.notes)
    assert any("count-1: sampler said: 3 divergent transitions at target acceptance 0.95: sampled again at 0.99"
               in n for n in result.notes)


@pytest.mark.slow
def test_depth_one_learner_ranks_first_by_elpd(lantern_log, lantern):
    result = analyze_rt(lantern_log, lantern, models=["count-0", "count-1"], draws=500, tune=500, chains=2,
                        seed=3, gate=Gate(pareto_k_max=math.inf), refits=0, hierarchical_models="all",
                        loo=True)  # three blocks: k is not the point
    ranked = result.compare[result.compare["evidence"] != "left-out"]
    assert ranked["model"].iloc[0] == "count-1" and (ranked["elpd_diff"].iloc[1:] < 0).all()
    assert result.verdict() == "count-1"  # the random-effects call of the per-participant fits agrees


def test_in_play_keeps_the_leader_and_the_models_it_cannot_tell_apart():
    table = pd.DataFrame({"group": "all", "model": ["count-0", "count-1", "count-2", "none"],
                          "protected_exceedance": [0.01, 0.6, 0.38, 0.01],
                          "freq_concentration": [1.0, 20.0, 19.0, 1.0]})
    kept, why = in_play(table, ["count-0", "count-1", "count-2"])
    # P(r_lead > r_j) = P(Beta(a_lead, a_j) > 1/2): 1 - 0.5^20 for a_j = 1 (closed form of Beta(a, 1)),
    # about 0.56 for 20 against 19 (scipy.stats.beta, Virtanen et al., 2020)
    from scipy.stats import beta

    assert beta.sf(0.5, 20.0, 19.0) < 0.95 < 1 - 0.5 ** 20
    assert kept == ["count-1", "count-2"] and "count-1" in why
    led_by_baseline = table.assign(protected_exceedance=[0.01, 0.3, 0.09, 0.6],
                                   freq_concentration=[1.0, 19.0, 1.0, 20.0])
    assert in_play(led_by_baseline, ["count-0", "count-1", "count-2"])[0] == ["count-1"]
    assert in_play(table.iloc[0:0], ["count-0", "count-1"])[0] == ["count-0", "count-1"]  # nothing usable: all
