"""Tests of parameter and model recovery (foretell.steps.design) and its figures (foretell.plots)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from scipy.stats import binomtest

from foretell.errors import InputError, UsageError
from foretell.simulate import DEFAULT_RANGES, SpecDrawer
from foretell.stats.intervals import clopper_pearson, trials_to_show
from foretell.steps.confusion import GROUP_RESAMPLES, TIE_BIC, answer_text, confusion_table, credit
from foretell.steps.design import RecoveryResult, _simulate, recover
from foretell.steps.guesses import FitResult
from foretell.tasks import Task

# An invented three-symbol source whose next symbol depends on the last two:
# each pair of past symbols makes one next symbol very likely.
_RULE = {("a", "a"): "b", ("b", "a"): "c", ("c", "a"): "a", ("a", "b"): "c", ("b", "b"): "a",
         ("c", "b"): "b", ("a", "c"): "a", ("b", "c"): "b", ("c", "c"): "c"}
DEPTH2 = Task.from_dict({
    "name": "pairs", "symbols": ["a", "b", "c"], "block_length": 100,
    "contexts": [{"past": list(past), "next": {s: 0.9 if s == nxt else 0.05 for s in "abc"}}
                 for past, nxt in _RULE.items()]})
FAIR = Task.from_dict({"name": "fair", "symbols": ["a", "b", "c"], "block_length": 40,
                       "contexts": [{"past": [], "next": {"a": 0.5, "b": 0.3, "c": 0.2}}]})
DEPTHS = ["count-0", "count-1", "count-2"]


@pytest.fixture(scope="module")
def depth_result():
    return recover(DEPTH2, models=DEPTHS, n_participants=12, trial_counts=[600], seed=3, progress=False)


@pytest.fixture(scope="module")
def twins():
    return recover(FAIR, models=["count-0", "count-task"], n_participants=4, trial_counts=[60, 90], seed=1,
                   progress=False)


# -- the confusion matrix ---------------------------------------------------------------------------
def test_confusion_is_row_stochastic(depth_result) -> None:
    conf = depth_result.confusion
    assert list(conf.columns) == ["trials", "generating_model", "fitted_model", "fraction", "ci95_low",
                                  "ci95_high", "n", "recovered", "n_needed"]
    assert len(conf) == 9
    sums = conf.groupby(["trials", "generating_model"])["fraction"].sum()
    np.testing.assert_allclose(sums, 1.0)
    assert (conf["n"] == 12).all()
    assert ((conf["ci95_low"] <= conf["fraction"]) & (conf["fraction"] <= conf["ci95_high"])).all()


def test_depths_are_recovered_at_600_trials(depth_result) -> None:
    conf = depth_result.confusion
    diagonal = conf[conf["generating_model"] == conf["fitted_model"]].set_index("generating_model")
    assert (diagonal.loc[DEPTHS, "fraction"] >= 0.85).all(), diagonal
    # 12 participants cannot show 90%: even 12 of 12 has a lower bound of 0.025^(1/12) = 0.74
    assert not diagonal["recovered"].any()
    assert (diagonal.loc[diagonal["fraction"] == 1.0, "n_needed"] == 36).all()
    off = conf[conf["generating_model"] != conf["fitted_model"]]
    assert off["recovered"].isna().all() and off["n_needed"].isna().all()
    # the group-level check agrees: every cell's group verdict is its own generating model
    own = depth_result.group_check.query("generating_model == fitted_model")
    assert (own["share"] > 0.5).all()
    shares = depth_result.group_check.groupby(["trials", "generating_model"])["share"].sum()
    np.testing.assert_allclose(shares, 1.0)
    assert (depth_result.group_check["n_groups"] == GROUP_RESAMPLES + 1).all()


def test_inversion_is_bayes_rule_with_uniform_prior(depth_result) -> None:
    inv = depth_result.inversion
    conf = depth_result.confusion
    for (trials, fitted), part in inv.groupby(["trials", "fitted_model"]):
        column = conf[(conf["trials"] == trials) & (conf["fitted_model"] == fitted)]
        if column["fraction"].sum() > 0:
            np.testing.assert_allclose(part["fraction"].sum(), 1.0)
            expected = column.set_index("generating_model")["fraction"] / column["fraction"].sum()
            np.testing.assert_allclose(part.set_index("generating_model")["fraction"],
                                       expected.loc[part["generating_model"]])
        else:
            assert part["fraction"].isna().all() and (part["n"] == 0).all()


def test_lookalike_models_split_credit_equally(twins) -> None:
    conf = twins.confusion
    assert set(conf["generating_model"]) == {"count-0", "count-task"}
    np.testing.assert_allclose(conf["fraction"], 0.5)
    assert any("identical predictions" in note for note in twins.notes)
    assert "No listed trial count meets both" in twins.answer


def test_merging_lookalikes_counts_them_as_one() -> None:
    res = recover(FAIR, models=["count-0", "count-task", "count-1"], n_participants=3, trial_counts=[60],
                  seed=2, progress=False, merge_lookalikes=True)
    assert set(res.confusion["generating_model"]) == {"count-0=count-task", "count-1"}
    assert res.confusion.groupby("generating_model")["fraction"].sum().eq(1.0).all()


def test_ties_split_credit_and_failed_fits_are_left_out() -> None:
    fits = pd.DataFrame({
        "participant": ["p1"] * 3 + ["p2"] * 3,
        "fitted_model": ["A", "B", "C"] * 2,
        "bic": [10.0, 10.0 + TIE_BIC / 10, 10.0, 5.0, 7.0, 3.0],
        "converged": [True, True, True, True, True, False],
    })
    credited, notes = credit(fits, 100, "A")
    p1 = credited[credited["participant"] == "p1"].set_index("fitted_model")["credit"]
    np.testing.assert_allclose(p1.sort_index(), [1 / 3] * 3)
    p2 = credited[credited["participant"] == "p2"]
    assert p2["fitted_model"].tolist() == ["A"] and p2["credit"].tolist() == [1.0]
    assert "did not converge" in notes[0]


def test_a_cell_without_usable_fits_keeps_its_rows() -> None:
    credited = pd.DataFrame({"trials": [60, 60], "generating_model": ["A", "A"], "participant": ["p1", "p1"],
                             "fitted_model": ["A", "B"], "credit": [0.5, 0.5]})
    conf = confusion_table(credited, [60, 90], ["A", "B"])
    assert len(conf) == 8
    empty = conf[(conf["trials"] == 90) | (conf["generating_model"] == "B")]
    assert (empty["n"] == 0).all() and empty["fraction"].isna().all()
    full = conf[(conf["trials"] == 60) & (conf["generating_model"] == "A")]
    assert full["fraction"].tolist() == [0.5, 0.5] and full["n"].tolist() == [1, 1]


def test_clopper_pearson_matches_scipy() -> None:
    # reference: scipy.stats.binomtest(...).proportion_ci(method="exact") (Clopper & Pearson, 1934)
    k = np.array([0, 1, 3, 7, 12, 11, 40])
    n = np.array([12, 12, 12, 12, 12, 40, 40])
    low, high = clopper_pearson(k, n)
    for ki, ni, lo, hi in zip(k, n, low, high):
        ref = binomtest(int(ki), int(ni)).proportion_ci(confidence_level=0.95, method="exact")
        assert lo == pytest.approx(ref.low, abs=1e-10)
        assert hi == pytest.approx(ref.high, abs=1e-10)
    assert np.isnan(clopper_pearson(np.array([0]), np.array([0]))[0]).all()


def test_participants_needed_to_show_a_share_reaches_the_target() -> None:
    # perfect record: n of n has the exact lower bound (a/2)^(1/n) (Clopper & Pearson, 1934), checked against
    # scipy.stats.binomtest (Virtanen et al., 2020): 36 of 36 reaches 0.9, 35 of 35 does not
    assert trials_to_show(1.0, 0.9) == 36
    assert binomtest(36, 36).proportion_ci(0.95, method="exact").low >= 0.9
    assert binomtest(35, 35).proportion_ci(0.95, method="exact").low < 0.9
    # at an observed 95%: the smallest n among those where 0.95 n is whole is 160 (152 of 160)
    n = trials_to_show(0.95, 0.9)
    assert binomtest(152, 160).proportion_ci(0.95, method="exact").low >= 0.9
    assert binomtest(133, 140).proportion_ci(0.95, method="exact").low < 0.9
    assert 140 < n <= 160
    assert np.isnan(trials_to_show(0.9, 0.9)) and np.isnan(trials_to_show(0.5, 0.9))


# -- parameters ---------------------------------------------------------------------------------------
def test_params_table_and_summary(depth_result) -> None:
    params = depth_result.params
    assert list(params.columns) == ["trials", "model", "participant", "parameter", "true", "fitted",
                                    "converged"]
    assert set(params["parameter"]) == {"inv_temp", "lapse"}
    assert len(params) == 3 * 12 * 2
    lo, hi = DEFAULT_RANGES["inv_temp"]
    assert params.query("parameter == 'inv_temp'")["true"].between(lo, hi).all()
    summary = depth_result.recovery_summary
    assert list(summary.columns) == ["trials", "model", "parameter", "spearman", "bias", "rmse", "n"]
    row = summary.query("model == 'count-2' and parameter == 'inv_temp'").iloc[0]
    part = params.query("model == 'count-2' and parameter == 'inv_temp' and converged")
    # Spearman's rho is Pearson's correlation of the ranks (Spearman, 1904; common practice)
    assert row["spearman"] == pytest.approx(part["true"].rank().corr(part["fitted"].rank()))
    assert row["rmse"] == pytest.approx(np.sqrt(((part["fitted"] - part["true"]) ** 2).mean()))
    # inverse temperature of a learner that sees the structure is recovered in rank order
    assert row["spearman"] > 0.7


def test_leaky_models_are_simulated_with_leak_in_range() -> None:
    res = recover(FAIR, models=["count-0", "count-0-leak"], n_participants=3, trial_counts=[80], seed=4,
                  progress=False, ranges={"leak": (0.2, 0.3)})
    leak = res.params.query("model == 'count-0-leak' and parameter == 'leak'")
    assert len(leak) == 3 and leak["true"].between(0.2, 0.3).all()
    assert set(res.params.query("model == 'count-0'")["parameter"]) == {"inv_temp", "lapse"}


def _fit_result(fits: pd.DataFrame) -> FitResult:
    """A FitResult holding only a fits table (what the design check reads of it)."""
    empty = pd.DataFrame()
    return FitResult(task=FAIR, fits=fits, blocks=empty, predictions=empty, winners=empty, selection=empty,
                     selection_blocks=empty, families=empty, families_blocks=empty, contexts=empty,
                     context_agreement=empty, summary="")


def test_parameters_resampled_from_fits() -> None:
    fits = pd.DataFrame({"participant": ["q1", "q2", "q3", "q4"],
                         "model": ["count-1", "count-1", "count-1", "count-0"],
                         "inv_temp": [1.5, 2.5, 9.0, 3.0], "lapse": [0.02, 0.04, 0.3, 0.05],
                         "leak": np.nan, "alpha": 0.5, "converged": [True, True, False, False]})
    res = recover(FAIR, models=["count-0", "count-1"], n_participants=6, trial_counts=[60], seed=5,
                  progress=False, fit=_fit_result(fits))
    drawn = res.params.query("model == 'count-1'").pivot(index="participant", columns="parameter",
                                                         values="true")
    pairs = set(zip(drawn["inv_temp"], drawn["lapse"]))
    assert pairs <= {(1.5, 0.02), (2.5, 0.04)}
    assert any("no converged fits of count-0" in note for note in res.notes)
    assert res.settings["fit"] is True
    lo, hi = DEFAULT_RANGES["inv_temp"]
    assert res.params.query("model == 'count-0' and parameter == 'inv_temp'")["true"].between(lo, hi).all()


def test_fits_table_problems_are_input_errors() -> None:
    fits = pd.DataFrame({"participant": ["q1"], "model": ["count-1"], "inv_temp": [-1.0],
                         "lapse": [0.02], "converged": [True]})
    with pytest.raises(InputError, match="inv_temp"):
        recover(FAIR, models=["count-0", "count-1"], n_participants=2, trial_counts=[60], fit=_fit_result(fits))
    with pytest.raises(InputError, match="converged"):
        recover(FAIR, models=["count-0", "count-1"], n_participants=2, trial_counts=[60],
                fit=_fit_result(fits.drop(columns="converged")))


def test_the_result_writes_tables_answer_and_figures_drawn_on_demand(twins, monkeypatch) -> None:
    assert isinstance(twins, RecoveryResult) and twins.step == "recover"
    assert twins.texts() == {"answer.txt": twins.answer + "\n"}
    assert twins.settings["trial_counts"] == [60, 90] and twins.model_ids == ["count-0", "count-task"]
    from foretell.plots import design

    drawn = []
    monkeypatch.setattr(design, "confusion_heatmap", lambda cell, title: drawn.append(title))
    makers = twins.figure_makers()
    assert drawn == []  # nothing is drawn until asked
    makers["confusion_90"]()
    assert drawn == ["Model recovery at 90 trials per participant"]


# -- the design: trials, seeds, arguments ---------------------------------------------------------------
def test_last_block_is_shorter_when_trials_are_not_a_multiple() -> None:
    drawer = SpecDrawer("count-1", False, DEFAULT_RANGES, None)
    log, truth = _simulate(FAIR, drawer, 2, 100, 0)
    sizes = log[log["participant"] == "p01"].groupby("block").size()
    assert sizes.tolist() == [40, 40, 20]
    assert truth["participant"].tolist() == ["p01", "p02"]


def test_same_seed_same_cell_whatever_the_other_trial_counts(twins) -> None:
    # n_jobs only reaches the fitter, whose tables do not depend on it (tested in test_fitting)
    alone = recover(FAIR, models=["count-0", "count-task"], n_participants=4, trial_counts=[90], seed=1,
                    progress=False)
    for name, table in alone.tables().items():
        expected = twins.tables()[name]
        pd.testing.assert_frame_equal(table, expected[expected["trials"] == 90].reset_index(drop=True))


def test_another_seed_draws_other_participants(twins) -> None:
    other = recover(FAIR, models=["count-0", "count-task"], n_participants=4, trial_counts=[60], seed=2,
                    progress=False)
    assert not np.allclose(other.params["true"], twins.params.query("trials == 60")["true"])


@pytest.mark.parametrize("kwargs, message", [
    ({"ranges": {"alpha": (0.1, 1.0)}}, "cannot set a range"),
    ({"ranges": {"lapse": (0.0, 0.6)}}, "fitter's bounds"),
    ({"ranges": {"leak": (0.0, 0.2)}}, "above 0"),
    ({"trial_counts": [60, 60]}, "listed twice"),
    ({"trial_counts": [1]}, "trial count"),
    ({"n_participants": 0}, "n_participants"),
    ({"models": ["count-0"]}, "at least two"),
    ({"n_jobs": 0}, "n_jobs"),
])
def test_bad_arguments_are_usage_errors(kwargs, message) -> None:
    args = {"models": ["count-0", "count-1"], "n_participants": 2, "trial_counts": [60], **kwargs}
    with pytest.raises(UsageError, match=message):
        recover(FAIR, **args)


def test_progress_bar_on_request(capsys) -> None:
    recover(FAIR, models=["count-0", "count-1"], n_participants=2, trial_counts=[50], progress=True)
    assert "[foretell] recover: 2/2 cells done (count-1 at 50 trials)\n" in capsys.readouterr().err  # not a terminal


# -- the answer and the figures ------------------------------------------------------------------------
def _tables(diag_by_trials: dict[int, float], rho_by_trials: dict[int, float], n: int = 20):
    """Return (confusion, summary) of two models A, B with the given recovered share per trial count."""
    credited, summary = [], []
    for trials, diag in diag_by_trials.items():
        hits = round(diag * n)
        for g, other in (("A", "B"), ("B", "A")):
            credited += [{"trials": trials, "generating_model": g, "participant": f"p{i}",
                          "fitted_model": g if i < hits else other, "credit": 1.0} for i in range(n)]
        summary.append({"trials": trials, "model": "A", "parameter": "inv_temp",
                        "spearman": rho_by_trials[trials], "bias": 0.0, "rmse": 0.1, "n": n})
    return confusion_table(pd.DataFrame(credited), list(diag_by_trials), ["A", "B"]), pd.DataFrame(summary)


def test_answer_rests_on_the_lower_bound_and_says_how_many_participants_would_show_it() -> None:
    # every model recovered in 20 of 20 at 360 trials: the point estimates pass, the lower bounds
    # (0.025^(1/20) = 0.83) do not; 36 of 36 would (Clopper & Pearson, 1934)
    conf, summary = _tables({120: 0.8, 360: 1.0}, {120: 0.9, 360: 0.9})
    text = answer_text(conf, summary, 20)
    assert "No listed trial count meets both" in text and "recovered from" not in text
    assert "At 360 trials every model's share is above 90%, but 20 simulated participants per model are " \
           "too few to show it" in text
    assert "too few to show it: the lowest interval is A (100%, 95% CI 83%-100%)" in text
    assert "36 per model would" in text
    conf, summary = _tables({120: 0.8, 360: 1.0}, {120: 0.9, 360: 0.9}, n=40)
    text = answer_text(conf, summary, 40)
    assert "360 trials per participant is the smallest listed count that meets both" in text
    assert "A (100%, 95% CI 91%-100%)" in text


def test_answer_names_the_smallest_trial_count_meeting_both() -> None:
    conf, summary = _tables({100: 0.8, 300: 1.0, 900: 1.0}, {100: 0.9, 300: 0.6, 900: 0.9}, n=40)
    assert "900 trials per participant is the smallest listed count" in answer_text(conf, summary, 40)
    conf, summary = _tables({100: 1.0, 300: 1.0}, {100: 0.5, 300: 0.6}, n=40)
    text = answer_text(conf, summary, 40)
    assert "No listed trial count meets both" in text
    assert "inv_temp of A (0.60)" in text
    assert "The models alone are recovered from 100 trials" in text


def test_answer_names_the_most_confused_pair() -> None:
    conf, summary = _tables({100: 0.6, 300: 0.7}, {100: 0.9, 300: 0.9})
    assert "A participants best fitted by B (30%" in answer_text(conf, summary, 20)


def test_figures(twins) -> None:
    figs = twins.figures()
    assert set(figs) == {"confusion_60", "confusion_90", "params_60", "params_90", "recovery"}
    assert all(isinstance(f, Figure) for f in figs.values())
    texts = [t.get_text() for t in figs["confusion_60"].axes[0].texts]
    assert texts.count("0.50") == 4
    assert figs["params_90"].axes[0].get_xscale() == "log"  # inv_temp spans orders of magnitude


def test_palette_colours_stay_apart_and_labels_stay_readable():
    # Okabe & Ito (2008) colours, then their tints: sixteen distinct colours; text contrast by the
    # WCAG 2.0 relative-luminance rule (W3C, 2008): black on yellow, white on black.
    from foretell.plots.common import colour, text_colour

    assert len({colour(i) for i in range(16)}) == 16
    assert text_colour("#000000") == "white" and text_colour("#F0E442") == "black"
