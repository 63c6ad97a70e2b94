"""The Gibbs sampler of the random-effects model-selection posterior (pure numpy)."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from foretell.stats.convergence import ESS_MIN, RHAT_MAX, effective_sample_size, split_rhat


def sample_frequencies(lme: np.ndarray, a0: np.ndarray, members: Sequence[Sequence[int]], rng: np.random.Generator,
                       n_chains: int, n_draws: int, burn_in: int, max_draws: int
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return Gibbs draws of the model frequencies of random-effects model selection.

    One sweep: m_n ~ Categorical(r_k e^{L_nk} / sum_j r_j e^{L_nj}) for every
    subject (by the Gumbel-max trick), then r ~ Dirichlet(alpha0 + counts of
    m). The chains run in parallel; after ``burn_in`` sweeps ``n_draws`` are
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
