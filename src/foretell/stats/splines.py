"""Natural cubic spline bases: smooth functions of one variable as a few linear regressors."""

from __future__ import annotations

import numpy as np


def spline_knots(x: np.ndarray, df: int) -> np.ndarray:
    """Return df + 1 knots at equally spaced quantiles of ``x`` (the first and last are its range).

    Parameters
    ----------
    x : numpy.ndarray
        The values the spline will be evaluated on.
    df : int
        Degrees of freedom of the spline (columns of :func:`natural_spline`), at least 1.

    Returns
    -------
    numpy.ndarray
        Increasing knots; fewer when ``x`` has fewer distinct quantiles.

    Examples
    --------
    >>> spline_knots(np.arange(11.0), 2).tolist()
    [0.0, 5.0, 10.0]
    """
    return np.unique(np.quantile(np.asarray(x, dtype=float), np.linspace(0.0, 1.0, int(df) + 1)))


def natural_spline(x: np.ndarray, knots: np.ndarray) -> np.ndarray:
    """Return the natural cubic spline basis of ``x`` on ``knots``, without the intercept.

    With K knots xi_1 < ... < xi_K the basis is N_1(x) = x and
    N_{k+1}(x) = d_k(x) - d_{K-1}(x), k = 1..K-2, where
    d_k(x) = [(x - xi_k)_+^3 - (x - xi_K)_+^3] / (xi_K - xi_k): cubic between
    the knots, linear beyond the boundary knots, K - 1 columns (Hastie,
    Tibshirani & Friedman, 2009, eqs. 5.4-5.5). With two knots the basis is
    the line x alone.

    Parameters
    ----------
    x : numpy.ndarray, shape (n,)
    knots : numpy.ndarray, shape (K,)
        Increasing, K >= 2.

    Returns
    -------
    numpy.ndarray, shape (n, K - 1)

    Raises
    ------
    ValueError
        For fewer than two knots, or knots that do not increase.

    References
    ----------
    Hastie, T., Tibshirani, R., & Friedman, J. (2009). The Elements of
    Statistical Learning, 2nd ed. Springer, section 5.2.1.
    """
    x = np.asarray(x, dtype=float)
    xi = np.asarray(knots, dtype=float)
    if len(xi) < 2 or np.any(np.diff(xi) <= 0):
        raise ValueError(f"a natural spline needs at least two increasing knots, got {xi.tolist()}")
    cube = np.maximum(x[:, None] - xi[None, :], 0.0) ** 3
    d = (cube[:, :-2] - cube[:, -1:]) / (xi[-1] - xi[:-2])
    last = (cube[:, -2] - cube[:, -1]) / (xi[-1] - xi[-2])
    return np.column_stack([x, d - last[:, None]])
