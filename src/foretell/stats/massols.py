"""Mass-univariate least squares: one design shared by every channel x time point, and its held-out score."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class OLSMaps:
    """Least-squares fits of many responses on one design.

    Attributes
    ----------
    beta, se, t : numpy.ndarray, shape (p, n_features)
        Coefficients, standard errors and t values (beta / se; 0 where se = 0).
    sse : numpy.ndarray, shape (n_features,)
        Residual sums of squares.
    df : int
        Residual degrees of freedom n - p.
    """

    beta: np.ndarray
    se: np.ndarray
    t: np.ndarray
    sse: np.ndarray
    df: int


@dataclass(frozen=True)
class FoldSums:
    """The sufficient statistics of least squares per fold: what every fit of one design and data needs.

    Attributes
    ----------
    gram : numpy.ndarray, shape (K, p, p)
        X_k'X_k per fold.
    cross : numpy.ndarray, shape (K, p, n_features)
        X_k'y_k per fold (responses centred per column).
    squares : numpy.ndarray, shape (K, n_features)
        y_k'y_k per fold (centred).
    counts : numpy.ndarray, shape (K,)
        Rows per fold.
    mean : numpy.ndarray, shape (n_features,)
        The column means taken out of the responses.
    """

    gram: np.ndarray
    cross: np.ndarray
    squares: np.ndarray
    counts: np.ndarray
    mean: np.ndarray


def centred_squares(y: np.ndarray, folds: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return (y less its column means, those means, per-fold sums of squares (K, n_features)).

    Shared by every design fitted to the same responses (:func:`fold_sums`).
    """
    y = np.asarray(y, dtype=float)
    mean = y.mean(axis=0)
    y = y - mean
    return y, mean, _membership(folds).T @ (y * y)


def _membership(folds: np.ndarray) -> np.ndarray:
    folds = np.asarray(folds)
    member = np.zeros((len(folds), int(folds.max()) + 1))
    member[np.arange(len(folds)), folds] = 1.0
    return member


def fold_sums(centred: tuple[np.ndarray, np.ndarray, np.ndarray], design: np.ndarray,
              folds: np.ndarray) -> FoldSums:
    """Return the :class:`FoldSums` of one design on responses prepared by :func:`centred_squares`.

    Parameters
    ----------
    centred : tuple
        :func:`centred_squares` of the responses (n, n_features) and ``folds``.
    design : numpy.ndarray, shape (n, p)
        First column the intercept (ones).
    folds : numpy.ndarray of int, shape (n,)
        Fold index 0..K-1 of each row (e.g. the block).

    Returns
    -------
    FoldSums
    """
    y, mean, squares = centred
    x = np.asarray(design, dtype=float)
    if not np.all(x[:, 0] == 1.0):
        raise ValueError("the design's first column must be the intercept (ones)")
    member = _membership(folds)
    n, p = x.shape
    k = member.shape[1]
    spread = (member[:, :, None] * x[:, None, :]).reshape(n, k * p)
    return FoldSums(gram=np.einsum("ik,ia,ib->kab", member, x, x), cross=(spread.T @ y).reshape(k, p, -1),
                    squares=squares, counts=member.sum(axis=0), mean=mean)


def ols_maps(sums: FoldSums) -> OLSMaps:
    """Return the OLS fit of every response column on the design, from its :class:`FoldSums`.

    beta = (X'X)^-1 X'y; sse = y'y - beta'X'y (responses centred, the
    intercept given back their mean); se_j = sqrt(sse / (n - p) [(X'X)^-1]_jj);
    t_j = beta_j / se_j.

    Parameters
    ----------
    sums : FoldSums

    Returns
    -------
    OLSMaps

    Raises
    ------
    ValueError
        When the design is rank deficient or has no residual degree of freedom.

    References
    ----------
    Hauk, O. et al. (2006). The time course of visual word recognition as revealed by linear
    regression analysis of ERP data. NeuroImage 30, 1383-1400.
    """
    gram, cross = sums.gram.sum(axis=0), sums.cross.sum(axis=0)
    n, p = int(sums.counts.sum()), gram.shape[0]
    if n <= p or np.linalg.matrix_rank(gram) < p:
        raise ValueError("the design is rank deficient (a regressor is constant or a copy of another), "
                         f"or has no more rows ({n}) than columns ({p})")
    inverse = np.linalg.inv(gram)
    beta = inverse @ cross
    sse = np.maximum(sums.squares.sum(axis=0) - np.einsum("ij,ij->j", beta, cross), 0.0)
    se = np.sqrt(sse / (n - p))[None, :] * np.sqrt(np.diag(inverse))[:, None]
    beta[0] += sums.mean
    t = np.divide(beta, se, out=np.zeros_like(beta), where=se > 0)
    return OLSMaps(beta=beta, se=se, t=t, sse=sse, df=n - p)


def heldout_loglik(sums: FoldSums) -> np.ndarray:
    """Return each fold's Gaussian held-out log-likelihood (nats), fitted on the other folds.

    For fold k: beta_k and sigma2_k = sse_k / (n_k - p) per column from the
    rows outside k; the score of fold k is the sum over its rows and the
    columns of log N(y; x beta_k, sigma2_k), computed from the per-fold sums
    alone (columns add as if independent: pass one column, e.g. a region's
    mean, when they are not).

    Parameters
    ----------
    sums : FoldSums

    Returns
    -------
    numpy.ndarray, shape (K,)
        NaN for a fold whose training rows leave the design rank deficient.

    References
    ----------
    Stone, M. (1974). Cross-validatory choice and assessment of statistical predictions.
    J. R. Stat. Soc. B 36, 111-147.
    """
    gram, cross, squares, counts = sums.gram, sums.cross, sums.squares, sums.counts
    n, p = counts.sum(), gram.shape[1]
    out = np.full(len(counts), np.nan)
    for k in range(len(counts)):
        n_train = n - counts[k]
        g = gram.sum(axis=0) - gram[k]
        if n_train <= p or np.linalg.matrix_rank(g) < p:
            continue
        c = cross.sum(axis=0) - cross[k]
        beta = np.linalg.solve(g, c)
        sigma2 = (squares.sum(axis=0) - squares[k] - np.einsum("ij,ij->j", beta, c)) / (n_train - p)
        sse_test = (squares[k] - 2.0 * np.einsum("ij,ij->j", beta, cross[k])
                    + np.einsum("ij,ij->j", beta, gram[k] @ beta))
        out[k] = float(-0.5 * np.sum(counts[k] * (LOG_2PI + np.log(sigma2)) + sse_test / sigma2))
    return out
