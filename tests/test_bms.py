"""Tests of the random-effects model-selection kernels: variational, Gibbs, families, exceedance."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, optimize, signal, stats
from scipy.special import digamma, gammaln, logsumexp, softmax, xlogy

from foretell.errors import UsageError
from foretell.stats.convergence import effective_sample_size, split_rhat
from foretell.stats.selection import exceedance_prob, family_bms, family_evidence, groups_differ, rfx_bms, rfx_gibbs


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
    with pytest.raises(UsageError, match="rng"):
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
    with pytest.raises(UsageError, match="every model"):
        rfx_bms(np.array([[-np.inf, -np.inf], [-1.0, -2.0]]))
    with pytest.raises(UsageError, match="NaN"):
        rfx_bms(np.array([[np.nan, -2.0]]))


# ----------------------------------------------------------------------------- families

def test_one_model_per_family_equals_plain_bms():
    # Penny et al. (2010): with singleton families the family prior is the model
    # prior, so family inference is model inference.
    rng = np.random.default_rng(5)
    lme = rng.normal(0.0, 3.0, size=(12, 3))
    fam = family_bms(lme, {"a": [0], "b": [1], "c": [2]}, method="variational")
    plain = rfx_bms(lme)
    np.testing.assert_allclose(fam.alpha, plain.alpha, rtol=1e-10)
    np.testing.assert_allclose(fam.exceedance, plain.exceedance, rtol=1e-8)
    np.testing.assert_allclose(fam.protected_exceedance, plain.protected_exceedance, rtol=1e-8)
    assert fam.bor == pytest.approx(plain.bor)


@pytest.mark.parametrize("method", ["variational", "gibbs"])
def test_family_prior_protects_a_family_of_near_identical_models(method):
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
    fam = family_bms(dup, {"A": ["m0"], "B": ["m1", "m1b"]}, ["m0", "m1", "m1b"], method=method, rng=0)
    np.testing.assert_allclose(fam.expected_freq, two.expected_freq, atol=0.03)
    np.testing.assert_allclose(fam.alpha, [fam.models.alpha[0], fam.models.alpha[1:].sum()])
    np.testing.assert_allclose(fam.models.alpha0, [1.0, 0.5, 0.5])


def test_families_must_partition_the_models():
    lme = np.zeros((3, 3))
    with pytest.raises(UsageError, match="partition"):
        family_bms(lme, {"a": [0], "b": [1]}, rng=0)
    with pytest.raises(UsageError, match="unknown model"):
        family_bms(lme, {"a": ["x"], "b": ["y", "zz"]}, ["x", "y", "z"], rng=0)
    with pytest.raises(UsageError, match="method"):
        family_bms(lme, {"a": [0], "b": [1, 2]}, method="laplace")
    with pytest.raises(UsageError, match="rng"):
        family_bms(lme, {"a": [0], "b": [1, 2]})


# ----------------------------------------------------------------------------- Gibbs sampler

def _clear_evidence(n=60, seed=0):
    """Each subject favours one of three models (frequencies 0.6, 0.3, 0.1) by 8 nats."""
    rng = np.random.default_rng(seed)
    lme = rng.normal(0.0, 1.0, size=(n, 3))
    lme[np.arange(n), rng.choice(3, size=n, p=[0.6, 0.3, 0.1])] += 8.0
    return lme


def test_gibbs_agrees_with_variational_with_many_subjects_and_clear_evidence():
    # Penny et al. (2010): with many subjects and clear evidence the Gibbs and
    # variational posteriors agree closely.
    lme = _clear_evidence()
    vb, gibbs = rfx_bms(lme), rfx_gibbs(lme, rng=2)
    assert gibbs.converged and gibbs.method == "gibbs" and vb.method == "variational"
    np.testing.assert_allclose(gibbs.expected_freq, vb.expected_freq, atol=0.01)
    np.testing.assert_allclose(gibbs.exceedance, vb.exceedance, atol=0.02)
    np.testing.assert_allclose(gibbs.posterior, vb.posterior, atol=0.03)
    assert gibbs.bor < 0.01 and vb.bor < 0.01
    np.testing.assert_allclose(gibbs.alpha / gibbs.alpha.sum(), gibbs.expected_freq)
    assert gibbs.draws.shape == (gibbs.n_chains * gibbs.n_draws, 3)
    np.testing.assert_allclose(gibbs.draws.sum(axis=1), 1.0)


def _exact_two_model_posterior(lme):
    """Return (evidence, E[r_1], P(r_1 > 1/2)) for two models under r_1 ~ Beta(1, 1), by quadrature."""
    shift = lme.max()
    like = lambda r: np.prod(r * np.exp(lme[:, 0] - shift) + (1 - r) * np.exp(lme[:, 1] - shift))
    z = integrate.quad(like, 0.0, 1.0, epsabs=0, epsrel=1e-12)[0]
    mean = integrate.quad(lambda r: r * like(r), 0.0, 1.0, epsabs=0, epsrel=1e-12)[0] / z
    upper = integrate.quad(like, 0.5, 1.0, epsabs=0, epsrel=1e-12)[0] / z
    return np.log(z) + shift * len(lme), mean, upper


def test_gibbs_matches_the_exact_two_model_posterior():
    # Bayes' rule by quadrature (from memory): p(r | L) is proportional to
    # prod_n (r e^{L_n1} + (1 - r) e^{L_n2}) under a uniform prior (Stephan et al., 2009).
    rng = np.random.default_rng(11)
    lme = rng.normal(0.0, 2.0, size=(15, 2)) + np.array([0.3, 0.0])
    log_z, mean, xp1 = _exact_two_model_posterior(lme)
    gibbs = rfx_gibbs(lme, rng=5)
    assert gibbs.converged
    assert gibbs.expected_freq[0] == pytest.approx(mean, abs=0.01)
    assert gibbs.exceedance[0] == pytest.approx(xp1, abs=0.04)
    # Chib (1995): the evidence estimated from the Gibbs output; the variational
    # free energy is only a lower bound on it (Stephan et al., 2009).
    assert gibbs.log_evidence == pytest.approx(log_z, abs=0.05)
    assert rfx_bms(lme).free_energy <= log_z + 1e-9
    # Rigoux et al. (2014): BOR = 1 / (1 + e^{F1 - F0}), pxp = (1 - BOR) xp + BOR / K.
    assert gibbs.bor == pytest.approx(1 / (1 + np.exp(gibbs.log_evidence - gibbs.null_log_evidence)))
    np.testing.assert_allclose(gibbs.protected_exceedance, (1 - gibbs.bor) * gibbs.exceedance + gibbs.bor / 2)


def test_family_tie_with_unequal_family_sizes_gives_the_prior():
    # Same evidence for every model and subject: the likelihood
    # prod_n sum_k r_k e^{L_n} = prod_n e^{L_n} does not depend on r, so the
    # posterior is the prior (Bayes' rule, from memory): with the family-balanced
    # prior (Penny et al., 2010) the family frequencies are 1/2, 1/2, each family
    # exceeds the other with probability 1/2, and the random-effects model has
    # exactly the null's evidence, so BOR = 1/2 (Rigoux et al., 2014).
    rng = np.random.default_rng(4)
    lme = np.repeat(rng.normal(-300.0, 20.0, size=(20, 1)), 5, axis=1)
    spec = {"one": [0], "four": [1, 2, 3, 4]}
    gibbs = family_bms(lme, spec, rng=0)
    assert gibbs.method == "gibbs" and gibbs.converged
    np.testing.assert_allclose(gibbs.expected_freq, [0.5, 0.5], atol=0.03)
    np.testing.assert_allclose(gibbs.exceedance, [0.5, 0.5], atol=0.06)
    assert gibbs.bor == pytest.approx(0.5, abs=0.1)
    np.testing.assert_allclose(gibbs.protected_exceedance, [0.5, 0.5], atol=0.06)
    np.testing.assert_allclose(gibbs.draws.sum(axis=1), 1.0)
    np.testing.assert_allclose(gibbs.draws[:, 0], gibbs.models.draws[:, 0])
    # The variational fixed point is far from it (the defect the sampler fixes).
    vb = family_bms(lme, spec, method="variational")
    assert vb.expected_freq[0] > 0.9 and vb.exceedance[0] > 0.99


def test_gibbs_is_reproducible_from_its_seed():
    lme = _clear_evidence(n=12, seed=3)
    a, b = rfx_gibbs(lme, rng=7, n_draws=200), rfx_gibbs(lme, rng=7, n_draws=200)
    np.testing.assert_array_equal(a.draws, b.draws)
    c = rfx_gibbs(lme, rng=8, n_draws=200)
    assert not np.array_equal(a.draws, c.draws)
    with pytest.raises(UsageError, match="rng"):
        rfx_gibbs(lme, rng=None)
    with pytest.raises(UsageError, match="n_chains"):
        rfx_gibbs(lme, rng=0, n_chains=1)


def test_gibbs_reports_non_convergence_when_the_draws_run_out():
    # A tie among many subjects mixes slowly (the chain moves by about
    # 1/sqrt(N) a sweep); capped at 50 draws per chain it cannot reach ESS 400.
    lme = np.zeros((200, 2))
    res = rfx_gibbs(lme, rng=0, n_draws=50, max_draws=50, burn_in=10)
    assert not res.converged and res.n_draws == 50


def test_split_rhat_and_ess_on_chains_of_known_autocorrelation():
    # An AR(1) chain x_t = phi x_{t-1} + e_t has integrated autocorrelation time
    # (1 + phi) / (1 - phi) (from memory), so ESS ~ M n (1 - phi) / (1 + phi).
    rng = np.random.default_rng(1)
    phi, m, n = 0.5, 4, 20_000
    x = signal.lfilter([1.0], [1.0, -phi], rng.normal(size=(m, n)), axis=1)
    ess = effective_sample_size(x[..., None])[0]
    assert ess == pytest.approx(m * n * (1 - phi) / (1 + phi), rel=0.1)
    # chains from one distribution: R-hat near 1; one chain shifted by a
    # standard deviation of the stationary law: well above the 1.01 threshold
    # (Vehtari et al., 2021)
    assert split_rhat(x[..., None])[0] < 1.005
    shifted = x + np.array([0.0, 0.0, 0.0, 1.0 / np.sqrt(1 - phi ** 2)])[:, None]
    assert split_rhat(shifted[..., None])[0] > 1.05


@pytest.mark.slow  # importing arviz takes seconds; the test above covers the same code
def test_split_rhat_and_ess_match_arviz():
    # Reference library: arviz.rhat(method="split") and arviz.ess(method="mean")
    # (Gelman et al., 2013; Vehtari et al., 2021), on AR(1) chains with one shifted.
    az = pytest.importorskip("arviz")
    rng = np.random.default_rng(0)
    x = np.zeros((4, 1000))
    for t in range(1, x.shape[1]):
        x[:, t] = 0.9 * x[:, t - 1] + rng.normal(size=4)
    x[1] += 0.3
    assert split_rhat(x[..., None])[0] == pytest.approx(float(az.rhat(x, method="split")), rel=1e-10)
    assert effective_sample_size(x[..., None])[0] == pytest.approx(float(az.ess(x, method="mean")), rel=1e-8)
    # a constant quantity (a family holding every model) is no sign of failure
    assert split_rhat(np.ones((4, 10, 1)))[0] == 1.0


def test_one_family_or_one_model_has_nothing_to_compare():
    # With one alternative its frequency is 1 in every draw: xp = pxp = 1, BOR undefined.
    lme = np.array([[-1.0, -3.0], [-2.0, -2.5]])
    fam = family_bms(lme, {"all": [0, 1]}, rng=0)
    assert fam.converged and fam.exceedance.tolist() == [1.0] and np.isnan(fam.bor)
    one = rfx_gibbs(lme[:, :1], rng=0)
    assert one.converged and one.protected_exceedance.tolist() == [1.0] and np.isnan(one.bor)


# ----------------------------------------------------------------------------- between groups


def test_groups_from_different_models_differ_and_from_one_mixture_do_not():
    rng = np.random.default_rng(5)

    def evidence(models):
        lme = rng.normal(0.0, 1.0, (len(models), 3))
        lme[np.arange(len(models)), models] += 6.0
        return lme

    a, b = evidence(np.zeros(15, int)), evidence(np.full(15, 2))
    prob, log_bf = groups_differ(a, b)
    assert prob > 0.99 and log_bf > 0  # Rigoux et al. (2014): clearly different frequencies
    mix = evidence(np.tile([0, 1], 15))
    prob_same, _ = groups_differ(mix[:15], mix[15:])
    assert prob_same < 0.2
    with pytest.raises(UsageError):
        groups_differ(a, b[:, :2])


def test_family_evidence_is_the_log_mean_over_members():
    lme = np.log(np.array([[1.0, 3.0, 2.0], [4.0, 4.0, 1.0]]))
    fam = family_evidence(lme, [[0, 1], [2]])
    assert np.allclose(np.exp(fam), [[2.0, 2.0], [4.0, 1.0]])  # Penny et al. (2010): uniform within family
