"""Convergence of Markov chains (pure numpy): split R-hat and the multi-chain effective sample size."""

from __future__ import annotations

import numpy as np

_CONSTANT = 1e-20
"""Within-chain variance below which a monitored quantity counts as constant (e.g. a family of every model)."""

RHAT_MAX = 1.01
"""Largest split R-hat of a reported frequency for a converged Gibbs run (Vehtari et al., 2021)."""

ESS_MIN = 400
"""Smallest effective sample size of a reported frequency for a converged Gibbs run (Vehtari et al., 2021)."""


def split_rhat(chains: np.ndarray) -> np.ndarray:
    """Return the split R-hat of each monitored quantity.

    Each chain is cut in halves; with W the mean within-half variance and B/n
    the variance of the half means, var+ = (n - 1) / n W + B / n and
    R-hat = sqrt(var+ / W). A constant quantity gives 1.

    Parameters
    ----------
    chains : numpy.ndarray, shape (n_chains, n_draws, Q)

    Returns
    -------
    numpy.ndarray, shape (Q,)

    References
    ----------
    Gelman, A., Carlin, J. B., Stern, H. S., et al. (2013). Bayesian Data
    Analysis, 3rd ed., ch. 11.
    """
    w, var_plus = _variances(_split(chains))
    with np.errstate(divide="ignore", invalid="ignore"):
        rhat = np.sqrt(var_plus / w)
    return np.where(w > _CONSTANT, rhat, 1.0)


def effective_sample_size(chains: np.ndarray) -> np.ndarray:
    """Return the effective sample size of each monitored quantity.

    The multi-chain estimate on split chains: rho_t = 1 - (W - mean_c
    acov_c(t)) / var+, summed over Geyer's initial positive sequence of pairs
    (rho_{2j} + rho_{2j+1} > 0, made monotone), tau = -1 + 2 sum of those
    pairs, ESS = M n / tau. A constant quantity gives M n.

    Parameters
    ----------
    chains : numpy.ndarray, shape (n_chains, n_draws, Q)

    Returns
    -------
    numpy.ndarray, shape (Q,)

    References
    ----------
    Gelman, A., Carlin, J. B., Stern, H. S., et al. (2013). Bayesian Data
    Analysis, 3rd ed., ch. 11.
    Geyer, C. J. (1992). Practical Markov chain Monte Carlo. Stat. Sci. 7, 473-483.
    """
    halves = _split(chains)
    m, n, q = halves.shape
    centred = halves - halves.mean(axis=1, keepdims=True)
    size = 1 << int(np.ceil(np.log2(2 * n)))
    spectrum = np.fft.rfft(centred, n=size, axis=1)
    acov = np.fft.irfft(spectrum * np.conj(spectrum), n=size, axis=1)[:, :n] / n  # (m, n, q)
    w, var_plus = _variances(halves)
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


def _variances(halves: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (W, var+) of split chains: the mean within-chain variance and (n - 1) / n W + B / n."""
    n = halves.shape[1]
    w = halves.var(axis=1, ddof=1).mean(axis=0)
    return w, (n - 1) / n * w + halves.mean(axis=1).var(axis=0, ddof=1)


def _split(chains: np.ndarray) -> np.ndarray:
    c = np.asarray(chains, dtype=float)
    half = c.shape[1] // 2
    return np.concatenate([c[:, :half], c[:, half: 2 * half]], axis=0)
