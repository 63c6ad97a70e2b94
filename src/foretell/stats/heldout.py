"""Choosing among candidate designs on held-out units, and a moving-block bootstrap that repeats the choice."""

from __future__ import annotations

import math

import numpy as np


def unit_sums(X: np.ndarray, y: np.ndarray, unit: np.ndarray, n_units: int,
              weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return the per-unit sums (X'X, X'y, y'y, n) of candidate designs over the same trials.

    Parameters
    ----------
    X : numpy.ndarray, shape (C, n, q)
        One design per candidate.
    y : numpy.ndarray, shape (n,)
    unit : numpy.ndarray of int, shape (n,)
        Each trial's unit, 0..n_units-1.
    n_units : int
    weights : numpy.ndarray, shape (B, n), optional
        How often each trial counts in each of B resamples (a leading axis B
        is then added to every output).

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, numpy.ndarray, numpy.ndarray)
        Shapes ([B,] C, U, q, q), ([B,] C, U, q), ([B,] U,), ([B,] U,).
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    C, n, q = X.shape
    onehot = np.zeros((n_units, n))
    onehot[np.asarray(unit, dtype=np.int64), np.arange(n)] = 1.0
    w = onehot if weights is None else weights[:, None, :] * onehot  # ([B,] U, n)
    per_trial = np.concatenate([(X[..., :, None] * X[..., None, :]).reshape(C, n, q * q),
                                X * y[:, None]], axis=2)  # (C, n, q*q + q)
    flat = per_trial.transpose(1, 0, 2).reshape(n, -1)
    sums = (w.reshape(-1, n) @ flat).reshape(*w.shape[:-1], C, q * q + q)
    sums = np.moveaxis(sums, -2, -3)  # ([B,] C, U, q*q + q)
    G = sums[..., : q * q].reshape(*sums.shape[:-1], q, q)
    h = sums[..., q * q:]
    return G, h, w @ (y * y), w.sum(axis=-1)


def held_out_loglik(G: np.ndarray, h: np.ndarray, yy: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Return each candidate's leave-one-unit-out Gaussian log predictive density, summed over units.

    Unit u is predicted from the least-squares fit on every other unit:
    beta = (G - G_u)^-1 (h - h_u), sigma^2 = RSS_-u / n_-u, and its trials
    score -n_u/2 log(2 pi sigma^2) - RSS_u(beta) / (2 sigma^2), RSS(beta) =
    y'y - 2 beta'X'y + beta'X'X beta from the unit's sums (common practice
    for cross-validated linear models; Stone, 1974).

    Parameters
    ----------
    G, h, yy, n
        :func:`unit_sums` (any leading axes before the candidate axis).

    Returns
    -------
    numpy.ndarray, shape ([B,] C)
        -inf for a candidate whose training fit leaves no residual variance.

    References
    ----------
    Stone, M. (1974). Cross-validatory choice and assessment of statistical
    predictions. J. R. Stat. Soc. B 36, 111-147.
    """
    yy_c = yy[..., None, :]
    n_c = n[..., None, :]
    G_tr = G.sum(axis=-3, keepdims=True) - G
    h_tr = h.sum(axis=-2, keepdims=True) - h
    yy_tr = yy_c.sum(axis=-1, keepdims=True) - yy_c
    n_tr = n_c.sum(axis=-1, keepdims=True) - n_c
    beta = _solve(G_tr, h_tr)
    rss_tr = yy_tr - 2.0 * (beta * h_tr).sum(-1) + np.einsum("...i,...ij,...j->...", beta, G_tr, beta)
    rss_u = yy_c - 2.0 * (beta * h).sum(-1) + np.einsum("...i,...ij,...j->...", beta, G, beta)
    with np.errstate(divide="ignore", invalid="ignore"):
        var = rss_tr / n_tr
        lpd = -0.5 * n_c * np.log(2.0 * math.pi * var) - rss_u / (2.0 * var)
    lpd = np.where((n_c > 0) & (var > 0), lpd, np.where(n_c > 0, -np.inf, 0.0))
    return lpd.sum(axis=-1)


def _solve(G: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Return G^-1 h for stacks of Gram matrices; the pseudo-inverse where one is singular."""
    try:
        return np.linalg.solve(G, h[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return (np.linalg.pinv(G, hermitian=True) @ h[..., None])[..., 0]


def moving_blocks(n: int, length: int, replicates: int, rng: np.random.Generator) -> np.ndarray:
    """Return how often each of n trials is drawn in each moving-block bootstrap resample.

    Each resample joins ceil(n / length) blocks of ``length`` consecutive
    trials starting at uniform positions 0..n-length, cut to n trials.
    Blocks keep the dependence between neighbouring trials; with a block
    length equal to the Bartlett bandwidth the bootstrap variance of a mean
    is, to first order, the Bartlett-kernel (Newey-West) estimate (Künsch,
    1989).

    Parameters
    ----------
    n, length, replicates : int
        Trials, block length (clipped to 1..n), resamples.
    rng : numpy.random.Generator

    Returns
    -------
    numpy.ndarray, shape (replicates, n)
        Counts summing to n in every row.

    References
    ----------
    Künsch, H. R. (1989). The jackknife and the bootstrap for general
    stationary observations. Ann. Stat. 17, 1217-1241.
    """
    length = int(min(max(length, 1), n))
    k = -(-n // length)
    starts = rng.integers(0, n - length + 1, size=(replicates, k))
    index = (starts[..., None] + np.arange(length)).reshape(replicates, -1)[:, :n]
    counts = np.zeros((replicates, n))
    np.add.at(counts, (np.repeat(np.arange(replicates), n), index.ravel()), 1.0)
    return counts


def selection_bootstrap(X: np.ndarray, y: np.ndarray, unit: np.ndarray, length: int, replicates: int,
                        rng: np.random.Generator, coefficient: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Return (the coefficient, the candidate chosen) in moving-block resamples that repeat the choice.

    In every resample (:func:`moving_blocks`) the candidate is chosen again
    by :func:`held_out_loglik` and the coefficient estimated by least
    squares on the whole resample with that candidate: the spread of the
    result includes the variability of the choice, which an interval at the
    chosen candidate alone ignores (Efron, 2014).

    Parameters
    ----------
    X : numpy.ndarray, shape (C, n, q)
        Candidate designs (with unit effects already removed, e.g. the trials
        centred within their unit).
    y : numpy.ndarray, shape (n,)
    unit : numpy.ndarray of int, shape (n,)
    length, replicates : int
        Block length and resamples.
    rng : numpy.random.Generator
    coefficient : int, default 0
        The column whose coefficient is returned.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Shapes (replicates,): the coefficients and the chosen candidates.

    References
    ----------
    Efron, B. (2014). Estimation and accuracy after model selection. JASA
    109, 991-1007.
    """
    unit = np.asarray(unit, dtype=np.int64)
    weights = moving_blocks(len(y), length, replicates, rng)
    G, h, yy, n = unit_sums(X, y, unit, int(unit.max()) + 1, weights)
    chosen = np.argmax(held_out_loglik(G, h, yy, n), axis=1)
    rows = np.arange(replicates)
    beta = _solve(G[rows, chosen].sum(axis=1), h[rows, chosen].sum(axis=1))
    return beta[:, coefficient], chosen
