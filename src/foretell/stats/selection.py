"""Random-effects Bayesian model selection (pure numpy): variational and Gibbs posteriors, models and families.

Every function takes a log-evidence matrix L (N subjects x K models, in nats,
e.g. -BIC/2) under the generative model of Stephan et al. (2009).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
from scipy import integrate, stats
from scipy.special import digamma, expit, gammainc, gammaln, logsumexp, softmax, xlogy

from foretell.errors import UsageError
from foretell.stats.convergence import ESS_MIN, RHAT_MAX
from foretell.stats.gibbs import sample_frequencies


@dataclass(frozen=True)
class BMSResult:
    """Variational posterior of random-effects model selection over K models (:func:`rfx_bms`).

    Attributes
    ----------
    alpha0, alpha : numpy.ndarray, shape (K,)
        The Dirichlet prior and posterior over model frequencies.
    expected_freq, exceedance, protected_exceedance : numpy.ndarray
        alpha / sum(alpha); the probability that each model is more frequent
        than every other; (1 - bor) exceedance + bor / K.
    bor : float
        The Bayesian omnibus risk.
    posterior : numpy.ndarray, shape (N, K)
        The probability that subject n's data came from model k.
    free_energy, null_log_evidence : float
        F1 (a lower bound on the log evidence of the random-effects model)
        and F0, in nats.
    n_iter, converged : int, bool
        The variational iterations.
    """

    alpha0: np.ndarray
    alpha: np.ndarray
    expected_freq: np.ndarray
    exceedance: np.ndarray
    protected_exceedance: np.ndarray
    bor: float
    posterior: np.ndarray
    free_energy: float
    null_log_evidence: float
    n_iter: int
    converged: bool

    method = "variational"


@dataclass(frozen=True)
class GibbsBMSResult:
    """Gibbs-sampled posterior of random-effects model selection over K models (:func:`rfx_gibbs`).

    Attributes
    ----------
    alpha0 : numpy.ndarray, shape (K,)
    alpha : numpy.ndarray
        alpha0 + E[c], c the sampled assignment counts (so ``expected_freq``
        = alpha / sum alpha; the posterior itself is not a Dirichlet).
    draws : numpy.ndarray, shape (n_chains * n_draws, K)
        Draws of the model frequencies r from the exact posterior.
    expected_freq : numpy.ndarray
        E[r | L], Rao-Blackwellised: the mean over draws of
        (alpha0 + c) / (sum alpha0 + N).
    exceedance, protected_exceedance : numpy.ndarray
        The fraction of draws in which each model is the most frequent; (1 - bor) exceedance + bor / K.
    bor : float
        1 / (1 + exp(log_evidence - F0)).
    posterior : numpy.ndarray, shape (N, K)
        The fraction of draws assigning subject n to model k.
    log_evidence, null_log_evidence : float
        Chib's (1995) estimate of the log evidence of the random-effects
        model, and F0.
    rhat, ess : numpy.ndarray
        Split R-hat and effective sample size of each monitored frequency
        (the models' here, the families' in a family result).
    n_chains, n_draws : int
        Chains, and draws per chain.
    converged : bool
        max rhat < RHAT_MAX and min ess >= ESS_MIN (:mod:`foretell.stats.convergence`).
    """

    alpha0: np.ndarray
    alpha: np.ndarray
    draws: np.ndarray
    expected_freq: np.ndarray
    exceedance: np.ndarray
    protected_exceedance: np.ndarray
    bor: float
    posterior: np.ndarray
    log_evidence: float
    null_log_evidence: float
    rhat: np.ndarray
    ess: np.ndarray
    n_chains: int
    n_draws: int
    converged: bool

    method = "gibbs"


@dataclass(frozen=True)
class FamilyBMSResult:
    """Posterior of family-level random-effects selection (:func:`family_bms`).

    Attributes
    ----------
    families : tuple of str
        The families, in the order of the arrays.
    members : tuple of tuple of int
        Each family's model columns.
    alpha : numpy.ndarray
        The sum of its models' alpha (for the variational method the family
        Dirichlet posterior, by the aggregation property of the Dirichlet).
    expected_freq, exceedance, protected_exceedance : numpy.ndarray
        At the family level; pxp = (1 - bor) xp + bor / F.
    bor : float
    draws : numpy.ndarray or None
        Gibbs only: draws of the family frequencies (the sum of the member
        frequencies of each draw).
    models : BMSResult or GibbsBMSResult
        The model-level result, fitted with the family-balanced prior (its
        ``method`` and ``converged`` are the family result's).
    """

    families: tuple[str, ...]
    members: tuple[tuple[int, ...], ...]
    alpha: np.ndarray
    expected_freq: np.ndarray
    exceedance: np.ndarray
    protected_exceedance: np.ndarray
    bor: float
    draws: np.ndarray | None
    models: BMSResult | GibbsBMSResult

    @property
    def method(self) -> str:
        """Return "variational" or "gibbs": how the posterior was computed."""
        return self.models.method

    @property
    def converged(self) -> bool:
        """Return whether the model-level scheme converged (see :class:`BMSResult`, :class:`GibbsBMSResult`)."""
        return self.models.converged


def _check_evidence(log_evidence: np.ndarray) -> np.ndarray:
    lme = np.asarray(log_evidence, dtype=float)
    if lme.ndim != 2 or lme.shape[0] < 1 or lme.shape[1] < 1:
        raise UsageError(f"log_evidence must be a 2-D array (n_subjects, n_models) with at least "
                         f"one of each; got shape {lme.shape}")
    if np.isnan(lme).any() or np.isposinf(lme).any():
        raise UsageError("log_evidence must not contain NaN or +inf (-inf means 'impossible')")
    impossible = np.isneginf(lme).all(axis=1)
    if impossible.any():
        raise UsageError(f"log_evidence is -inf for every model in rows "
                         f"{np.flatnonzero(impossible).tolist()}: no model can explain these subjects")
    return lme


def _prior(alpha0: float | np.ndarray, n_models: int) -> np.ndarray:
    try:
        a0 = np.broadcast_to(np.asarray(alpha0, dtype=float), (n_models,)).copy()
    except ValueError:
        raise UsageError(f"alpha0 must be a number or one value per model ({n_models}); "
                         f"got {alpha0!r}") from None
    if not np.all(np.isfinite(a0)) or np.any(a0 <= 0):
        raise UsageError(f"alpha0 must be positive and finite; got {alpha0!r}")
    return a0


def _null_log_evidence(lme: np.ndarray, a0: np.ndarray) -> float:
    """Return F0 = sum_n ln sum_k r0_k e^{L_nk}, r0 = alpha0 / sum alpha0 (Rigoux et al., 2014)."""
    return float(logsumexp(lme, axis=1, b=a0 / a0.sum()).sum())


def _omnibus(log_evidence_rfx: float, null: float, xp: np.ndarray) -> tuple[float, np.ndarray]:
    """Return (BOR, pxp): BOR = 1 / (1 + e^{F1 - F0}), pxp = (1 - BOR) xp + BOR / K (Rigoux et al., 2014)."""
    k = xp.size
    if k == 1:
        return float("nan"), np.ones(1)
    bor = float(1.0 / (1.0 + np.exp(np.clip(log_evidence_rfx - null, -700, 700))))
    return bor, (1.0 - bor) * xp + bor / k


def exceedance_prob(alpha: np.ndarray, *, method: str = "exact", n_samples: int = 100_000,
                    rng: np.random.Generator | int | None = None) -> np.ndarray:
    """Return xp_k = P(r_k > r_j for every j != k) for r ~ Dirichlet(alpha).

    ``method="exact"``: for two models the closed form xp_1 = 1 - I_{1/2}(a1, a2),
    the regularised incomplete Beta function (Stephan et al., 2009); for more,
    one-dimensional quadrature over the Gamma representation of the Dirichlet
    (r = G / sum G with G_k ~ Gamma(alpha_k) independent, so r_k is the largest
    iff G_k is): xp_k = int_0^inf f_{a_k}(g) prod_{j != k} F_{a_j}(g) dg.
    ``method="sampling"``: the fraction of ``n_samples`` Dirichlet draws in
    which model k is the largest.

    Parameters
    ----------
    alpha : numpy.ndarray, shape (K,)
        Dirichlet parameters.
    method, n_samples, rng : str, int, numpy.random.Generator or int
        "exact" (default), or "sampling" with ``n_samples`` draws from ``rng`` (then needed).

    Returns
    -------
    numpy.ndarray, shape (K,)

    Raises
    ------
    UsageError
        For an unknown method, or sampling without ``rng``.

    References
    ----------
    Stephan, K. E., Penny, W. D., Daunizeau, J., Moran, R. J., & Friston,
    K. J. (2009). Bayesian model selection for group studies. NeuroImage 46,
    1004-1017.
    """
    a = np.asarray(alpha, dtype=float)
    k = a.size
    if k == 1:
        return np.ones(1)
    if method == "sampling":
        if rng is None:
            raise UsageError("exceedance by sampling needs rng (a numpy Generator or a seed)")
        draws = np.random.default_rng(rng).dirichlet(a, size=n_samples)
        return np.bincount(draws.argmax(axis=1), minlength=k) / n_samples
    if method != "exact":
        raise UsageError(f"method must be 'exact' or 'sampling'; got {method!r}")
    if k == 2:
        xp1 = stats.beta.sf(0.5, a[0], a[1])
        return np.array([xp1, 1.0 - xp1])
    xp = np.empty(k)
    for i in range(k):
        others = np.delete(a, i)

        def integrand(g: float, i: int = i, others: np.ndarray = others) -> float:
            # Gamma(a, 1) density times the product of the others' CDFs (regularised gammainc)
            with np.errstate(divide="ignore"):
                log_f = (a[i] - 1.0) * np.log(g) - g - gammaln(a[i]) + np.log(gammainc(others, g)).sum()
            return float(np.exp(log_f))

        lo, hi = stats.gamma.ppf(1e-15, a[i]), stats.gamma.isf(1e-15, a[i])
        mode = max(a[i] - 1.0, lo)
        xp[i] = integrate.quad(integrand, lo, hi, points=[mode], limit=200, epsabs=1e-12)[0]
    return xp


def _free_energy(lme: np.ndarray, alpha0: np.ndarray, alpha: np.ndarray, g: np.ndarray) -> float:
    """Return the variational free energy F1 of the RFX model (Stephan et al., 2009, eq. 7-14).

    F = sum_nk g_nk (L_nk + E[log r_k]) - sum_nk g_nk log g_nk
        + E[log Dir(r | alpha0)] - E[log Dir(r | alpha)],  E[log r_k] = psi(a_k) - psi(sum a).
    """
    elogr = digamma(alpha) - digamma(alpha.sum())
    fit = np.where(g > 0, g * (np.where(np.isneginf(lme), 0.0, lme) + elogr), 0.0).sum()
    entropy = -xlogy(g, g).sum()

    def e_log_dir(a: np.ndarray) -> float:
        return gammaln(a.sum()) - gammaln(a).sum() + ((a - 1.0) * elogr).sum()

    return float(fit + entropy + e_log_dir(alpha0) - e_log_dir(alpha))


def rfx_bms(log_evidence: np.ndarray, alpha0: float | np.ndarray = 1.0, *, tol: float = 1e-10,
            max_iter: int = 10_000, exceedance_method: str = "exact", n_samples: int = 100_000,
            rng: np.random.Generator | int | None = None) -> BMSResult:
    """Return the variational random-effects model-selection posterior for log evidence (N subjects, K models).

    Variational Bayes of Stephan et al. (2009): iterate
    u_nk = exp(L_nk + psi(a_k) - psi(sum a)), g_nk = u_nk / sum_k u_nk,
    a = alpha0 + sum_n g_n  until max |delta a| < tol. Then expected frequencies
    a / sum a, exceedance probabilities (:func:`exceedance_prob`), and after
    Rigoux et al. (2014) the Bayesian omnibus risk BOR = 1 / (1 + exp(F1 - F0)),
    with F1 the free energy of the RFX model and F0 = sum_n log sum_k r0_k e^{L_nk}
    the exact log evidence of the null that frequencies are fixed at the prior
    mean r0 = alpha0 / sum alpha0 (all models equally frequent for a uniform
    alpha0), and pxp = (1 - BOR) xp + BOR / K.

    With one model, xp = pxp = 1 and BOR is NaN (there is nothing to compare).

    Parameters
    ----------
    log_evidence : numpy.ndarray, shape (N, K)
        L in nats (e.g. -BIC/2); -inf means the model cannot produce that
        subject's data.
    alpha0 : float or numpy.ndarray, default 1
        The Dirichlet prior.
    tol, max_iter : float and int, default 1e-10 and 10000
    exceedance_method, n_samples, rng
        Passed to :func:`exceedance_prob`.

    Returns
    -------
    BMSResult

    Raises
    ------
    UsageError
        For evidence with NaN or +inf, a subject no model can explain, or an invalid prior.

    References
    ----------
    Stephan, K. E., Penny, W. D., Daunizeau, J., Moran, R. J., & Friston,
    K. J. (2009). Bayesian model selection for group studies. NeuroImage 46,
    1004-1017.
    Rigoux, L., Stephan, K. E., Friston, K. J., & Daunizeau, J. (2014).
    Bayesian model selection for group studies - revisited. NeuroImage 84,
    971-985.
    """
    lme = _check_evidence(log_evidence)
    n, k = lme.shape
    a0 = _prior(alpha0, k)
    alpha = a0.copy()
    converged = False
    n_iter = 0
    for n_iter in range(1, max_iter + 1):
        g = softmax(lme + (digamma(alpha) - digamma(alpha.sum())), axis=1)
        new = a0 + g.sum(axis=0)
        change = np.max(np.abs(new - alpha))
        alpha = new
        if change < tol:
            converged = True
            break
    g = softmax(lme + (digamma(alpha) - digamma(alpha.sum())), axis=1)
    f1 = _free_energy(lme, a0, alpha, g)
    f0 = _null_log_evidence(lme, a0)
    xp = exceedance_prob(alpha, method=exceedance_method, n_samples=n_samples, rng=rng)
    bor, pxp = _omnibus(f1, f0, xp)
    return BMSResult(alpha0=a0, alpha=alpha, expected_freq=alpha / alpha.sum(), exceedance=xp,
                     protected_exceedance=pxp, bor=bor, posterior=g, free_energy=f1,
                     null_log_evidence=f0, n_iter=n_iter, converged=converged)


# --------------------------------------------------------------------------- Gibbs sampler


def _log_dirichlet(r: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Return ln Dir(r | a) for r (K,) and parameters a (..., K)."""
    return gammaln(a.sum(axis=-1)) - gammaln(a).sum(axis=-1) + ((a - 1.0) * np.log(r)).sum(axis=-1)


def _gibbs_result(lme: np.ndarray, a0: np.ndarray, members: Sequence[Sequence[int]],
                  rng: np.random.Generator | int | None, n_chains: int, n_draws: int, burn_in: int,
                  max_draws: int) -> GibbsBMSResult:
    if rng is None:
        raise UsageError("the Gibbs sampler needs rng (a numpy Generator or a seed)")
    if n_chains < 2 or n_draws < 4 or burn_in < 0 or max_draws < n_draws:
        raise UsageError(f"need n_chains >= 2, n_draws >= 4, burn_in >= 0 and max_draws >= n_draws; "
                         f"got {n_chains}, {n_draws}, {burn_in}, {max_draws}")
    n, k = lme.shape
    rng = np.random.default_rng(rng)
    rs, counts, assigned, rhat, ess = sample_frequencies(lme, a0, members, rng, n_chains, n_draws, burn_in,
                                                        max_draws)
    draws = rs.reshape(-1, k)
    post_a = (a0 + counts).reshape(-1, k)
    alpha = post_a.mean(axis=0)
    freq = alpha / alpha.sum()
    xp = np.bincount(draws.argmax(axis=1), minlength=k) / len(draws) if k > 1 else np.ones(1)
    # Chib (1995): ln p(L) = ln p(L | r*) + ln p(r*) - ln p(r* | L), the posterior
    # ordinate Rao-Blackwellised as the mean over draws of Dir(r* | alpha0 + c).
    ordinate = logsumexp(_log_dirichlet(freq, post_a)) - np.log(len(post_a))
    log_ev = float(logsumexp(lme + np.log(freq), axis=1).sum() + _log_dirichlet(freq, a0) - ordinate)
    f0 = _null_log_evidence(lme, a0)
    bor, pxp = _omnibus(log_ev, f0, xp)
    return GibbsBMSResult(alpha0=a0, alpha=alpha, draws=draws, expected_freq=freq, exceedance=xp,
                          protected_exceedance=pxp, bor=bor, posterior=assigned, log_evidence=log_ev,
                          null_log_evidence=f0, rhat=rhat, ess=ess, n_chains=n_chains,
                          n_draws=rs.shape[1],
                          converged=bool(rhat.max() < RHAT_MAX and ess.min() >= ESS_MIN))


def rfx_gibbs(log_evidence: np.ndarray, alpha0: float | np.ndarray = 1.0, *,
              rng: np.random.Generator | int | None, n_chains: int = 4, n_draws: int = 500,
              burn_in: int = 100, max_draws: int = 16_000) -> GibbsBMSResult:
    """Return the random-effects model-selection posterior sampled by Gibbs (Penny et al., 2010).

    Alternates m_n | r ~ Categorical(r_k e^{L_nk} / sum_j r_j e^{L_nj}) for
    every subject and r | m ~ Dirichlet(alpha0 + counts of m), in
    ``n_chains`` parallel chains from ``rng`` (a Generator or a seed; needed),
    keeping ``n_draws`` per chain after ``burn_in`` sweeps, doubled up to
    ``max_draws`` until every model frequency has R-hat < :data:`RHAT_MAX`
    and ESS >= :data:`ESS_MIN`. The BOR uses Chib's (1995) estimate of the
    log evidence of the random-effects model in place of the variational
    bound.

    Parameters
    ----------
    log_evidence : numpy.ndarray, shape (N, K)
    alpha0 : float or numpy.ndarray, default 1
    rng : numpy.random.Generator or int
        The sampler's random stream (needed).
    n_chains, n_draws, burn_in, max_draws : int, default 4, 500, 100, 16000

    Returns
    -------
    GibbsBMSResult

    Raises
    ------
    UsageError
        For invalid evidence, prior or counts, or no ``rng``.

    References
    ----------
    Penny, W. D., Stephan, K. E., Daunizeau, J., et al. (2010). Comparing
    families of dynamic causal models. PLoS Comput. Biol. 6, e1000709.
    Chib, S. (1995). Marginal likelihood from the Gibbs output. JASA 90, 1313-1321.
    """
    lme = _check_evidence(log_evidence)
    k = lme.shape[1]
    a0 = _prior(alpha0, k)
    return _gibbs_result(lme, a0, [(i,) for i in range(k)], rng, n_chains, n_draws, burn_in, max_draws)


# --------------------------------------------------------------------------- families

FAMILY_METHODS = ("gibbs", "variational")


def family_bms(log_evidence: np.ndarray, families: Mapping[str, Sequence[int | str]],
               model_ids: Sequence[str] | None = None, *, alpha0: float = 1.0, method: str = "gibbs",
               rng: np.random.Generator | int | None = None, **options) -> FamilyBMSResult:
    """Return the family-level random-effects selection posterior (Penny et al., 2010).

    ``families`` maps a family name to its models, as column indices or as
    model ids (then ``model_ids`` names the columns); the families must
    partition the models. The model-level prior spreads each family's prior
    mass ``alpha0`` uniformly over its N_f members (a_k = alpha0 / N_f), so
    every family gets the same prior. The family frequency is the sum of its
    members' frequencies.

    ``method="gibbs"`` (default): :func:`rfx_gibbs` (``rng`` needed), family
    frequencies summed per draw, exceedance the fraction of draws in which a
    family is the most frequent; convergence is judged on the family
    frequencies. ``method="variational"``: :func:`rfx_bms`, the family
    posterior the Dirichlet with a_f = sum_{k in f} a_k. The variational
    posterior can be badly wrong when models tie: with one model against
    four and the same evidence for every model and subject the exact family
    posterior is the prior (frequencies 1/2, 1/2), whereas the variational
    fixed point piles the frequency on the singleton family.

    The omnibus risk compares with the null that every model has its prior
    mean frequency (families equally frequent, models equally frequent within
    a family); pxp = (1 - BOR) xp + BOR / F.

    Parameters
    ----------
    log_evidence : numpy.ndarray, shape (N, K)
    families : mapping of str to sequence of int or str
        Family name -> its models, as column indices or model ids.
    model_ids : sequence of str, optional
        The columns' model ids.
    alpha0 : float, default 1
        Each family's prior mass.
    method, rng : str, numpy.random.Generator or int
        "gibbs" (default; ``rng`` needed) or "variational".
    **options
        Passed to :func:`rfx_gibbs` or :func:`rfx_bms`.

    Returns
    -------
    FamilyBMSResult

    Raises
    ------
    UsageError
        When the families do not partition the models, or for an unknown method.

    References
    ----------
    Penny, W. D., Stephan, K. E., Daunizeau, J., et al. (2010). Comparing
    families of dynamic causal models. PLoS Comput. Biol. 6, e1000709.
    Rigoux, L., Stephan, K. E., Friston, K. J., & Daunizeau, J. (2014).
    Bayesian model selection for group studies - revisited. NeuroImage 84,
    971-985.
    """
    lme = _check_evidence(log_evidence)
    k = lme.shape[1]
    if method not in FAMILY_METHODS:
        raise UsageError(f"method must be one of {FAMILY_METHODS}; got {method!r}")
    members = _family_members(families, model_ids, k)
    _prior(alpha0, 1)
    a0 = np.empty(k)
    for cols in members:
        a0[list(cols)] = alpha0 / len(cols)
    n_fam = len(members)
    if method == "gibbs":
        res = _gibbs_result(lme, a0, members, rng, options.get("n_chains", 4),
                            options.get("n_draws", 500), options.get("burn_in", 100),
                            options.get("max_draws", 16_000))
        draws = np.stack([res.draws[:, list(cols)].sum(axis=1) for cols in members], axis=1)
        xp = np.bincount(draws.argmax(axis=1), minlength=n_fam) / len(draws) if n_fam > 1 else np.ones(1)
        log_ev = res.log_evidence
    else:
        res = rfx_bms(lme, a0, rng=rng, **options)
        draws = None
        log_ev = res.free_energy
    fam_alpha = np.array([res.alpha[list(cols)].sum() for cols in members])
    if method == "variational":
        xp = exceedance_prob(fam_alpha, method=options.get("exceedance_method", "exact"),
                             n_samples=options.get("n_samples", 100_000), rng=rng)
    bor, pxp = _omnibus(log_ev, res.null_log_evidence, xp)
    return FamilyBMSResult(families=tuple(families), members=tuple(members), alpha=fam_alpha,
                           expected_freq=fam_alpha / fam_alpha.sum(), exceedance=xp,
                           protected_exceedance=pxp, bor=bor, draws=draws, models=res)


def _family_members(families: Mapping[str, Sequence[int | str]], model_ids: Sequence[str] | None,
                    k: int) -> list[tuple[int, ...]]:
    """Return each family's model columns, checking that the families partition the k models."""
    index = {m: i for i, m in enumerate(model_ids)} if model_ids is not None else {}
    if model_ids is not None and len(index) != k:
        raise UsageError(f"model_ids must name the {k} columns once each; got {list(model_ids)}")
    members = []
    for name, models in families.items():
        try:
            cols = tuple(index[m] if isinstance(m, str) else int(m) for m in models)
        except KeyError as err:
            raise UsageError(f"family {name!r} names an unknown model {err.args[0]!r}") from None
        if not cols:
            raise UsageError(f"family {name!r} has no models")
        members.append(cols)
    if sorted(c for cols in members for c in cols) != list(range(k)):
        raise UsageError(f"families must partition the {k} models (each in exactly one family); "
                         f"got {dict(zip(families, members))}")
    return members


def family_evidence(log_evidence: np.ndarray, members: Sequence[Sequence[int]]) -> np.ndarray:
    """Return (N, F) family log evidence: ln of the mean of e^L over each family's models.

    L_nf = ln sum_{k in f} e^{L_nk} - ln |f|, the evidence of family f under a
    uniform prior over its members (Penny et al., 2010).

    Parameters
    ----------
    log_evidence : numpy.ndarray, shape (N, K)
        Log evidence in nats.
    members : sequence of sequence of int
        Each family's model columns.

    Returns
    -------
    numpy.ndarray, shape (N, F)

    Examples
    --------
    >>> np.exp(family_evidence(np.log([[1.0, 3.0, 2.0]]), [[0, 1], [2]])).round(6).tolist()
    [[2.0, 2.0]]
    """
    lme = np.asarray(log_evidence, dtype=float)
    return np.column_stack([logsumexp(lme[:, list(cols)], axis=1) - np.log(len(cols)) for cols in members])


def groups_differ(log_evidence: np.ndarray, reference_evidence: np.ndarray) -> tuple[float, float]:
    """Return (posterior probability that two groups' model frequencies differ, log Bayes factor in nats).

    Under "differ" each group has its own frequencies, log p(y | differ) =
    F(group) + F(reference); under "same" one set of frequencies generates
    both, log p(y | same) = F(pooled); F is the free energy of
    :func:`rfx_bms`. With equal prior odds, P(differ | y) =
    1 / (1 + exp(F(pooled) - F(group) - F(reference))).

    Parameters
    ----------
    log_evidence, reference_evidence : numpy.ndarray, shape (N_g, K) and (N_r, K)
        The two groups' log evidence over the same K models.

    Returns
    -------
    (float, float)

    Raises
    ------
    UsageError
        When the arrays are not (participants, models) with the same models.

    References
    ----------
    Rigoux, L., Stephan, K. E., Friston, K. J., & Daunizeau, J. (2014).
    Bayesian model selection for group studies - revisited. NeuroImage 84,
    971-985.
    """
    a, b = np.asarray(log_evidence, float), np.asarray(reference_evidence, float)
    if a.ndim != 2 or b.ndim != 2 or a.shape[1] != b.shape[1]:
        raise UsageError(f"the two groups' log evidence must be (participants, models) with the same "
                         f"models; got shapes {a.shape} and {b.shape}")
    log_bf = rfx_bms(a).free_energy + rfx_bms(b).free_energy - rfx_bms(np.vstack([a, b])).free_energy
    return float(expit(log_bf)), float(log_bf)
