"""The groups step: learning curves, permutation contrasts, the summary over blocks, the group models' use."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from foretell.curves import context_learning, learning_curves, participant_trends
from foretell.errors import UsageError
from foretell.hierarchical.group_model import model_data, summarise_joint
from foretell.learners import Counting, TreeMixture
from foretell.logs import validate_log
from foretell.simulate import simulate_participants
from foretell.stats.intervals import hdi
from foretell.stats.permutation import holm
from foretell.steps.contrasts import JOINT_COLUMNS, PERMUTATION, POSTERIOR, joint_effects, permutation_effects
from foretell.steps.groups import GroupResult, compare_groups
from foretell.steps.guesses import fit
from foretell.tasks import Task


def _raw(task, x, guesses, *, block, participant="p1", group="g", rt=None):
    """Return a canonical raw log of one session (guess -1 = missed)."""
    labels = np.asarray(task.symbols, dtype=object)
    n = len(x)
    return pd.DataFrame({"participant": participant, "group": group, "session": 1, "block": block,
                         "trial": np.arange(1, n + 1), "stimulus": labels[x],
                         "response": np.where(np.asarray(guesses) >= 0, labels[np.maximum(guesses, 0)], ""),
                         "rt": np.full(n, 0.5) if rt is None else rt})


# --------------------------------------------------------------------------- learning curves


def test_rates_and_median_rt_by_hand(tide):
    # tide-gauge: after "up" the source says down (0.75); after "up-down" down
    # (0.85); after "down-down" up (0.90). Definitions: common practice.
    x = np.array([0, 1, 1, 0, 1, 0, 0, 1])  # up down down up down up up down
    g = np.array([1, 1, 0, 1, -1, 1, 0, 1])
    rt = np.array([0.4, 0.5, 0.6, 0.05, 0.7, 0.8, 0.9, 1.0])  # 0.05 s is below the screen's floor
    block = np.array([1, 1, 1, 1, 2, 2, 2, 2])
    log = validate_log(_raw(tide, x, g, block=block, rt=rt), tide)
    curves = learning_curves(log, tide, ["accuracy", "optimal_rate", "median_rt"])
    value = curves.set_index(["metric", "block"])["value"]
    n = curves.set_index(["metric", "block"])["n_trials"]
    # block 1: guesses vs stimuli: 1/0 miss, 1/1 hit, 0/1 miss, 1/0 miss -> 1 of 4
    assert value["accuracy", "1"] == pytest.approx(1 / 4) and n["accuracy", "1"] == 4
    # block 2: trial 5 missed; 1/0, 0/0 hit, 1/1 hit -> 2 of 3
    assert value["accuracy", "2"] == pytest.approx(2 / 3) and n["accuracy", "2"] == 3
    # optimal: trial 1 has no context; t2 after up -> down optimal (g=down yes);
    # t3 after up-down -> down (g=up no); t4 after down-down -> up (g=down no)
    assert value["optimal_rate", "1"] == pytest.approx(1 / 3) and n["optimal_rate", "1"] == 3
    # t6 after up-down -> down (g=down yes); t7 after up -> down (g=up no);
    # t8 after up -> down (g=down yes)
    assert value["optimal_rate", "2"] == pytest.approx(2 / 3)
    assert value["median_rt", "1"] == pytest.approx(0.5) and n["median_rt", "1"] == 3
    assert value["median_rt", "2"] == pytest.approx(0.9) and n["median_rt", "2"] == 3


def test_gain_bits_and_inv_temp_come_from_the_whole_session_winner(tide):
    x = np.array([0, 1, 1, 0, 1, 0])
    log = validate_log(_raw(tide, x, x, block=[1, 1, 1, 2, 2, 2]), tide)
    fits = pd.DataFrame({"participant": "p1", "group": "g", "model": ["count-0", "count-1"],
                         "bic": [10.0, 8.0], "converged": True})
    blocks = pd.DataFrame({"participant": "p1", "group": "g", "session": 1, "block": [1, 2, 1, 2],
                           "model": ["count-0", "count-0", "count-1", "count-1"], "n_trials": [3, 2, 3, 2],
                           "loglik_session": [-2.0, -1.5, -1.0, -0.5], "inv_temp_block": [1.0, 2.0, 3.0, 4.0],
                           "bic_block": 1.0, "converged": [True, True, True, False]})
    curves = learning_curves(log, tide, ["gain_bits", "inv_temp"], fits=fits, blocks=blocks)
    value = curves.set_index(["metric", "block"])["value"]
    # count-1 wins (lower BIC); gain = (loglik + n ln m) / (n ln 2), m = 2 (from memory)
    assert value["gain_bits", "1"] == pytest.approx((-1.0 + 3 * math.log(2)) / (3 * math.log(2)))
    assert value["gain_bits", "2"] == pytest.approx((-0.5 + 2 * math.log(2)) / (2 * math.log(2)))
    assert value["inv_temp", "1"] == 3.0
    assert math.isnan(value["inv_temp", "2"])  # that block's refit did not converge


def test_depth_is_the_guess_weighted_expected_leaf_depth(tide):
    rng = np.random.default_rng(4)
    x = tide.sample(300, seed=rng)
    guesses = np.r_[0, x[:-1]]  # repeat the last stimulus: a depth-1 rule
    log = validate_log(_raw(tide, x, guesses, block=np.repeat([1, 2], 150)), tide)
    curves = learning_curves(log, tide, ["depth"])
    # brute force: for every counted guess of block 1, sum d x leaf_prob of its depth-d suffix
    tree = TreeMixture(max_depth=tide.max_depth + 1)
    targets = np.where(np.arange(300) < 150, guesses, -1)
    post = tree.posterior(x, 2, targets=targets)[0]
    leaf = dict(zip(post.contexts, post.leaf_prob))
    d_max = tree.max_depth
    per_trial = [sum(d * leaf.get(tuple(x[t - d:t]), 0.0) for d in range(d_max + 1))
                 for t in range(d_max, 150)]
    value = curves.set_index("block")["value"]
    assert value["1"] == pytest.approx(np.mean(per_trial), rel=1e-9)
    assert value["2"] == pytest.approx(1.0, abs=0.1)  # a clear depth-1 rule


def test_context_learning_shares_against_the_source(tide):
    x = tide.sample(400, seed=2)
    guesses = np.r_[0, x[:-1]]
    log = validate_log(_raw(tide, x, guesses, block=np.repeat([1, 2], 200)), tide)
    table = context_learning(log, tide)
    sums = table.groupby(["block", "context"])["guess_share"].sum()
    assert np.allclose(sums, 1.0)
    row = table[(table["context"] == "down-down") & (table["symbol"] == "up")]
    assert (row["source_prob"] == 0.9).all()
    # after down-down the repeat-last rule always guesses down
    assert (row["guess_share"] == 0.0).all()
    assert context_learning(log, Task.from_dict({"name": "t", "symbols": ["up", "down"]})).empty


def test_rt_cost_of_surprise_is_the_least_squares_slope():
    task = Task.from_dict({"name": "keys", "symbols": ["a", "b", "c"], "response": "reaction"})
    rng = np.random.default_rng(1)
    x = rng.integers(0, 3, 120)
    p = Counting(depth=1, alpha=0.5).next_proba(x, 3)[np.arange(120), x]
    surprise = -np.log2(p)
    rt = np.round(np.exp(-1.0 + 0.1 * surprise + 0.05 * rng.standard_normal(120)), 4)
    log = validate_log(_raw(task, x, x, block=np.repeat([1, 2], 60), rt=rt), task)
    curves = learning_curves(log, task, ["accuracy", "rt_surprise_slope"])
    value = curves.set_index(["metric", "block"])["value"]
    ok = log.frame["rt_ok"].to_numpy()[:60]
    slope = np.polyfit(surprise[:60][ok], np.log(rt[:60][ok]), 1)[0]  # least squares (common practice)
    assert value["rt_surprise_slope", "1"] == pytest.approx(slope, rel=1e-9)
    assert value["accuracy", "1"] == 1.0


# --------------------------------------------------------------------------- permutation tests


def _null_curves(rng, n_per_group=8, n_blocks=3, shift=0.0, slope=0.0):
    """Return gain_bits curves of groups A and B: N(0, 1) values, B's moved by shift + slope x (block - 1)."""
    rows = []
    for g in ("A", "B"):
        for i in range(n_per_group):
            for b in range(1, n_blocks + 1):
                moved = (shift + slope * (b - 1)) if g == "B" else 0.0
                rows.append({"participant": f"{g}{i}", "group": g, "session": "1", "block": str(b),
                             "metric": "gain_bits", "value": rng.normal() + moved, "n_trials": 50})
    return pd.DataFrame(rows)


def test_permutation_effects_table_and_holm_within_metric():
    curves = _null_curves(np.random.default_rng(3))
    out = permutation_effects(curves, [("B", "A")], n_permutations=199, seed=1)
    assert list(out["block"]) == ["1", "2", "3"] and (out["contrast"] == "B-A").all()
    assert np.allclose(out["perm_p_holm"], holm(out["perm_p"].to_numpy()))
    means = curves.groupby(["block", "group"])["value"].mean().unstack()
    assert np.allclose(out["observed_diff"], (means["B"] - means["A"]).to_numpy())
    again = permutation_effects(curves, [("B", "A")], n_permutations=199, seed=1)
    assert out.equals(again)  # seeded
    # each test draws from its own stream, keyed by metric, block and contrast, not by its position
    later = curves[curves["block"] != "1"]
    later = pd.concat([later[later["block"] == "3"], later[later["block"] == "2"]])  # blocks in another order
    shuffled = permutation_effects(later, [("B", "A")], n_permutations=199, seed=1)
    assert shuffled.set_index("block")["perm_p"].sort_index().equals(out.set_index("block")["perm_p"].iloc[1:])


# --------------------------------------------------------------------------- the summary over blocks


def test_participant_trends_are_each_participants_mean_and_least_squares_slope():
    rng = np.random.default_rng(5)
    curves = _null_curves(rng, n_per_group=4, n_blocks=5, slope=0.3)
    curves = curves[~((curves["participant"] == "A1") & (curves["block"] == "2"))]  # a block without a value
    rt = curves.assign(metric="median_rt", value=np.exp(curves["value"] / 4))  # a log metric
    trends = participant_trends(pd.concat([curves, rt], ignore_index=True)).set_index(
        ["metric", "participant", "summary"])
    for metric, part in (("gain_bits", curves), ("median_rt", rt)):
        for pid, rows in part.groupby("participant"):
            x = rows["block"].astype(float).to_numpy() - 1.0  # blocks 1..5 in run order: x = 0..4
            y = rows["value"].to_numpy() if metric == "gain_bits" else np.log(rows["value"].to_numpy())
            ref = stats.linregress(x, y)  # scipy.stats reference (Virtanen et al., 2020)
            assert trends.loc[(metric, pid, "learning slope"), "value"] == pytest.approx(ref.slope, rel=1e-10)
            assert trends.loc[(metric, pid, "mean over blocks"), "value"] == pytest.approx(y.mean(), rel=1e-12)
    assert trends.loc[("gain_bits", "A1", "learning slope"), "n_blocks"] == 4
    assert (trends["blocks"] == 5).all()


def test_joint_summary_is_the_difference_of_participants_summaries():
    curves = _null_curves(np.random.default_rng(8), n_per_group=6, n_blocks=4, shift=0.5, slope=0.4)
    out = joint_effects(curves, [("B", "A")], n_permutations=199, seed=2)
    assert list(out.columns) == JOINT_COLUMNS and len(out) == 2
    assert (out["method"] == PERMUTATION).all() and (out["level"] == 0.95).all() and out["called"].isna().all()
    row = out.set_index("summary")
    # independent computation: each participant's least-squares line (numpy.polyfit; common practice)
    fitted = {pid: np.polyfit(rows["block"].astype(float), rows["value"], 1)
              for pid, rows in curves.groupby("participant")}
    slopes = pd.Series({pid: c[0] for pid, c in fitted.items()})
    means = curves.groupby("participant")["value"].mean()
    is_b = slopes.index.str.startswith("B")
    assert row.loc["learning slope", "estimate"] == pytest.approx(slopes[is_b].mean() - slopes[~is_b].mean())
    assert row.loc["mean over blocks", "estimate"] == pytest.approx(means[is_b].mean() - means[~is_b].mean())
    assert row.loc["learning slope", "scale"] == "bits per trial per block"
    for summary in ("learning slope", "mean over blocks"):
        assert row.loc[summary, "low"] < row.loc[summary, "estimate"] < row.loc[summary, "high"]
    assert np.allclose(out["perm_p_holm"], holm(out["perm_p"].to_numpy()))
    assert out.equals(joint_effects(curves, [("B", "A")], n_permutations=199, seed=2))


def test_joint_summary_detects_a_true_group_difference():
    # B is better by 0.8 sd in every block, and improves by 0.4 sd per block more than A
    curves = _null_curves(np.random.default_rng(21), n_per_group=10, n_blocks=6, shift=0.8, slope=0.4)
    out = joint_effects(curves, [("B", "A")], n_permutations=999, seed=0).set_index("summary")
    for summary in ("mean over blocks", "learning slope"):
        assert out.loc[summary, "low"] > 0 and out.loc[summary, "perm_p_holm"] < 0.05


def test_null_groups_joint_intervals_cover_zero_at_their_level():
    # 50 null datasets (same distribution in both groups) of 8 + 8 participants x 6 blocks: the joint
    # interval, one per dataset and summary, should exclude 0 in about 5% of them. Binomial bound
    # (common practice): P(X >= 8 | n = 50, p = 0.05) < 0.02 (scipy.stats.binom; Virtanen et al., 2020).
    rng = np.random.default_rng(17)
    excluded = {"mean over blocks": 0, "learning slope": 0}
    for k in range(50):
        out = joint_effects(_null_curves(rng, n_blocks=6), [("B", "A")], n_permutations=99,
                            seed=k)
        for r in out.itertuples():
            excluded[r.summary] += int(r.low > 0 or r.high < 0)
    assert stats.binom.sf(7, 50, 0.05) < 0.02
    assert all(n < 8 for n in excluded.values()), excluded


def test_null_groups_study_flags_nothing(lantern):
    # both groups are the same learners with the same parameter ranges: no group difference exists
    raw, _ = simulate_participants(lantern, 12, 4, groups={"A": ["count-1", "count-2"], "B": ["count-1", "count-2"]},
                                   seed=12, block_length=60)
    res = compare_groups(validate_log(raw, lantern), lantern, models=["count-1"], bayes=False,
                         metrics=["optimal_rate", "median_rt"], n_permutations=499, seed=4)
    assert (res.group_effects["perm_p_holm"] >= 0.05).all()
    joint = res.group_joint
    assert len(joint) == 4 and ((joint["low"] <= 0) & (joint["high"] >= 0)).all(), joint
    assert (joint["perm_p_holm"] >= 0.05).all()
    assert res.group_effects["hdi_adjusted"].isna().all()  # no HDI without the group model


def test_the_model_joint_summary_is_the_mean_and_slope_of_the_posterior_block_differences():
    import arviz as az

    curves = _null_curves(np.random.default_rng(2), n_per_group=4, n_blocks=4)
    curves = curves[~((curves["group"] == "A") & (curves["block"] == "3"))]  # A has no value in block 3
    data = model_data(curves, "gain_bits", ["A", "B"], kind="gaussian")
    cell = np.random.default_rng(3).normal(size=(2, 50, 2, 4))  # (chain, draw, group, block)
    joint = summarise_joint(data, az.from_dict(posterior={"cell": cell}), [("B", "A")], called=True)
    row = joint.set_index("summary")
    diff = (cell[..., 1, :] - cell[..., 0, :])[..., [0, 1, 3]] * data.spread  # common blocks 1, 2, 4
    slope = np.polyfit([0.0, 1.0, 3.0], diff.reshape(-1, 3).T, 1)[0]  # least squares per draw (numpy)
    assert row.loc["learning slope", "estimate"] == pytest.approx(slope.mean(), rel=1e-10)
    assert (row.loc["learning slope", "low"], row.loc["learning slope", "high"]) == pytest.approx(hdi(slope))
    assert row.loc["mean over blocks", "estimate"] == pytest.approx(diff.mean(), rel=1e-10)
    assert row.loc["mean over blocks", "prob_positive"] == pytest.approx((diff.mean(axis=-1) > 0).mean())
    assert (joint["n_blocks"] == 3).all()
    uncalled = summarise_joint(data, az.from_dict(posterior={"cell": cell}), [("B", "A")], called=False)
    assert uncalled[["estimate", "low", "high", "prob_positive"]].isna().all().all()
    # the step takes the posterior's numbers where the model was called, the participants' otherwise
    out = joint_effects(curves, [("B", "A")], posterior=joint, n_permutations=99, seed=0)
    assert (out["method"] == POSTERIOR).all() and (out["level"] == 0.95).all()
    assert out.set_index("summary").loc["learning slope", "estimate"] == pytest.approx(slope.mean())
    out = joint_effects(curves, [("B", "A")], posterior=uncalled, n_permutations=99, seed=0)
    assert (out["method"] == PERMUTATION).all() and (~out["called"]).all()


@pytest.mark.slow
def test_permutation_p_values_are_uniform_under_the_null():
    rng = np.random.default_rng(11)
    p = [permutation_effects(_null_curves(rng, n_blocks=1), [("B", "A")], n_permutations=499,
                             seed=k)["perm_p"].iat[0] for k in range(200)]
    assert stats.kstest(p, "uniform").pvalue > 0.01  # Kolmogorov-Smirnov (common practice)


# --------------------------------------------------------------------------- the whole comparison


@pytest.fixture(scope="module")
def study(lantern):
    raw, _ = simulate_participants(lantern, 8, 3, groups={"A": ["count-0"], "B": ["count-2"]}, seed=3,
                                   block_length=60)
    log = validate_log(raw, lantern)
    return log, fit(log, lantern, models=["count-0", "count-2"], seed=0)


def test_compare_groups_without_the_bayesian_models(study, lantern):
    log, fitted = study
    res = compare_groups(log, lantern, fit=fitted, bayes=False, n_permutations=199)
    assert isinstance(res, GroupResult) and res.step == "groups" and res.model_ids == ["count-0", "count-2"]
    assert set(res.curves["metric"]) == {"accuracy", "optimal_rate", "gain_bits", "inv_temp", "median_rt",
                                         "depth"}
    assert (res.group_effects["contrast"] == "B-A").all() and res.group_effects["called"].isna().all()
    models = res.group_models.set_index(["level", "name"])
    assert models.loc[("model", "count-2"), "freq_group"] > models.loc[("model", "count-2"), "freq_reference"]
    assert set(res.group_params["parameter"]) <= {"inv_temp", "lapse"}
    assert any("bayes=False" in n for n in res.notes)
    assert set(res.tables()) == {"curves", "group_curves", "group_effects", "group_joint", "group_models",
                                 "group_params", "group_diagnostics", "context_learning"}
    assert set(res.group_joint["metric"]) == set(res.curves["metric"])
    assert (res.group_joint["method"] == PERMUTATION).all()
    assert res.texts() == {"summary.txt": "".join(f"{n}\n" for n in res.notes)}


def test_figures_are_drawn_only_when_asked_for(study, lantern):
    log, fitted = study
    res = compare_groups(log, lantern, fit=fitted, bayes=False, n_permutations=9, metrics=["optimal_rate"])
    makers = res.figure_makers()
    assert set(makers) == {"curve_optimal_rate", "context_learning"}
    assert all(callable(draw) for draw in makers.values())
    fig = makers["curve_optimal_rate"]()
    assert fig.axes[0].get_ylabel() == "optimal-guess rate (share of trials)"
    assert fig.axes[0].get_title() == "Guesses of the most likely next symbol by block"
    said = {t.get_text() for t in fig.axes[0].texts}
    levels = {round(float(line.get_ydata()[0]), 6) for line in fig.axes[0].get_lines() if len(set(line.get_ydata())) == 1}
    assert {"chance", "source's ceiling"} <= said and {round(1 / 3, 6), 1.0} <= levels  # three symbols; optimal guesses
    assert res.files() == sorted([f"{n}.csv" for n in res.tables()] + ["summary.txt"]
                                 + [f"figures/{n}.png" for n in makers])


def test_the_curve_figure_says_its_model_bands_are_unadjusted():
    from foretell.curves import METRICS
    from foretell.plots.groups import curve_figure

    table = pd.DataFrame({"group": ["A", "A"], "session": "1", "block": ["1", "2"], "metric": "accuracy",
                          "participant_mean": [0.5, 0.6], "mean": [0.52, 0.58], "hdi95_low": [0.4, 0.5],
                          "hdi95_high": [0.6, 0.7]})
    legend = [t.get_text() for t in curve_figure(table, METRICS["accuracy"]).legends[0].get_texts()]
    assert legend == ["A: mean of participants", "A: model, 95% HDI per block (unadjusted)"]


def test_one_group_and_small_groups_get_curves_only(study, lantern):
    log, fitted = study
    raw = log.frame[["participant", "group", "session", "block", "trial", "stimulus", "response", "rt"]]
    solo = compare_groups(validate_log(raw.assign(group="solo"), lantern), lantern, models=["count-0"],
                          n_permutations=99)
    assert solo.group_effects.empty and solo.group_joint.empty and any("no group inference" in n for n in solo.notes)
    assert "gain_bits" in set(solo.curves["metric"])  # no fit given: the guesses were fitted here
    assert solo.model_ids == ["count-0"]
    few = raw[~raw["participant"].isin(["p02", "p04", "p06"])]  # B keeps one participant
    res = compare_groups(validate_log(few, lantern), lantern, models=["count-0"], n_permutations=99)
    assert res.group_effects.empty
    assert any("group B has 1 participant" in n for n in res.notes)
    for bad in ({"reference": "Z"}, {"metrics": ["rt_surprise_slope"]}, {"chains": 1}, {"trend": "cubic"},
                {"n_permutations": 0}):
        with pytest.raises(UsageError):
            compare_groups(log, lantern, fit=fitted, **bad)


def test_participants_the_fit_left_out_are_left_out_with_a_note(study, lantern):
    log, _ = study
    raw = log.frame[["participant", "group", "session", "block", "trial", "stimulus", "response", "rt"]]
    missed = validate_log(raw.assign(response=raw["response"].where(raw["participant"] != "p03", "")), lantern)
    fitted = fit(missed, lantern, models=["count-0"], seed=0)
    assert list(fitted.excluded["participant"]) == ["p03"]
    res = compare_groups(missed, lantern, fit=fitted, bayes=False, n_permutations=9)
    assert "p03" not in set(res.curves["participant"])
    assert any(n.startswith("participant p03 left out, as in the fit") for n in res.notes)


def test_compare_groups_runs_the_model_and_reports_its_diagnostics(study, lantern):
    log, fitted = study
    res = compare_groups(log, lantern, fit=fitted, metrics=["optimal_rate"], draws=100, tune=100, chains=2,
                         n_permutations=99, seed=1)
    diag = res.group_diagnostics.iloc[0]
    assert (diag["metric"], diag["likelihood"], diag["trend"]) == ("optimal_rate", "binomial", "categorical")
    assert diag["parameterisation_reason"].startswith("auto: mean SE")  # the strength of the data decides
    called = bool(diag["ok"])
    effects = res.group_effects
    assert (effects["called"] == called).all()
    assert effects["diff_mean"].notna().all() == called
    assert (effects["hdi_adjusted"] == False).all() if called else effects["hdi_adjusted"].isna().all()  # noqa: E712
    joint = res.group_joint
    assert (joint["method"] == (POSTERIOR if called else PERMUTATION)).all() and (joint["called"] == called).all()
    assert joint["low"].notna().all() and (joint["low"] < joint["high"]).all()
    if not called:  # a 2 x 100 run rarely passes the gate: then it says so
        assert any("optimal_rate: hierarchical model not called" in n for n in res.notes)


def test_reaction_designs_use_accuracy_rt_and_the_rt_cost_of_surprise():
    task = Task.from_dict({"name": "keys", "symbols": ["a", "b", "c"], "response": "reaction"})
    rng = np.random.default_rng(9)
    frames = []
    for i in range(6):
        x = rng.integers(0, 3, 90)
        press = np.where(rng.random(90) < 0.9, x, (x + 1) % 3)
        frames.append(_raw(task, x, press, block=np.repeat([1, 2, 3], 30), participant=f"p{i}",
                           group="AB"[i % 2], rt=np.round(rng.uniform(0.3, 0.6, 90), 3)))
    log = validate_log(pd.concat(frames, ignore_index=True), task)
    res = compare_groups(log, task, bayes=False, n_permutations=99)  # fit does not apply: none is made
    assert set(res.curves["metric"]) == {"accuracy", "median_rt", "rt_surprise_slope"}
    assert res.context_learning.empty
    assert set(res.group_effects["metric"]) == {"accuracy", "median_rt", "rt_surprise_slope"}
