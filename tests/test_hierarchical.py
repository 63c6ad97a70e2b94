"""The hierarchical machinery: sampling and interruption, the gate, parameterisation, LOO, the two PyMC models."""

from __future__ import annotations

import math
import os
import re
import signal
import warnings

import numpy as np
import pandas as pd
import pytest

from foretell.errors import UsageError
from foretell.hierarchical import sampling
from foretell.hierarchical.forms import choose_by_strength, requested_forms
from foretell.hierarchical.gate import Gate, diagnose
from foretell.hierarchical.group_model import (GroupModelSpec, build_model, fit_group_model, group_data,
                                               group_structure, model_data, participant_intercepts,
                                               pointwise_loglik, summarise_group_model)
from foretell.hierarchical.loo import RefitWrapper, exact_refits, exact_units, psis_loo
from foretell.hierarchical.sampling import sample, sampling_cores

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    import arviz as az


def _idata(shift: float, chains: int = 4, draws: int = 1000, seed: int = 0):
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=(chains, draws)) + shift * np.arange(chains)[:, None]
    return az.from_dict(posterior={"theta": theta},
                        sample_stats={"diverging": np.zeros((chains, draws), bool)},
                        log_likelihood={"y": rng.normal(-1, 0.01, size=(chains, draws, 20))})


# -- sampling ----------------------------------------------------------------------------------------
def test_sampling_cores_reads_n_jobs_as_joblib_does(monkeypatch):
    assert sampling_cores(4, 2) == 2
    assert sampling_cores(2, 8) == 2  # never more than the chains
    monkeypatch.setattr(os, "cpu_count", lambda: 3)
    assert sampling_cores(4, -1) == 3  # every core (joblib's -1; common practice)
    assert sampling_cores(4, -2) == 2  # every core but one
    assert sampling_cores(4, -9) == 1
    with pytest.raises(UsageError, match="n_jobs"):
        sampling_cores(4, 0)


@pytest.fixture
def tiny_model():
    import pymc as pm

    with pm.Model() as model:
        pm.Normal("x", 0.0, 1.0)
    return model


def _samplers(monkeypatch, which, fake):
    """Route :func:`sample` to ``fake`` in place of ``which``'s sampler (no compilation)."""
    import nutpie
    import pymc as pm

    monkeypatch.setattr(sampling, "sampler_name", lambda: which)
    monkeypatch.setattr(sampling.Structure, "compiled", lambda self: object())
    monkeypatch.setattr(pm, "sample", fake)
    monkeypatch.setattr(nutpie, "sample", lambda compiled, **options: fake(**options))


@pytest.mark.parametrize("which", ["nutpie", "pymc"])
def test_a_short_trace_is_an_interruption_not_a_result(tiny_model, monkeypatch, which):
    def cut_short(*, draws, chains, **_):  # what the samplers return after Ctrl-C: chains cut short
        return az.from_dict(posterior={"x": np.zeros((chains, draws - 53))},
                            sample_stats={"diverging": np.zeros((chains, draws - 53), bool)})

    _samplers(monkeypatch, which, cut_short)
    with pytest.raises(KeyboardInterrupt, match="2 chains x 147 draws of 2 x 200"):
        sample(tiny_model, draws=200, tune=10, chains=2, seed=0)


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_a_signal_during_sampling_wins_over_the_trace(tiny_model, monkeypatch, signum):
    class Terminated(KeyboardInterrupt):  # as a command line turns SIGTERM into an interruption
        pass

    def on_term(signum, frame):
        raise Terminated()

    def swallowing(*, draws, chains, **_):  # the samplers catch KeyboardInterrupt and return what they have
        try:
            os.kill(os.getpid(), signum)
        except KeyboardInterrupt:
            pass
        return az.from_dict(posterior={"x": np.zeros((chains, draws))})

    _samplers(monkeypatch, "nutpie", swallowing)
    previous = signal.signal(signal.SIGTERM, on_term)
    try:
        with pytest.raises(KeyboardInterrupt) as caught:
            sample(tiny_model, draws=20, tune=10, chains=2, seed=0)
    finally:
        signal.signal(signal.SIGTERM, previous)
    assert isinstance(caught.value, Terminated) == (signum == signal.SIGTERM)  # SIGTERM stays SIGTERM
    assert signal.getsignal(signal.SIGTERM) is previous


def test_sampling_needs_two_chains(tiny_model):
    with pytest.raises(UsageError, match="chains must be a whole number >= 2"):
        sample(tiny_model, draws=10, tune=10, chains=1, seed=0)


# -- the gate ----------------------------------------------------------------------------------------
def test_gate_passes_good_chains_and_names_what_fails():
    good = diagnose(_idata(0.0), "test")
    assert good.ok and not good.provisional and good.rhat_max < 1.01
    bad = diagnose(_idata(2.0), "test")  # chains that disagree: R-hat far above 1.01 (Vehtari et al., 2021)
    assert not bad.ok and any("R-hat" in r for r in bad.reasons)
    short = diagnose(_idata(0.0, chains=2, draws=300), "test", Gate())
    assert short.provisional


def test_gate_says_what_the_ess_limit_is_made_of():
    rng = np.random.default_rng(2)
    sticky = np.cumsum(rng.normal(size=(2, 300)), axis=1)  # random walks: a tiny bulk ESS
    idata = az.from_dict(posterior={"theta": sticky}, sample_stats={"diverging": np.zeros((2, 300), bool)})
    (reason,) = [r for r in diagnose(idata, "test").reasons if "ESS" in r]
    assert re.fullmatch(r"bulk ESS \d+ < 200 \(100 per chain × 2 chains\)", reason), reason


def test_gate_prints_enough_digits_to_tell_a_value_from_its_limit():
    idata = _idata(0.05, seed=3)
    found = diagnose(idata, "test")
    # limits a hair below the values found: at the usual 3 decimals (0 for ESS) each would print
    # as its own limit ("R-hat 1.010 > 1.01")
    gate = Gate(rhat_max=found.rhat_max - 1e-7, ess_bulk_per_chain=(found.ess_bulk_min + 0.4) / 4)
    reasons = diagnose(idata, "test", gate).reasons
    (rhat,) = [r for r in reasons if r.startswith("R-hat")]
    value, limit = map(float, re.fullmatch(r"R-hat (\S+) > (\S+)", rhat).groups())
    assert value > limit
    (ess,) = [r for r in reasons if r.startswith("bulk ESS")]
    value, limit = map(float, re.match(r"bulk ESS (\S+) < (\S+) ", ess).groups())
    assert value < limit


def test_pareto_k_is_checked_only_where_models_are_compared_by_loo():
    idata = _idata(0.0)
    strict = Gate(pareto_k_max=-1.0)  # every k fails
    assert diagnose(idata, "test", strict).ok  # reported, not checked
    assert math.isfinite(diagnose(idata, "test", strict).pareto_k_max)
    compared = diagnose(idata, "test", strict, loo=psis_loo(idata))
    assert not compared.ok and any(r.startswith("Pareto k") for r in compared.reasons)


# -- parameterisation --------------------------------------------------------------------------------
def test_parameterisation_follows_the_strength_of_the_data_and_can_be_set():
    rng = np.random.default_rng(3)
    se = np.full(30, 0.02)
    spread = rng.normal(0.4, 0.2, size=30) + se * rng.standard_normal(30)
    # Betancourt & Girolami (2015): strong data (SE << tau) sample best centred, weak data non-centred
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
    assert requested_forms("auto", ("intercept", "slope")) == {"intercept": "auto", "slope": "auto"}
    assert requested_forms({"slope": "centred"}, ("intercept", "slope")) == {"intercept": "auto",
                                                                             "slope": "centred"}
    with pytest.raises(UsageError):
        requested_forms({"level": "centred"}, ("intercept", "slope"))


# -- the measure model ---------------------------------------------------------------------------------
# -- exact leave-one-out where PSIS is unreliable --------------------------------------------------
def _held_out(idata, n_units: int = 3):
    loo = psis_loo(idata)
    k = np.asarray(loo.pareto_k)
    threshold = float(np.sort(k)[-(n_units + 1)])  # the units with the largest k are refitted
    rng = np.random.default_rng(5)
    return loo, threshold, {int(u): rng.normal(-1.2, 0.3, size=(4, 1000)) for u in np.flatnonzero(k > threshold)}


def test_exact_units_match_arviz_reloo():
    # ArviZ's reloo (Kumar et al., 2019) refits through a SamplingWrapper; a stub that returns
    # given held-out log-likelihoods makes it the reference for the update of the LOO estimate.
    import xarray as xr

    idata = _idata(0.0)
    loo, threshold, held = _held_out(idata)

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
        ref = az.reloo(Stub(None, idata_orig=idata), loo_orig=psis_loo(idata), k_thresh=threshold, verbose=False)
    got = exact_units(loo, held)
    assert len(held) == 3
    for name in ("elpd_loo", "se", "p_loo"):
        assert got[name] == pytest.approx(ref[name], rel=1e-12), name
    np.testing.assert_allclose(got.loo_i, ref.loo_i, rtol=1e-12)
    np.testing.assert_array_equal(got.pareto_k, ref.pareto_k)
    assert float(loo.elpd_loo) != pytest.approx(float(got.elpd_loo))  # the input is left as it was


def test_exact_refits_go_through_the_wrapper_and_report_failed_gates():
    idata = _idata(0.0)
    loo, _, held = _held_out(idata)
    calls = []

    class Refits(RefitWrapper):
        def sel_observations(self, unit):
            return f"without {unit}", unit

        def sample(self, data, unit):
            calls.append(data)
            return "posterior", ("R-hat 1.2 > 1.01",) if unit == max(held) else ()

        def log_likelihood_i(self, excluded, posterior, unit):
            return held[excluded]

    got, failed = exact_refits(loo, Refits(), sorted(held))
    assert calls == [f"without {u}" for u in sorted(held)]
    assert failed == {max(held): ("R-hat 1.2 > 1.01",)}
    np.testing.assert_array_equal(got.loo_i, exact_units(loo, held).loo_i)


# -- the group model -------------------------------------------------------------------------------------
def _rate_curves(rng, effects, n_per_group=6, n_blocks=4, n_trials=100, sd_int=0.3, sd_slope=0.2):
    """Return binomial curves: logit p = 0.3 t_b + u_i + v_i t_b + effects[group][block]."""
    t = (np.arange(n_blocks) - (n_blocks - 1) / 2) / (n_blocks - 1)
    rows = []
    for g, shift in effects.items():
        for i in range(n_per_group):
            u, v = rng.normal(0, sd_int), rng.normal(0, sd_slope)
            p = 1 / (1 + np.exp(-(0.3 * t + u + v * t + np.asarray(shift))))
            k = rng.binomial(n_trials, p)
            rows += [{"participant": f"{g}{i}", "group": g, "session": "1", "block": str(b + 1),
                      "metric": "optimal_rate", "value": k[b] / n_trials, "n_trials": n_trials}
                     for b in range(n_blocks)]
    return pd.DataFrame(rows)


def _rates(curves, groups):
    return model_data(curves, "optimal_rate", groups, kind="binomial")


def test_fixed_effects_core_matches_the_binomial_glm_mle():
    import pymc as pm
    import statsmodels.api as sm

    data = _rates(_rate_curves(np.random.default_rng(2), {"A": [0, 0, 0, 0], "B": [0, 0.3, 0.6, 0.9]}), ["A", "B"])
    model = build_model(data, GroupModelSpec(trend="linear", random_effects=False, prior_scale=1e3))
    with model:
        fit = pm.find_MAP(progressbar=False)
    # reference: statsmodels GLM Binomial MLE on the same design (level and slope per group;
    # Seabold & Perktold, 2010)
    g = data.group[data.participant]
    t = data.position[data.block]
    design = np.column_stack([g == 0, g == 1, (g == 0) * t, (g == 1) * t]).astype(float)
    glm = sm.GLM(np.column_stack([data.y, data.n - data.y]), design, family=sm.families.Binomial()).fit()
    assert np.allclose(np.r_[fit["level"], fit["slope"]], glm.params, atol=1e-3)


def test_gaussian_core_matches_least_squares_on_log_rt():
    import pymc as pm
    import statsmodels.api as sm

    rng = np.random.default_rng(6)
    rows = [{"participant": f"{g}{i}", "group": g, "session": "1", "block": str(b), "metric": "median_rt",
             "value": math.exp(-0.5 + 0.1 * (g == "B") * b + rng.normal(0, 0.1)), "n_trials": 80}
            for g in "AB" for i in range(5) for b in (1, 2, 3)]
    data = model_data(pd.DataFrame(rows), "median_rt", ["A", "B"], kind="gaussian", log=True)
    model = build_model(data, GroupModelSpec(random_effects=False, prior_scale=1e3))
    with model:
        fit = pm.find_MAP(progressbar=False)
    # reference: statsmodels OLS of log RT on group x block cell indicators (least squares, common practice)
    g, b = data.group[data.participant], data.block
    design = np.column_stack([(g == i) & (b == j) for i in range(2) for j in range(3)]).astype(float)
    log_rt = data.y * data.spread + data.centre
    ols = sm.OLS(log_rt, design).fit()
    assert np.allclose((fit["cell"] * data.spread + data.centre).ravel(), ols.params, atol=1e-4)


def test_model_structure_follows_the_spec():
    curves = _rate_curves(np.random.default_rng(1), {"A": [0, 0, 0], "B": [0, 0, 0]}, n_blocks=3)
    data = _rates(curves, ["A", "B"])
    linear = build_model(data, GroupModelSpec(trend="linear", parameterisation="non-centred"))
    assert {"level", "slope", "cell", "sd_intercept", "intercept_raw", "sd_block_slope",
            "block_slope_z"} <= set(linear.named_vars)
    centred = build_model(data, GroupModelSpec())
    assert "cell" in centred.named_vars and "block_slope_z" in centred.named_vars
    # the form is data, not structure: one compiled model serves both (Gorinova, Moore & Hoffman, 2020)
    assert group_data(data, GroupModelSpec())["intercept_form"] == 1.0
    assert group_data(data, GroupModelSpec(parameterisation="non-centred"))["intercept_form"] == 0.0
    assert group_structure(data, GroupModelSpec()) is group_structure(data, GroupModelSpec(
        parameterisation="non-centred"))
    one_block = _rates(curves[curves["block"] == "1"], ["A", "B"])
    assert "block_slope" not in build_model(one_block).named_vars
    with pytest.raises(UsageError):
        GroupModelSpec(trend="quadratic")


def test_participant_intercepts_are_empirical_logits():
    curves = pd.DataFrame({"participant": ["a", "a", "b", "b"], "group": "G", "session": "1",
                           "block": ["1", "2", "1", "2"], "metric": "optimal_rate",
                           "value": [0.5, 0.7, 0.2, 0.1], "n_trials": [10, 10, 10, 20]})
    est, se = participant_intercepts(_rates(curves, ["G"]))
    # by hand (Cox, 1970): a has 5 + 7 = 12 of 20, b has 2 + 2 = 4 of 30;
    # logit = ln((Y + 1/2) / (N - Y + 1/2)), se = sqrt(1/(Y + 1/2) + 1/(N - Y + 1/2))
    np.testing.assert_allclose(est, [math.log(12.5 / 8.5), math.log(4.5 / 26.5)], rtol=1e-12)
    np.testing.assert_allclose(se, [math.sqrt(1 / 12.5 + 1 / 8.5), math.sqrt(1 / 4.5 + 1 / 26.5)], rtol=1e-12)


def test_group_model_finds_a_late_difference_and_no_null_difference():
    # One small run, three groups: B is the reference's twin (null), C differs
    # in the last two blocks by +1 on the logit scale.
    curves = _rate_curves(np.random.default_rng(8), {"A": [0, 0, 0, 0], "B": [0, 0, 0, 0], "C": [0, 0, 1.0, 1.0]})
    data = _rates(curves, ["A", "B", "C"])
    # A short run: the estimates are checked here, with limits loosened for 2 chains x 500 draws.
    short = Gate(rhat_max=1.05, ess_bulk_per_chain=50)
    fit = fit_group_model(data, [("B", "A"), ("C", "A")], draws=500, tune=500, chains=2, seed=3,
                          parameterisation="centred", gate=short)
    assert fit.diagnostics.ok, fit.diagnostics.reasons
    assert math.isfinite(fit.diagnostics.pareto_k_max)  # reported, not checked: the model is not compared by LOO
    eff = fit.effects.set_index(["contrast", "block"])
    excludes_zero = (eff["hdi95_low"] > 0) | (eff["hdi95_high"] < 0)
    assert not excludes_zero["B-A"].any()
    assert excludes_zero["C-A"].loc[["3", "4"]].all()
    assert (eff.loc["C-A"].loc[["3", "4"], "prob_positive"] > 0.97).all()
    curves_c = fit.group_curves[fit.group_curves["group"] == "C"]
    assert ((curves_c["hdi95_low"] < curves_c["mean"]) & (curves_c["mean"] < curves_c["hdi95_high"])).all()
    # a posterior that fails the gate says nothing
    quiet_curves, quiet_effects = summarise_group_model(data, fit.posterior, [("C", "A")], called=False)
    assert quiet_effects[["diff_mean", "hdi95_low", "hdi95_high", "prob_positive"]].isna().all().all()
    assert not quiet_curves["called"].any() and quiet_curves["mean"].isna().all()


@pytest.mark.parametrize("kind", ["binomial", "gaussian"])
def test_pointwise_loglik_equals_pymc_own(kind):
    import pymc as pm

    curves = _rate_curves(np.random.default_rng(3), {"A": [0, 0, 0], "B": [0, 0.4, 0.8]}, n_blocks=3)
    data = model_data(curves, "optimal_rate", ["A", "B"], kind=kind, log=False)
    model = build_model(data, GroupModelSpec(parameterisation="non-centred"))
    with model:
        prior = pm.sample_prior_predictive(draws=40, random_seed=2).prior
    idata = az.InferenceData(posterior=prior.drop_vars("y", errors="ignore"))
    with model:  # reference: PyMC's own pointwise log-likelihood of the same draws (PyMC; Abril-Pla et al., 2023)
        expected = pm.compute_log_likelihood(idata, progressbar=False, extend_inferencedata=False)["y"].to_numpy()
    np.testing.assert_allclose(pointwise_loglik(data, idata), expected, rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("weight", [0.0, 1.0])
def test_partial_level_is_normal_mu_tau_in_either_form(weight):
    import pymc as pm

    from foretell.hierarchical.forms import partial_level

    with pm.Model():
        theta = partial_level("theta", 2.0, 0.5, pm.Data("w", weight), shape=20_000)
    values = pm.draw(theta, random_seed=1)
    # Normal(2, 0.5) whatever the form (Papaspiliopoulos, Roberts & Sköld, 2007)
    assert values.mean() == pytest.approx(2.0, abs=0.02) and values.std() == pytest.approx(0.5, abs=0.02)
