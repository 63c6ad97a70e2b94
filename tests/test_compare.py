"""Tests of the comparison tables: evidence, winners, group-level selection, families, look-alikes."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from foretell.stats.selection import rfx_bms
from foretell.compare import (
    ALL,
    block_log_evidence_table,
    default_families,
    families,
    families_blocks,
    log_evidence_table,
    selection,
    selection_blocks,
    strength,
    winners,
)
from foretell.errors import UsageError
from foretell.models import lookalikes, parse_model

DEFAULT_MODELS = ["count-0", "count-1", "count-2", "count-3", "count-0-leak", "count-1-leak",
                  "count-task", "mix-3", "source"]

SELECTION_COLUMNS = ["group", "model", "expected_freq", "exceedance", "protected_exceedance", "omnibus_risk",
                     "freq_concentration", "n_participants", "criterion", "method", "note"]


# ----------------------------------------------------------------------------- hand-built tables

def _fits(groups=True, seed=0, n=12, models=("count-0", "count-1", "count-2")):
    """A hand-built fits table: group g1 is best fitted by count-0, g2 by count-2 (30 nats ahead)."""
    rng = np.random.default_rng(seed)
    rows = []
    for p in range(n):
        group = "g1" if p < n // 2 else "g2"
        best = "count-0" if group == "g1" else "count-2"
        for model in models:
            ll = -400.0 + (30.0 if model == best else 0.0) + rng.normal(0, 1)
            k = 2
            rows.append(dict(participant=f"p{p:02d}", group=group, model=model, loglik=ll,
                             n_params=k, n_trials=500, aic=2 * k - 2 * ll,
                             bic=k * np.log(500) - 2 * ll, cv_loglik=ll - 5.0,
                             inv_temp=1.0, lapse=0.02, converged=True, cv_converged=True))
    fits = pd.DataFrame(rows)
    return fits if groups else fits.drop(columns="group")


def _blocks(fits, n_blocks=2, sessions=False):
    """Per-block rows of the blocks contract: the whole-session loglik split evenly over the blocks."""
    parts = []
    for b in range(1, n_blocks + 1):
        part = fits[["participant", "group", "model", "n_params"]].copy()
        part["block"] = b
        part["n_trials"] = 250
        part["loglik_block"] = fits["loglik"] / n_blocks
        part["bic_block"] = part["n_params"] * np.log(250) - 2 * part["loglik_block"]
        part["cv_loglik_block"] = part["loglik_block"] - 3.0
        part["converged"] = True
        part["cv_converged"] = True
        parts.append(part)
    blocks = pd.concat(parts, ignore_index=True)
    if sessions:
        blocks = pd.concat([blocks.assign(session=s) for s in (1, 2)], ignore_index=True)
    return blocks


# ----------------------------------------------------------------------------- evidence

def test_log_evidence_is_minus_half_bic_or_the_cv_score():
    # Schwarz (1978) / Raftery (1995): ln p(y | m) ~ -BIC/2 in nats.
    fits = _fits()
    le = log_evidence_table(fits, "bic")
    np.testing.assert_allclose(le["log_evidence"], -fits["bic"] / 2)
    assert le.columns.tolist() == ["participant", "group", "model", "criterion", "log_evidence", "note"]
    np.testing.assert_allclose(log_evidence_table(fits, "cv")["log_evidence"], fits["cv_loglik"])
    with pytest.raises(UsageError, match="criterion"):
        log_evidence_table(fits, "waic")
    # cv needs the cross-validation to have converged too
    fits.loc[0, "cv_converged"] = False
    cv = log_evidence_table(fits, "cv")
    assert np.isnan(cv.loc[0, "log_evidence"]) and cv.loc[0, "note"] == "cv_converged false"
    assert not np.isnan(log_evidence_table(fits, "bic").loc[0, "log_evidence"])


def test_block_log_evidence_uses_the_block_refit_or_the_held_out_block():
    blocks = pd.DataFrame(dict(participant=["a", "a"], block=[1, 2], model=["count-0"] * 2,
                               n_trials=[80, 60], n_params=[2, 2], loglik_block=[-100.0, -90.0],
                               bic_block=[200 + 2 * np.log(80), 180 + 2 * np.log(60)],
                               cv_loglik_block=[-104.0, np.nan], converged=[True, False],
                               cv_converged=[True, None]))
    bic = block_log_evidence_table(blocks, "bic")
    # BIC = -2 ln L + k ln n (Schwarz, 1978): -BIC/2 = loglik_block - ln(80) for block 1
    assert bic.loc[0, "log_evidence"] == pytest.approx(-100 - np.log(80))
    assert np.isnan(bic.loc[1, "log_evidence"]) and bic.loc[1, "note"] == "converged false"
    assert bic["block"].tolist() == ["1", "2"]
    cv = block_log_evidence_table(blocks, "cv")
    assert cv.loc[0, "log_evidence"] == -104.0 and cv.loc[0, "criterion"] == "cv"
    assert np.isnan(cv.loc[1, "log_evidence"]) and cv.loc[1, "note"] == "cv_converged false"
    with pytest.raises(UsageError, match="bic_block"):
        block_log_evidence_table(blocks.drop(columns="bic_block"))


# ----------------------------------------------------------------------------- selection

def test_selection_per_group_labels_rows_and_finds_each_groups_model():
    sel = selection(_fits())
    assert sel.columns.tolist() == SELECTION_COLUMNS
    assert sel["group"].unique().tolist() == [ALL, "g1", "g2"]
    top = sel.loc[sel.groupby("group")["protected_exceedance"].idxmax()].set_index("group")["model"]
    assert top["g1"] == "count-0" and top["g2"] == "count-2"
    # clear evidence: the Gibbs check agrees, so the variational result is reported,
    # the same numbers as the kernel on the pivoted evidence (labels, not positions).
    assert (sel["method"] == "variational").all()
    g1 = _fits().query("group == 'g1'").pivot(index="participant", columns="model", values="bic")
    ref = rfx_bms(-g1[["count-0", "count-1", "count-2"]].to_numpy() / 2)
    got = sel[sel["group"] == "g1"].set_index("model").loc[["count-0", "count-1", "count-2"]]
    np.testing.assert_allclose(got["expected_freq"], ref.expected_freq)
    np.testing.assert_allclose(got["freq_concentration"], ref.alpha)
    assert (sel["n_participants"] == np.where(sel["group"] == ALL, 12, 6)).all()
    gibbs = selection(_fits(), method="gibbs", by_group=False)
    assert (gibbs["method"] == "gibbs").all()
    np.testing.assert_allclose(gibbs["expected_freq"], sel.loc[sel["group"] == ALL, "expected_freq"], atol=0.02)
    with pytest.raises(UsageError, match="method"):
        selection(_fits(), method="laplace")


def test_selection_is_reproducible_from_its_seed():
    a = families(_fits(), seed=3)
    b = families(_fits(), seed=3)
    pd.testing.assert_frame_equal(a, b)


def test_the_same_participants_get_the_same_draws_and_verdict_whatever_the_group_is_called():
    # One group is also "all": the Gibbs draws are keyed by the participants compared, so Monte
    # Carlo error cannot put the two on either side of a cut (a reviewer saw BOR 0.498 and 0.501).
    fits = _fits().assign(group="only")
    for table in (families(fits, seed=5, method="gibbs"), selection(fits, seed=5, method="gibbs")):
        numbers = table.drop(columns=["group"]).select_dtypes("number")
        one, everyone = (numbers[table["group"] == g].reset_index(drop=True) for g in ("only", ALL))
        pd.testing.assert_frame_equal(one, everyone)


def test_selection_without_groups_gives_only_all():
    for fits in (_fits(groups=False), _fits().assign(group=pd.NA)):
        sel = selection(fits)
        assert sel["group"].unique().tolist() == [ALL]


def test_selection_leaves_out_non_converged_participants_and_says_so_without_warnings():
    fits = _fits()
    fits.loc[(fits["participant"] == "p03") & (fits["model"] == "count-1"), "converged"] = False
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        sel = selection(fits)
    row = sel[sel["group"] == "g1"].iloc[0]
    assert row["n_participants"] == 5 and "p03" in row["note"]
    assert sel[sel["group"] == "g2"]["note"].eq("").all()


def test_selection_refuses_when_nobody_is_usable():
    fits = _fits().assign(converged="False")  # as read back from a CSV
    sel = selection(fits, by_group=False)
    assert sel["expected_freq"].isna().all() and sel["n_participants"].eq(0).all()
    assert sel["note"].str.contains("left out").all() and sel["method"].eq("").all()


def test_selection_blocks_and_families_tables():
    fits = _fits()
    blocks = _blocks(fits, sessions=True)
    sb = selection_blocks(blocks, method="variational")
    assert sb.columns.tolist() == SELECTION_COLUMNS[:1] + ["session", "block"] + SELECTION_COLUMNS[1:]
    assert set(sb.groupby(["group", "session", "block"]).size().index) == {
        (g, s, b) for g in [ALL, "g1", "g2"] for s in ["1", "2"] for b in ["1", "2"]}
    g1 = sb[(sb["group"] == "g1") & (sb["block"] == "1") & (sb["session"] == "1")].set_index("model")
    assert g1["protected_exceedance"].idxmax() == "count-0"
    fam = families(fits)
    assert fam.columns.tolist() == ["group", "family", "expected_freq", "exceedance", "protected_exceedance",
                                    "omnibus_risk", "freq_concentration", "n_participants", "criterion", "method",
                                    "models", "note"]
    assert (fam["method"] == "gibbs").all()
    g1 = fam[fam["group"] == "g1"].set_index("family")
    assert g1.loc["shallow", "models"] == "count-0;count-1"
    assert g1.loc["shallow", "protected_exceedance"] > 0.5
    np.testing.assert_allclose(fam.groupby("group")["expected_freq"].sum(), 1.0)
    fb = families_blocks(blocks, {"low": ["count-0"], "high": ["count-1", "count-2"]}, criterion="cv")
    assert set(fb["family"]) == {"low", "high"} and set(fb["block"]) == {"1", "2"}
    assert (fb["criterion"] == "cv").all()


def test_block_selection_uses_each_blocks_own_refit_and_its_convergence():
    fits = _fits()
    blocks = _blocks(fits)
    # in block 2 of g2 the block refit failed for p07 x count-2: p07 is left out of that block only
    bad = (blocks["participant"] == "p07") & (blocks["model"] == "count-2") & (blocks["block"] == 2)
    blocks.loc[bad, "converged"] = False
    sb = selection_blocks(blocks, method="variational")
    g2 = sb[sb["group"] == "g2"]
    assert (g2.loc[g2["block"] == "2", "n_participants"] == 5).all()
    assert (g2.loc[g2["block"] == "1", "n_participants"] == 6).all()
    assert g2.loc[g2["block"] == "2", "note"].str.contains("p07").all()
    # with "cv" the block refit's failure does not matter, the held-out score's does
    cv = selection_blocks(blocks, criterion="cv", method="variational")
    assert (cv.loc[cv["group"] == "g2", "n_participants"] == 6).all()


def test_family_tie_with_unequal_family_sizes_is_a_tie_in_the_table():
    # Same evidence for every model and participant: the exact posterior family
    # frequencies are the prior's, 1/2 and 1/2 (Bayes' rule, from memory; the
    # family-balanced prior of Penny et al., 2010), one model against four.
    models = ("count-0", "count-2", "count-3", "count-task", "mix-3")
    fits = _fits(models=models, n=10)
    fits["bic"] = fits.groupby("participant")["bic"].transform("first")
    fam = families(fits, by_group=False).set_index("family")
    assert fam.loc["shallow", "models"] == "count-0"
    np.testing.assert_allclose(fam["expected_freq"], 0.5, atol=0.05)
    np.testing.assert_allclose(fam["exceedance"], 0.5, atol=0.1)
    # "auto" runs both and takes the Gibbs result: the variational one is far off
    auto = families(fits, by_group=False, method="auto").set_index("family")
    assert (auto["method"] == "gibbs").all() and auto["note"].str.contains("disagree").all()
    vb = families(fits, by_group=False, method="variational").set_index("family")
    assert vb.loc["shallow", "expected_freq"] > 0.9


def test_family_table_leaves_out_models_in_no_family():
    fits = _fits()
    extra = fits[fits["model"] == "count-0"].assign(model="source", loglik=-1000.0, bic=2000.0)
    table = families(pd.concat([fits, extra], ignore_index=True))
    assert set(table["family"]) == {"shallow", "deep"}
    assert table["note"].str.contains("not in any family: source").all()
    # the same as the family comparison without the oracle in the table at all
    plain = families(fits)
    assert np.allclose(table["expected_freq"], plain["expected_freq"])
    # a family none of whose models was compared is named, not silently dropped
    given = families(fits, {"a": ["count-0"], "b": ["count-1", "count-2"], "c": ["mix-9"]}, by_group=False)
    assert set(given["family"]) == {"a", "b"} and given["note"].str.contains("family: c").all()


# ----------------------------------------------------------------------------- families

def test_default_families_of_the_default_model_set(compass, lantern):
    # foretell's definition: shallow = depth <= 1 leaky or not; deep = depth >= 2,
    # count-task, mix-D; source (the oracle) is neither and is left out.
    fams = default_families(DEFAULT_MODELS)
    assert fams == {"shallow": ["count-0", "count-1", "count-0-leak", "count-1-leak"],
                    "deep": ["count-2", "count-3", "count-task", "mix-3"]}
    assert default_families(["count-0", "count-2"]) == {"shallow": ["count-0"], "deep": ["count-2"]}
    with pytest.raises(UsageError, match="no default family"):
        default_families(["count-0", "my-model"])
    # on a source of depth <= 1, counting on the task's contexts is a shallow learner
    assert default_families(["count-0", "count-task", "count-2"], task_depth=1) == {
        "shallow": ["count-0", "count-task"], "deep": ["count-2"]}
    # specs carry their family: count-task is shallow on a memoryless task, deep on lantern-relay
    specs = [parse_model(m, compass) for m in ["count-0", "count-task", "count-2", "source"]]
    assert default_families(specs) == {"shallow": ["count-0", "count-task"], "deep": ["count-2"]}
    specs = [parse_model(m, lantern) for m in ["count-0", "count-task", "source"]]
    assert default_families(specs) == {"shallow": ["count-0"], "deep": ["count-task"]}


# ----------------------------------------------------------------------------- look-alikes

def test_lookalikes_by_construction(compass, lantern):
    ids = ["count-0", "count-1", "count-task", "count-0-leak", "mix-2", "source"]
    specs = [parse_model(m, compass) for m in ids]
    # on a memoryless task count-task is count-0; the leaky one has another free parameter
    assert lookalikes(specs) == [("count-0", "count-task")]
    # the caller's order decides which one is kept
    assert lookalikes(specs[::-1]) == [("count-task", "count-0")]
    assert lookalikes([parse_model(m, lantern) for m in ids]) == []
    # freeing leak everywhere makes count-0 and count-0-leak the same model as well
    free = [parse_model(m, compass, free=["leak"]) for m in ids]
    assert lookalikes(free) == [("count-0", "count-task", "count-0-leak")]


def _predictions(models, same=("a", "b")):
    rng = np.random.default_rng(1)
    base = rng.dirichlet(np.ones(2), size=6)
    rows = []
    for model in models:
        p = base if model in same else rng.dirichlet(np.ones(2), size=6)
        for t in range(6):
            rows.append(dict(participant="x", session=1, block=1 + t // 3, trial=t + 1, model=model,
                             p_u=p[t, 0], p_v=p[t, 1]))
    return pd.DataFrame(rows)


def test_lookalikes_on_the_data(compass, lantern):
    # count-1 and count-2 differ by construction; if their predictions agree on every
    # trial they cannot be told apart on these data
    specs = [parse_model(m, lantern) for m in ["count-1", "count-2", "mix-2"]]
    preds = _predictions(["count-1", "count-2", "mix-2"], same=("count-1", "count-2"))
    assert lookalikes(specs, preds) == [("count-1", "count-2")]
    # within tolerance only
    shifted = preds.copy()
    shifted.loc[shifted["model"] == "count-2", "p_u"] += 1e-9
    assert lookalikes(specs, shifted) == []
    assert lookalikes(specs, shifted, tol=1e-6) == [("count-1", "count-2")]
    # different free parameters are never merged
    leaky = [parse_model(m, lantern) for m in ["count-1", "count-2-leak"]]
    assert lookalikes(leaky, _predictions(["count-1", "count-2-leak"], same=("count-1", "count-2-leak"))) == []


def test_merging_lookalikes_in_winners_selection_and_families(compass):
    # An invented control group on a memoryless task: count-0 and count-task have
    # the same evidence, and without merging they split the frequency.
    fits = _fits(models=("count-0", "count-task", "count-2"))
    fits.loc[fits["model"] == "count-task", "bic"] = fits.loc[fits["model"] == "count-0", "bic"].to_numpy()
    sets = lookalikes([parse_model(m, compass) for m in ["count-0", "count-task", "count-2"]])
    split = selection(fits, by_group=False).set_index("model")
    merged = selection(fits, by_group=False, merge=sets).set_index("model")
    assert "count-task" not in merged.index
    assert merged["note"].str.contains("count-task left out: identical to count-0 on this task").all()
    assert merged.loc["count-0", "expected_freq"] > split.loc["count-0", "expected_freq"] + 0.1
    fam = families(fits, merge=sets, by_group=False).set_index("family")
    assert fam.loc["shallow", "models"] == "count-0"
    win = winners(fits, merge=sets)
    assert "count-task" not in set(win["best_model"]) | set(win["runner_up"])
    assert win["note"].str.contains("identical to count-0").all()
    # switched off: every model is compared
    assert "count-task" in set(selection(fits, by_group=False)["model"])


# ----------------------------------------------------------------------------- winners

@pytest.mark.parametrize("delta, grade", [(0.0, "bare-mention"), (1.99, "bare-mention"), (2.0, "positive"),
                                          (5.9, "positive"), (6.0, "strong"), (9.9, "strong"),
                                          (10.0, "very-strong"), (np.inf, "very-strong"), (np.nan, None)])
def test_strength_grades_follow_kass_and_raftery(delta, grade):
    # Kass & Raftery (1995): 2 ln BF 0-2 not worth more than a bare mention,
    # 2-6 positive, 6-10 strong, > 10 very strong.
    assert strength(delta) == grade


def test_winners_on_a_hand_built_table():
    fits = pd.DataFrame(dict(
        participant=["a"] * 3 + ["b"] * 3, group=["x"] * 6,
        model=["count-0", "count-1", "count-2"] * 2,
        bic=[100.0, 93.0, 99.0, 50.0, 51.9, 60.0], cv_loglik=[-50.0, -49.0, -52.0, -20.0, -21.5, -30.0],
        converged=[True, True, True, True, True, False], cv_converged=True))
    blocks = pd.DataFrame(dict(
        participant=["a"] * 2, group=["x"] * 2, block=[3, 3], model=["count-0", "count-1"],
        n_trials=[100, 100], n_params=[2, 2], bic_block=[80.0 + 2 * np.log(100), 84.0 + 2 * np.log(100)],
        cv_loglik_block=[-45.0, -44.0], converged=True, cv_converged=True))
    win = winners(fits, blocks).set_index(["participant", "block"])
    assert win.columns.tolist() == ["group", "best_model", "runner_up", "criterion", "delta", "strength",
                                    "n_models", "note"]
    # delta = BIC(runner-up) - BIC(best) = 2 ln BF approximately (Kass & Raftery, 1995)
    assert win.loc[("a", "all"), "best_model"] == "count-1"
    assert win.loc[("a", "all"), "runner_up"] == "count-2"
    assert win.loc[("a", "all"), "delta"] == pytest.approx(6.0)
    assert win.loc[("a", "all"), "strength"] == "strong"
    assert win.loc[("b", "all"), "delta"] == pytest.approx(1.9)
    assert pd.isna(win.loc[("b", "all"), "strength"])  # count-2 was left out: it might have won
    assert "count-2" in win.loc[("b", "all"), "note"]
    # per block: the block refit's BIC, delta = 84 - 80
    assert win.loc[("a", "3"), "best_model"] == "count-0"
    assert win.loc[("a", "3"), "delta"] == pytest.approx(4.0)
    assert win.loc[("a", "3"), "strength"] == "positive"
    assert (win["criterion"] == "bic").all()
    assert win.reset_index()["block"].map(type).eq(str).all()
    # with cv: twice the difference in held-out log-likelihood, whole session and block
    cv = winners(fits, blocks, criterion="cv").set_index(["participant", "block"])
    assert cv.loc[("a", "all"), "best_model"] == "count-1"
    assert cv.loc[("a", "all"), "delta"] == pytest.approx(2.0)
    assert cv.loc[("a", "3"), "best_model"] == "count-1"
    assert cv.loc[("a", "3"), "delta"] == pytest.approx(2.0)
    assert (cv["criterion"] == "cv").all()


def test_winners_keep_sessions():
    fits = _fits()
    blocks = _blocks(fits, n_blocks=1, sessions=True)
    win = winners(fits, blocks)
    assert set(zip(win["session"], win["block"])) == {("all", "all"), ("1", "1"), ("2", "1")}
    assert win.loc[win["block"] == ALL, "strength"].eq("very-strong").all()
