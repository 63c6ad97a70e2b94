"""The Gibbs sampler of the random-effects model-selection posterior (numpy streams, compiled sweeps)."""

from __future__ import annotations

from collections.abc import Sequence

import numba
import numpy as np

from foretell.stats.convergence import ESS_MIN, RHAT_MAX, effective_sample_size, split_rhat


def sample_frequencies(lme: np.ndarray, a0: np.ndarray, members: Sequence[Sequence[int]], rng: np.random.Generator,
                       n_chains: int, n_draws: int, burn_in: int, max_draws: int
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return Gibbs draws of the model frequencies of random-effects model selection.

    One sweep: m_n ~ Categorical(r_k e^{L_nk} / sum_j r_j e^{L_nj}) for every
    subject (by its inverse CDF), then r ~ Dirichlet(alpha0 + counts of
    m), every chain alike; the noise is drawn from ``rng`` in chunks and the
    sweeps run compiled. After ``burn_in`` sweeps ``n_draws`` are
    kept, doubled until the monitored frequencies (sums of r over each of
    ``members``) reach R-hat < RHAT_MAX and ESS >= ESS_MIN, or ``max_draws``
    is reached.

    Parameters
    ----------
    lme : numpy.ndarray, shape (N, K)
        Log evidence in nats.
    a0 : numpy.ndarray, shape (K,)
        The Dirichlet prior.
    members : sequence of sequence of int
        The monitored sums of frequencies (one model each, or families).
    rng : numpy.random.Generator
    n_chains, n_draws, burn_in, max_draws : int

    Returns
    -------
    tuple of numpy.ndarray
        r draws (C, S, K), count draws (C, S, K), assignment frequencies
        (N, K), and the monitored quantities' R-hat and ESS.

    References
    ----------
    Penny, W. D., Stephan, K. E., Daunizeau, J., et al. (2010). Comparing
    families of dynamic causal models. PLoS Comput. Biol. 6, e1000709.
    """
    n, k = lme.shape
    shifted = lme - lme.max(axis=1, keepdims=True)
    assigned = np.zeros((n, k))
    start = rng.standard_gamma(a0, size=(n_chains, k)) + np.finfo(float).tiny
    r = start / start.sum(axis=1, keepdims=True)
    _run(shifted, a0, r, burn_in, rng, assigned, keep=False)
    r_draws, c_draws = _run(shifted, a0, r, n_draws, rng, assigned, keep=True)
    while True:
        monitored = np.stack([r_draws[:, :, list(cols)].sum(axis=2) for cols in members], axis=2)
        rhat, ess = split_rhat(monitored), effective_sample_size(monitored)
        drawn = r_draws.shape[1]
        if (rhat.max() < RHAT_MAX and ess.min() >= ESS_MIN) or drawn >= max_draws:
            break
        more_r, more_c = _run(shifted, a0, r, min(2 * drawn, max_draws) - drawn, rng, assigned, keep=True)
        r_draws, c_draws = np.concatenate([r_draws, more_r], axis=1), np.concatenate([c_draws, more_c], axis=1)
    return r_draws, c_draws, assigned / (n_chains * r_draws.shape[1]), rhat, ess


_CHUNK_VALUES = 2_000_000
"""Most random numbers drawn at once (sweeps x chains x subjects): 16 MB of each kind."""


def _run(shifted: np.ndarray, a0: np.ndarray, r: np.ndarray, sweeps: int, rng: np.random.Generator,
         assigned: np.ndarray, keep: bool) -> tuple[np.ndarray, np.ndarray]:
    """Return (r draws (C, S, K), count draws (C, S, K)) of ``sweeps`` sweeps from ``r`` (updated in place).

    The random numbers come from ``rng`` in chunks of sweeps; the sweeps
    themselves run compiled (:func:`_sweeps`).
    """
    c, k = r.shape
    n = shifted.shape[0]
    r_out, c_out = np.empty((sweeps, c, k)), np.empty((sweeps, c, k))
    chunk = max(1, _CHUNK_VALUES // (c * n))
    for first in range(0, sweeps, chunk):
        b = min(chunk, sweeps - first)
        _sweeps(shifted, r, rng.random((b, c, n)), rng.standard_exponential((b, c, n)),
                rng.standard_gamma(a0, size=(b, c, k)), assigned, r_out[first:first + b], c_out[first:first + b],
                keep)
    return r_out.transpose(1, 0, 2), c_out.transpose(1, 0, 2)


@numba.njit(cache=True)
def _sweeps(shifted, r, uniform, expo, gamma0, assigned, r_out, c_out, keep):  # pragma: no cover - compiled
    """Run one chunk of Gibbs sweeps on pre-drawn noise; see :func:`sample_frequencies`.

    m_n is the first k whose cumulative weight sum_{j<=k} r_j e^{L_nj}
    exceeds U_n times the total (inverse-CDF sampling, U_n uniform);
    r = g / sum g with g_k = Gamma(alpha0_k) + the sum of the Exp(1) draws of
    the subjects assigned to k: a Gamma(alpha0_k + count_k) draw, as a sum
    of independent gammas of one scale is one (common practice).
    """
    sweeps, chains, n = uniform.shape
    k = shifted.shape[1]
    weights = np.exp(shifted)
    for b in range(sweeps):
        for c in range(chains):
            g = gamma0[b, c].copy()
            counts = np.zeros(k)
            cumulative = np.empty(k)
            for i in range(n):
                total = 0.0
                for j in range(k):
                    total += r[c, j] * weights[i, j]
                    cumulative[j] = total
                target, arg = uniform[b, c, i] * total, k - 1
                for j in range(k):
                    if cumulative[j] > target:
                        arg = j
                        break
                g[arg] += expo[b, c, i]
                counts[arg] += 1.0
                if keep:
                    assigned[i, arg] += 1.0
            r[c] = g / g.sum()
            r_out[b, c] = r[c]
            c_out[b, c] = counts
