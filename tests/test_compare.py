"""Tests of group-level model selection, families and winners against published results."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, optimize, stats
from scipy.special import digamma, gammaln, logsumexp, softmax, xlogy

from foretell.compare import (
    ALL,
    block_log_evidence_table,
    default_families,
    exceedance_prob,
    families,
    families_blocks,
    family_bms,
    log_evidence_table,
    rfx_bms,
    selection,
    selection_blocks,
    summary_text,
    winners,
)

DEFAULT_MODELS = ["count-0", "count-1", "count-2", "count-3", "count-0-leak", "count-1-leak",
                  "count-task", "mix-3", "source"]


# ----------------------------------------------------------------------------- RFX-BMS kernel

@pytest.mark.parametrize("k", [2, 3, 5])
def test_overwhelming_evidence_gives_exceedance_near_one(k):
    # Stephan et al. (2009): when every subject's evidence strongly favours one
    # model, its exceedance probability tends to 1.
    lme = np.full((20, k), -60.0)
    lme[:, 1] = 0.0
    res = rfx_bms(lme)
    assert res.exceedance[1] > 0.999
    assert res.protected_exceedance[1] > 0.999
    # Rigoux et al. (2014): the omnibus risk vanishes when the null is clearly wrong.
    assert res.bor < 1e-3


def test_identical_evidence_gives_uniform_frequencies_and_high_bor():
    # Rigoux et al. (2014): with no difference in evidence (24 subjects, 3
    # models) the expected frequencies are uniform and the BOR exceeds 0.85.
    rng = np.random.default_rng(4)
    lme = np.repeat(rng.normal(-300.0, 20.0, size=(24, 1)), 3, axis=1)
    res = rfx_bms(lme)
    np.testing.assert_allclose(res.expected_freq, 1 / 3, atol=1e-9)
    assert res.bor > 0.85
    # pxp = (1 - BOR) xp + BOR / K (Rigoux et al., 2014) stays uniform too.
    np.testing.assert_allclose(res.protected_exceedance, 1 / 3, atol=1e-9)


def test_two_model_exceedance_matches_beta_cdf():
    # Stephan et al. (2009): for two models r_1 ~ Beta(a1, a2), so
    # xp_1 = P(r_1 > 1/2) = 1 - Beta_cdf(0.5; a1, a2) (scipy.stats.beta as reference).
    rng = np.random.default_rng(11)
    lme = rng.normal(0.0, 2.0, size=(15, 2)) + np.array([0.3, 0.0])
    res = rfx_bms(lme)
    xp1 = 1.0 - stats.beta.cdf(0.5, res.alpha[0], res.alpha[1])
    np.testing.assert_allclose(res.exceedance, [xp1, 1.0 - xp1], rtol=1e-12)
    assert 0.01 < xp1 < 0.99  # a case where the value is informative


def test_sampled_exceedance_matches_beta_cdf_within_monte_carlo_error():
    # Closed form as above (Stephan et al., 2009); a Monte-Carlo fraction has
    # standard error sqrt(p(1-p)/n) (common practice): allow 5 of them.
    alpha = np.array([7.3, 5.1])
    n = 200_000
    xp = exceedance_prob(alpha, method="sampling", n_samples=n, rng=3)
    exact = 1.0 - stats.beta.cdf(0.5, *alpha)
    assert abs(xp[0] - exact) < 5 * np.sqrt(exact * (1 - exact) / n)
    # Same seed, same answer (explicit seeds, no global state).
    np.testing.assert_array_equal(xp, exceedance_prob(alpha, method="sampling", n_samples=n, rng=3))
    with pytest.raises(ValueError, match="rng"):
        exceedance_prob(alpha, method="sampling")


@pytest.mark.parametrize("alpha", [[3.0, 2.5, 1.2], [0.6, 0.4, 0.9], [12.0, 11.0, 2.0, 9.0], [40.0, 38.5, 41.0]])
def test_quadrature_exceedance_matches_dirichlet_draws(alpha):
    # Reference: draws from scipy.stats.dirichlet; the exceedance of model k is
    # the fraction of draws in which r_k is largest (Stephan et al., 2009).
    alpha = np.array(alpha)
    n = 400_000
    draws = stats.dirichlet.rvs(alpha, size=n, random_state=np.random.default_rng(8))
    mc = np.bincount(draws.argmax(axis=1), minlength=alpha.size) / n
    xp = exceedance_prob(alpha)
    se = np.sqrt(mc * (1 - mc) / n)
    assert np.all(np.abs(xp - mc) < 5 * se + 1e-4)
    np.testing.assert_allclose(xp.sum(), 1.0, atol=1e-8)


def test_symmetric_dirichlet_gives_equal_exceedance():
    # Exchangeability (from memory): equal alphas give xp_k = 1/K.
    np.testing.assert_allclose(exceedance_prob(np.full(4, 6.5)), 0.25, atol=1e-8)


def _elbo(lme, alpha0, alpha):
    """Free energy with q(r) = Dir(alpha) and q(m) optimal given it (Stephan et al., 2009, eqs. 7-14)."""
    elogr = digamma(alpha) - digamma(alpha.sum())
    g = softmax(lme + elogr, axis=1)
    e_log_prior = gammaln(alpha0.sum()) - gammaln(alpha0).sum() + ((alpha0 - 1) * elogr).sum()
    e_log_q = gammaln(alpha.sum()) - gammaln(alpha).sum() + ((alpha - 1) * elogr).sum()
    return (g * (lme + elogr)).sum() - xlogy(g, g).sum() + e_log_prior - e_log_q


def test_vb_posterior_is_the_fixed_point_and_maximises_the_free_energy():
    # Stephan et al. (2009): at convergence alpha = alpha0 + sum_n g_nk with
    # g_nk = softmax_k(L_nk + psi(a_k) - psi(sum a)), and E[r] = alpha / sum alpha.
    lme = np.array([[-10.0, -11.5], [-20.0, -18.7], [-5.0, -5.2]])
    alpha0 = np.ones(2)
    res = rfx_bms(lme)
    g = softmax(lme + digamma(res.alpha) - digamma(res.alpha.sum()), axis=1)
    np.testing.assert_allclose(res.alpha, alpha0 + g.sum(axis=0), rtol=1e-9)
    np.testing.assert_allclose(res.expected_freq, res.alpha / res.alpha.sum())
    # Independent computation: maximise the free energy over alpha directly
    # (Nelder-Mead in log alpha); the VB fixed point is its maximiser.
    best = optimize.minimize(lambda la: -_elbo(lme, alpha0, np.exp(la)), np.zeros(2),
                             method="Nelder-Mead", options={"xatol": 1e-9, "fatol": 1e-12})
    np.testing.assert_allclose(res.alpha, np.exp(best.x), rtol=1e-4)
    np.testing.assert_allclose(res.free_energy, -best.fun, rtol=1e-9)
    # The free energy is a lower bound on the exact log evidence (Jensen; from
    # memory), here ln int Dir(r | 1) prod_n (r e^{L_n1} + (1-r) e^{L_n2}) dr by quadrature.
    exact = np.log(integrate.quad(lambda r: np.prod(r * np.exp(lme[:, 0]) + (1 - r) * np.exp(lme[:, 1])),
                                  0.0, 1.0, epsabs=0, epsrel=1e-12)[0])
    assert res.free_energy <= exact + 1e-9
    assert res.free_energy > exact - 0.5


def test_null_evidence_and_protected_exceedance_follow_rigoux():
    # Rigoux et al. (2014): F0 = sum_n ln (1/K) sum_k e^{L_nk}; BOR = 1/(1+e^{F1-F0});
    # pxp = (1 - BOR) xp + BOR/K.
    rng = np.random.default_rng(2)
    lme = rng.normal(0.0, 1.0, size=(8, 3))
    res = rfx_bms(lme)
    f0 = (logsumexp(lme, axis=1) - np.log(3)).sum()
    np.testing.assert_allclose(res.null_log_evidence, f0, rtol=1e-12)
    np.testing.assert_allclose(res.bor, 1 / (1 + np.exp(res.free_energy - f0)), rtol=1e-12)
    np.testing.assert_allclose(res.protected_exceedance, (1 - res.bor) * res.exceedance + res.bor / 3)


def test_decisive_evidence_gives_dirichlet_of_counts():
    # Stephan et al. (2009): with decisive evidence each subject is assigned to
    # one model, and the posterior is Dir(alpha0 + counts).
    lme = np.full((10, 3), -500.0)
    winner = np.array([0, 0, 0, 0, 0, 0, 1, 1, 1, 2])
    lme[np.arange(10), winner] = 0.0
    res = rfx_bms(lme, alpha0=0.5)
    np.testing.assert_allclose(res.alpha, 0.5 + np.bincount(winner, minlength=3), rtol=1e-9)


def test_edge_cases_one_subject_one_model_and_impossible_models():
    one = rfx_bms(np.array([[-3.0, -5.0]]))
    assert one.converged and one.alpha.sum() == pytest.approx(3.0)  # alpha0 * K + 1 subject
    single = rfx_bms(np.array([[-3.0], [-4.0]]))
    assert single.exceedance.tolist() == [1.0] and single.protected_exceedance.tolist() == [1.0]
    assert np.isnan(single.bor)
    # -inf: the model cannot produce that subject's data, so the subject goes to the other model.
    res = rfx_bms(np.array([[-np.inf, -2.0], [-1.0, -2.0]]))
    assert res.posterior[0, 0] == 0.0 and np.isfinite(res.free_energy)
    with pytest.raises(ValueError, match="every model"):
        rfx_bms(np.array([[-np.inf, -np.inf], [-1.0, -2.0]]))
    with pytest.raises(ValueError, match="NaN"):
        rfx_bms(np.array([[np.nan, -2.0]]))


# ----------------------------------------------------------------------------- families

def test_one_model_per_family_equals_plain_bms():
    # Penny et al. (2010): with singleton families the family prior is the model
    # prior, so family inference is model inference.
    rng = np.random.default_rng(5)
    lme = rng.normal(0.0, 3.0, size=(12, 3))
    fam = family_bms(lme, {"a": [0], "b": [1], "c": [2]})
    plain = rfx_bms(lme)
    np.testing.assert_allclose(fam.alpha, plain.alpha, rtol=1e-10)
    np.testing.assert_allclose(fam.exceedance, plain.exceedance, rtol=1e-8)
    np.testing.assert_allclose(fam.protected_exceedance, plain.protected_exceedance, rtol=1e-8)
    assert fam.bor == pytest.approx(plain.bor)


def test_family_prior_protects_a_family_of_near_identical_models():
    # Penny et al. (2010): near-identical models split their frequency at the
    # model level, whereas with the family-balanced prior (a_k = 1/N_f) the
    # family frequencies stay close to the comparison without the duplicate.
    rng = np.random.default_rng(9)
    n = 30
    lme = np.zeros((n, 2))
    lme[: n // 2, 0] = 4.0 + rng.normal(0, 0.5, n // 2)
    lme[n // 2:, 1] = 4.0 + rng.normal(0, 0.5, n - n // 2)
    dup = np.column_stack([lme, lme[:, 1]])
    two = rfx_bms(lme)
    plain = rfx_bms(dup)
    assert plain.expected_freq[0] > plain.expected_freq[1] + 0.1  # dilution at the model level
    fam = family_bms(dup, {"A": ["m0"], "B": ["m1", "m1b"]}, ["m0", "m1", "m1b"])
    np.testing.assert_allclose(fam.expected_freq, two.expected_freq, atol=0.03)
    np.testing.assert_allclose(fam.alpha, [fam.models.alpha[0], fam.models.alpha[1:].sum()])
    np.testing.assert_allclose(fam.models.alpha0, [1.0, 0.5, 0.5])


def test_families_must_partition_the_models():
    lme = np.zeros((3, 3))
    with pytest.raises(ValueError, match="partition"):
        family_bms(lme, {"a": [0], "b": [1]})
    with pytest.raises(ValueError, match="unknown model"):
        family_bms(lme, {"a": ["x"], "b": ["y", "zz"]}, ["x", "y", "z"])


def test_default_families_of_the_default_model_set():
    # The definition: shallow = depth <= 1 leaky or not; deep = depth >= 2,
    # count-task, mix-D; source (the oracle) is neither and is left out.
    fams = default_families(DEFAULT_MODELS)
    assert fams == {"shallow": ["count-0", "count-1", "count-0-leak", "count-1-leak"],
                    "deep": ["count-2", "count-3", "count-task", "mix-3"]}
    assert default_families(["count-0", "count-2"]) == {"shallow": ["count-0"], "deep": ["count-2"]}
    with pytest.raises(ValueError, match="no default family"):
        default_families(["count-0", "my-model"])
    # on a source of depth <= 1, counting on the task's contexts is a shallow learner
    assert default_families(["count-0", "count-task", "count-2"], task_depth=1) == {
        "shallow": ["count-0", "count-task"], "deep": ["count-2"]}


# ----------------------------------------------------------------------------- tidy tables

def _fits(groups=True, seed=0, n=12):
    """A hand-built fits table: group g1 is best fitted by count-0, g2 by count-2."""
    rng = np.random.default_rng(seed)
    rows = []
    for p in range(n):
        group = "g1" if p < n // 2 else "g2"
        best = "count-0" if group == "g1" else "count-2"
        for model in ["count-0", "count-1", "count-2"]:
            ll = -400.0 + (30.0 if model == best else 0.0) + rng.normal(0, 1)
            k = 2
            rows.append(dict(participant=f"p{p:02d}", group=group, model=model, loglik=ll,
                             n_params=k, n_trials=500, aic=2 * k - 2 * ll,
                             bic=k * np.log(500) - 2 * ll, cv_loglik=ll - 5.0,
                             inv_temp=1.0, lapse=0.02, converged=True))
    fits = pd.DataFrame(rows)
    return fits if groups else fits.drop(columns="group")


def test_log_evidence_is_minus_half_bic_or_the_cv_score():
    # Schwarz (1978) / Raftery (1995): ln p(y | m) ~ -BIC/2 in nats.
    fits = _fits()
    le = log_evidence_table(fits, "bic")
    np.testing.assert_allclose(le["log_evidence"], -fits["bic"] / 2)
    assert le.columns.tolist() == ["participant", "group", "model", "criterion", "log_evidence", "note"]
    np.testing.assert_allclose(log_evidence_table(fits, "cv")["log_evidence"], fits["cv_loglik"])
    with pytest.raises(ValueError, match="criterion"):
        log_evidence_table(fits, "waic")


def test_block_log_evidence_uses_bic_of_each_block():
    # BIC = -2 ln L + k ln n (Schwarz, 1978), with k = 2 (inv_temp, lapse) by default.
    blocks = pd.DataFrame(dict(participant=["a", "a"], block=[1, 2], model=["count-0"] * 2,
                               loglik=[-100.0, -90.0], n_trials=[80, 60]))
    le = block_log_evidence_table(blocks)
    np.testing.assert_allclose(le["log_evidence"], [-100 - np.log(80), -90 - np.log(60)])
    le3 = block_log_evidence_table(blocks.assign(n_params=3))
    np.testing.assert_allclose(le3["log_evidence"], [-100 - 1.5 * np.log(80), -90 - 1.5 * np.log(60)])


def test_selection_per_group_labels_rows_and_finds_each_groups_model():
    sel = selection(_fits())
    assert list(sel.columns[:6]) == ["group", "model", "expected_freq", "exceedance",
                                     "protected_exceedance", "bor"]
    assert sel["group"].unique().tolist() == [ALL, "g1", "g2"]
    top = sel.loc[sel.groupby("group")["protected_exceedance"].idxmax()].set_index("group")["model"]
    assert top["g1"] == "count-0" and top["g2"] == "count-2"
    # The same numbers as the kernel on the pivoted evidence (labels, not positions).
    g1 = _fits().query("group == 'g1'").pivot(index="participant", columns="model", values="bic")
    ref = rfx_bms(-g1[["count-0", "count-1", "count-2"]].to_numpy() / 2)
    got = sel[sel["group"] == "g1"].set_index("model").loc[["count-0", "count-1", "count-2"]]
    np.testing.assert_allclose(got["expected_freq"], ref.expected_freq)
    assert (sel["n_participants"] == np.where(sel["group"] == ALL, 12, 6)).all()


def test_selection_without_groups_gives_only_all():
    for fits in (_fits(groups=False), _fits().assign(group=pd.NA)):
        sel = selection(fits)
        assert sel["group"].unique().tolist() == [ALL]


def test_selection_leaves_out_non_converged_participants_and_says_so():
    fits = _fits()
    fits.loc[(fits["participant"] == "p03") & (fits["model"] == "count-1"), "converged"] = False
    with pytest.warns(UserWarning, match="p03"):
        sel = selection(fits)
    row = sel[sel["group"] == "g1"].iloc[0]
    assert row["n_participants"] == 5 and "p03" in row["note"]
    assert sel[sel["group"] == "g2"]["note"].eq("").all()


def test_selection_refuses_when_nobody_is_usable():
    fits = _fits().assign(converged="False")  # as read back from a CSV
    with pytest.warns(UserWarning):
        sel = selection(fits, by_group=False)
    assert sel["expected_freq"].isna().all() and sel["n_participants"].eq(0).all()
    assert sel["note"].str.contains("left out").all()


def test_selection_blocks_and_families_tables():
    fits = _fits()
    blocks = fits[["participant", "group", "model", "loglik"]].copy()
    blocks = pd.concat([blocks.assign(block=1, n_trials=250, loglik=blocks["loglik"] / 2),
                        blocks.assign(block=2, n_trials=250, loglik=blocks["loglik"] / 2)])
    sb = selection_blocks(blocks)
    assert set(sb.groupby(["group", "block"]).size().index) == {(g, b) for g in [ALL, "g1", "g2"] for b in [1, 2]}
    fam = families(fits)
    assert fam.columns[:6].tolist() == ["group", "family", "expected_freq", "exceedance",
                                        "protected_exceedance", "bor"]
    g1 = fam[fam["group"] == "g1"].set_index("family")
    assert g1.loc["shallow", "models"] == "count-0;count-1"
    assert g1.loc["shallow", "protected_exceedance"] > 0.5
    np.testing.assert_allclose(fam.groupby("group")["expected_freq"].sum(), 1.0)
    fb = families_blocks(blocks, {"low": ["count-0"], "high": ["count-1", "count-2"]})
    assert set(fb["family"]) == {"low", "high"} and set(fb["block"]) == {1, 2}


def test_winners_on_a_hand_built_table():
    # delta_bic = BIC(runner-up) - BIC(best); clear when >= 2 (Raftery, 1995).
    fits = pd.DataFrame(dict(
        participant=["a"] * 3 + ["b"] * 3, group=["x"] * 6,
        model=["count-0", "count-1", "count-2"] * 2,
        bic=[100.0, 97.0, 99.0, 50.0, 51.9, 60.0], cv_loglik=np.nan,
        converged=[True, True, True, True, True, False]))
    blocks = pd.DataFrame(dict(
        participant=["a"] * 2, group=["x"] * 2, block=[3, 3], model=["count-0", "count-1"],
        loglik=[-40.0, -42.0], n_trials=[100, 100], n_params=[2, 2]))
    win = winners(fits, blocks).set_index(["participant", "block"])
    assert win.loc[("a", "all"), "best_model"] == "count-1"
    assert win.loc[("a", "all"), "runner_up"] == "count-2"
    assert win.loc[("a", "all"), "delta_bic"] == pytest.approx(2.0)
    assert bool(win.loc[("a", "all"), "clear"])
    assert win.loc[("b", "all"), "delta_bic"] == pytest.approx(1.9)
    assert not win.loc[("b", "all"), "clear"]  # < 2, and count-2 was left out
    assert "count-2" in win.loc[("b", "all"), "note"]
    # per block: BIC = -2 loglik + 2 ln 100 for both, so delta = 2 * (42 - 40)
    assert win.loc[("a", "3"), "best_model"] == "count-0"
    assert win.loc[("a", "3"), "delta_bic"] == pytest.approx(4.0)
    assert (win["criterion"] == "bic").all()
    assert win.reset_index()["block"].map(type).eq(str).all()


def test_summary_text_names_winners_and_block_shift():
    fits = _fits()
    blocks = pd.concat([fits.assign(block=b, n_trials=250) for b in (1, 2)])
    blocks.loc[(blocks["block"] == 1), "loglik"] -= np.where(blocks.loc[blocks["block"] == 1, "model"] == "count-0", -40, 0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        text = summary_text(winners(fits, blocks), selection(fits), selection_blocks(blocks), families(fits))
    lines = text.splitlines()
    assert any(line.startswith("group g1") and "count-0" in line for line in lines)
    assert any(line.startswith("group g2") and "count-2" in line for line in lines)
    assert "block 1: count-0" in text
    assert "family ahead" in text


def test_block_tables_keep_sessions_and_check_the_whole_session_fit():
    fits = _fits()
    fits.loc[(fits["participant"] == "p07") & (fits["model"] == "count-2"), "converged"] = False
    blocks = pd.concat([fits[["participant", "group", "model", "loglik"]].assign(session=s, block=1, n_trials=250)
                        for s in (1, 2)])
    with pytest.warns(UserWarning, match="p07"):
        sb = selection_blocks(blocks, fits)
    assert set(zip(sb["session"], sb["block"])) == {(1, 1), (2, 1)}
    assert (sb.loc[sb["group"] == "g2", "n_participants"] == 5).all()
    win = winners(fits, blocks)
    assert set(zip(win["session"], win["block"])) == {("all", "all"), ("1", "1"), ("2", "1")}
    p07 = win[win["participant"] == "p07"]
    assert (~p07["clear"]).all() and p07["note"].str.contains("count-2").all()


def test_family_table_leaves_out_models_in_no_family():
    fits = _fits()
    extra = fits[fits["model"] == "count-0"].assign(model="source", loglik=-1000.0, bic=2000.0)
    table = families(pd.concat([fits, extra], ignore_index=True))
    assert set(table["family"]) == {"shallow", "deep"}
    assert table["note"].str.contains("not in any family: source").all()
    # the same as the family comparison without the oracle in the table at all
    plain = families(fits)
    assert np.allclose(table["expected_freq"], plain["expected_freq"])
