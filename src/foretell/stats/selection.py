"""Random-effects Bayesian model selection kernels: variational and Gibbs, models and families (pure numpy).

Every function takes a log-evidence matrix L (N subjects x K models, in nats,
e.g. -BIC/2) and returns a frozen result. The generative model (Stephan et
al., 2009): model frequencies r ~ Dirichlet(alpha0); each subject's model
m_n ~ Categorical(r); the subject's data given m_n = k have evidence e^{L_nk}.

- :func:`rfx_bms`: the variational posterior of Stephan et al. (2009), with the
  Bayesian omnibus risk and protected exceedance of Rigoux et al. (2014).
- :func:`rfx_gibbs`: the Gibbs sampler of Penny et al. (2010), which gives draws
  from the exact posterior of r (the variational posterior can be far from it
  when models tie, see :func:`family_bms`).
- :func:`family_bms`: family inference (Penny et al., 2010) by either method.
- :func:`exceedance_prob`: exceedance probabilities of a Dirichlet.

References
----------
Stephan, K. E., Penny, W. D., Daunizeau, J., Moran, R. J., & Friston, K. J.
(2009). Bayesian model selection for group studies. NeuroImage 46, 1004-1017.
Penny, W. D., Stephan, K. E., Daunizeau, J., et al. (2010). Comparing
families of dynamic causal models. PLoS Comput. Biol. 6, e1000709.
Rigoux, L., Stephan, K. E., Friston, K. J., & Daunizeau, J. (2014). Bayesian
model selection for group studies - revisited. NeuroImage 84, 971-985.
Chib, S. (1995). Marginal likelihood from the Gibbs output. JASA 90, 1313-1321.
Gelman, A., Carlin, J. B., Stern, H. S., et al. (2013). Bayesian Data
Analysis, 3rd ed., ch. 11 (split R-hat, effective sample size).
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B., & Buerkner, P.-C. (2021).
Rank-normalization, folding, and localization: an improved R-hat. Bayesian
Analysis 16, 667-718 (thresholds R-hat < 1.01, ESS > 400).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
from scipy import integrate, stats
from scipy.special import digamma, gammainc, gammaln, logsumexp, softmax, xlogy

from ..errors import UsageError

_CONSTANT = 1e-20
"""Within-chain variance below which a monitored quantity counts as constant (e.g. a family of every model)."""

RHAT_MAX = 1.01
"""Largest split R-hat of a reported frequency for a converged Gibbs run (Vehtari et al., 2021)."""

ESS_MIN = 400
"""Smallest effective sample size of a reported frequency for a converged Gibbs run (Vehtari et al., 2021)."""


@dataclass(frozen=True)
class BMSResult:
    """Variational posterior of random-effects model selection over K models (Stephan et al., 2009).

    ``alpha`` is the Dirichlet posterior over model frequencies,
    ``expected_freq`` = alpha / sum(alpha), ``exceedance`` the probability
    that each model is more frequent than every other, ``bor`` the Bayesian
    omnibus risk, ``protected_exceedance`` = (1 - bor) * exceedance + bor / K,
    ``posterior`` (N, K) the probability that subject n's data came from
    model k, ``free_energy`` (F1, a lower bound on the log evidence of the
    random-effects model) and ``null_log_evidence`` (F0) in nats, ``n_iter``
    and ``converged`` describe the variational iterations.
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
    """Gibbs-sampled posterior of random-effects model selection over K models (Penny et al., 2010).

    ``draws`` (n_chains * n_draws, K) are draws of the model frequencies r
    from the exact posterior; ``expected_freq`` is E[r | L], Rao-Blackwellised:
    the mean over draws of (alpha0 + c) / (sum alpha0 + N), c the sampled
    assignment counts; ``alpha`` = alpha0 + E[c] (so ``expected_freq`` =
    alpha / sum alpha; the posterior itself is not a Dirichlet);
    ``exceedance`` the fraction of draws in which each model is the most
    frequent; ``log_evidence`` Chib's (1995) estimate of the log evidence of
    the random-effects model; ``null_log_evidence`` F0 and ``bor`` = 1 / (1 +
    exp(log_evidence - F0)) as in Rigoux et al. (2014), ``protected_exceedance``
    = (1 - bor) * exceedance + bor / K; ``posterior`` (N, K) the fraction of
    draws assigning subject n to model k. ``rhat`` and ``ess`` are the split
    R-hat and effective sample size of each monitored frequency (the models'
    here, the families' in a family result); ``converged`` is max rhat <
    :data:`RHAT_MAX` and min ess >= :data:`ESS_MIN`; ``n_draws`` is per chain.
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
    """Posterior of family-level random-effects selection (Penny et al., 2010).

    ``families`` names the families in the order of the arrays; ``members``
    gives each family's model columns; ``alpha`` is the sum of its models'
    ``alpha`` (for the variational method the family Dirichlet posterior, by
    the aggregation property of the Dirichlet); ``expected_freq``,
    ``exceedance``, ``bor`` and ``protected_exceedance`` = (1 - bor) * xp +
    bor / F are at the family level; ``draws`` (Gibbs only, else None) are
    draws of the family frequencies (the sum of the member frequencies of
    each draw); ``models`` is the underlying model-level result, fitted with
    the family-balanced prior; ``method`` and ``converged`` are those of
    ``models``.
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
    which model k is the largest, from ``rng`` (a Generator or a seed; needed).
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

    ``L`` is in nats (e.g. -BIC/2). An entry -inf means the model cannot produce
    that subject's data. With one model, xp = pxp = 1 and BOR is NaN (there is
    nothing to compare).
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


def split_rhat(chains: np.ndarray) -> np.ndarray:
    """Return the split R-hat of each column of ``chains`` (n_chains, n_draws, Q) (Gelman et al., 2013).

    Each chain is cut in halves; with W the mean within-half variance and B/n
    the variance of the half means, var+ = (n - 1) / n W + B / n and
    R-hat = sqrt(var+ / W). A constant column gives 1.
    """
    halves = _split(chains)
    n = halves.shape[1]
    w = halves.var(axis=1, ddof=1).mean(axis=0)
    b_over_n = halves.mean(axis=1).var(axis=0, ddof=1)
    var_plus = (n - 1) / n * w + b_over_n
    with np.errstate(divide="ignore", invalid="ignore"):
        rhat = np.sqrt(var_plus / w)
    return np.where(w > _CONSTANT, rhat, 1.0)


def effective_sample_size(chains: np.ndarray) -> np.ndarray:
    """Return the effective sample size of each column of ``chains`` (n_chains, n_draws, Q).

    Multi-chain estimate of Gelman et al. (2013, ch. 11) on split chains:
    rho_t = 1 - (W - mean_c acov_c(t)) / var+, summed over Geyer's initial
    positive sequence of pairs (rho_{2j} + rho_{2j+1} > 0), tau = -1 + 2 sum
    of those pairs, ESS = M n / tau. A constant column gives M n.
    """
    halves = _split(chains)
    m, n, q = halves.shape
    centred = halves - halves.mean(axis=1, keepdims=True)
    size = 1 << int(np.ceil(np.log2(2 * n)))
    spectrum = np.fft.rfft(centred, n=size, axis=1)
    acov = np.fft.irfft(spectrum * np.conj(spectrum), n=size, axis=1)[:, :n] / n  # (m, n, q)
    w = halves.var(axis=1, ddof=1).mean(axis=0)
    var_plus = (n - 1) / n * w + halves.mean(axis=1).var(axis=0, ddof=1)
    ess = np.full(q, float(m * n))
    for j in np.flatnonzero(w > _CONSTANT):
        rho = 1.0 - (w[j] - acov[:, :, j].mean(axis=0)) / var_plus[j]
        rho[0] = 1.0
        pairs = rho[: n - n % 2].reshape(-1, 2).sum(axis=1)
        stop = np.flatnonzero(pairs <= 0)
        pairs = pairs[: stop[0] if stop.size else pairs.size]
        pairs = np.minimum.accumulate(pairs)  # Geyer's initial monotone sequence
        tau = -1.0 + 2.0 * pairs.sum()
        ess[j] = m * n / max(tau, 1.0 / np.log10(m * n))
    return ess


def _split(chains: np.ndarray) -> np.ndarray:
    c = np.asarray(chains, dtype=float)
    half = c.shape[1] // 2
    return np.concatenate([c[:, :half], c[:, half: 2 * half]], axis=0)


def _gibbs(lme: np.ndarray, a0: np.ndarray, members: Sequence[Sequence[int]], rng: np.random.Generator,
           n_chains: int, n_draws: int, burn_in: int, max_draws: int):
    """Return (r draws (C, S, K), count draws (C, S, K), assignment frequencies (N, K), rhat, ess).

    One sweep (Penny et al., 2010): m_n ~ Categorical(r_k e^{L_nk} / sum_j r_j e^{L_nj})
    for every subject (Gumbel-max), then r ~ Dirichlet(alpha0 + counts of m).
    The chains run in parallel; after ``burn_in`` sweeps ``n_draws`` are kept,
    doubled until the monitored frequencies (sums of r over each of ``members``)
    reach R-hat < RHAT_MAX and ESS >= ESS_MIN, or ``max_draws`` is reached.
    """
    n, k = lme.shape
    shifted = lme - lme.max(axis=1, keepdims=True)
    tiny = np.finfo(float).tiny
    chain_offset = (np.arange(n_chains) * k)[:, None]
    subject_offset = np.arange(n) * k
    assigned = np.zeros(n * k)

    def sweep(r: np.ndarray, keep: bool) -> tuple[np.ndarray, np.ndarray]:
        logits = shifted[None] + np.log(np.maximum(r, tiny))[:, None, :]
        m = np.argmax(logits + rng.gumbel(size=logits.shape), axis=2)
        counts = np.bincount((m + chain_offset).ravel(), minlength=n_chains * k).reshape(n_chains, k)
        if keep:
            assigned[:] += np.bincount((m + subject_offset).ravel(), minlength=n * k)
        g = rng.standard_gamma(a0 + counts)
        return g / g.sum(axis=1, keepdims=True), counts

    start = rng.standard_gamma(a0, size=(n_chains, k)) + tiny
    r = start / start.sum(axis=1, keepdims=True)
    for _ in range(burn_in):
        r, _counts = sweep(r, False)
    r_draws, c_draws = [], []
    target = n_draws
    while True:
        for _ in range(target - len(r_draws)):
            r, counts = sweep(r, True)
            r_draws.append(r)
            c_draws.append(counts)
        rs = np.stack(r_draws, axis=1)
        monitored = np.stack([rs[:, :, list(cols)].sum(axis=2) for cols in members], axis=2)
        rhat, ess = split_rhat(monitored), effective_sample_size(monitored)
        if (rhat.max() < RHAT_MAX and ess.min() >= ESS_MIN) or target >= max_draws:
            break
        target = min(2 * target, max_draws)
    return rs, np.stack(c_draws, axis=1), assigned.reshape(n, k) / (n_chains * len(r_draws)), rhat, ess


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
    rs, counts, assigned, rhat, ess = _gibbs(lme, a0, members, rng, n_chains, n_draws, burn_in, max_draws)
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
    bound. See :class:`GibbsBMSResult`.
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
    a family); pxp = (1 - BOR) xp + BOR / F. ``options`` go to :func:`rfx_gibbs`
    or :func:`rfx_bms`.
    """
    lme = _check_evidence(log_evidence)
    k = lme.shape[1]
    if method not in FAMILY_METHODS:
        raise UsageError(f"method must be one of {FAMILY_METHODS}; got {method!r}")
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
    flat = sorted(c for cols in members for c in cols)
    if flat != list(range(k)):
        raise UsageError(f"families must partition the {k} models (each in exactly one family); "
                         f"got {dict(zip(families, members))}")
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
