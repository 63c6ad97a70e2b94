"""Linear-model kernels, batched over designs: OLS with Newey-West (HAC) errors, Huber's M-estimator."""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

HUBER_T = 1.345
"""Huber's tuning constant: 95% efficiency under normal errors (Huber, 1981; statsmodels' default)."""
MAD_NORMAL = 0.6744897501960817
"""Phi^-1(3/4): median |z| of a standard normal, turning a MAD into a standard deviation."""
AR1_RHO_MAX = 0.99
"""Largest |rho| :func:`gls_ar1` uses: nearer 1 the errors are a random walk, not a stationary AR(1)."""
ANDREWS_RHO_MAX = 0.97
"""Largest AR(1) coefficient :func:`andrews_lags` plugs in: near 1 the plug-in bandwidth has no
finite limit, so the estimate is capped (common practice in implementations of Andrews, 1991)."""
_IRLS_MAX_ITER = 50
_IRLS_TOL = 1e-10


@dataclass(frozen=True, eq=False)
class LinearFits:
    """OLS fits of one outcome on several designs at once (leading axis: design).

    Attributes
    ----------
    coef : numpy.ndarray, shape (M, p)
        Least-squares coefficients.
    cov_hac : numpy.ndarray, shape (M, p, p)
        Newey-West covariance of the coefficients.
    loglik : numpy.ndarray, shape (M,)
        Gaussian log-likelihood at the MLE of the variance.
    r2 : numpy.ndarray, shape (M,)
        Coefficient of determination.
    n_obs : int
        Observations.
    lags : numpy.ndarray of int, shape (M,)
        Newey-West lag truncation of each design.
    rho : numpy.ndarray, shape (M,)
        The errors' AR(1) coefficient the fit allowed for (0 for OLS; :func:`gls_ar1`).
    df : numpy.ndarray, shape (M,)
        Degrees of freedom of the robust variance of the ``focus`` coefficient
        (:func:`satterthwaite_df`).
    """

    coef: np.ndarray
    cov_hac: np.ndarray
    loglik: np.ndarray
    r2: np.ndarray
    n_obs: int
    lags: np.ndarray
    rho: np.ndarray
    df: np.ndarray


def newey_west_lags(n_obs: int) -> int:
    """Return the usual Newey-West lag truncation floor(4 (n/100)^(2/9)).

    Parameters
    ----------
    n_obs : int
        Observations.

    Returns
    -------
    int

    References
    ----------
    Newey, W. K., & West, K. D. (1994). Automatic lag selection in covariance
    matrix estimation. Rev. Econ. Stud. 61, 631-653.

    Examples
    --------
    >>> newey_west_lags(1000)
    6
    """
    return int(math.floor(4.0 * (n_obs / 100.0) ** (2.0 / 9.0)))


def andrews_lags(series: np.ndarray) -> np.ndarray:
    """Return the Bartlett-kernel lag truncation of each series by Andrews' AR(1) plug-in rule.

    Per series v (one row): rho = sum v_t v_{t-1} / sum v_{t-1}^2 (capped at
    +-:data:`ANDREWS_RHO_MAX`), alpha(1) = 4 rho^2 / ((1 - rho)^2 (1 + rho)^2)
    and the bandwidth S = 1.1447 (alpha(1) T)^(1/3); the lag is floor(S),
    at most T - 1. The bandwidth follows the persistence of the data: a
    white series gets lag 0, an AR(1) series with rho = 0.9 over 600 trials
    about 40, where the fixed rule of :func:`newey_west_lags` gives 5.

    Parameters
    ----------
    series : numpy.ndarray, shape (M, T)
        The score series of the coefficient of interest (residual times its
        regressor, partialled on the others), one row per design.

    Returns
    -------
    numpy.ndarray of int, shape (M,)

    References
    ----------
    Andrews, D. W. K. (1991). Heteroskedasticity and autocorrelation
    consistent covariance matrix estimation. Econometrica 59, 817-858
    (eq. 6.4 and the AR(1) plug-in of section 6).

    Examples
    --------
    >>> int(andrews_lags(np.array([[1.0, -1.0] * 50]))[0])
    0
    """
    v = np.asarray(series, dtype=float)
    T = v.shape[1]
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = (v[:, 1:] * v[:, :-1]).sum(axis=1) / (v[:, :-1] ** 2).sum(axis=1)
    rho = np.clip(np.nan_to_num(rho), -ANDREWS_RHO_MAX, ANDREWS_RHO_MAX)
    alpha = (2.0 * rho / ((1.0 - rho) * (1.0 + rho))) ** 2
    bandwidth = 1.1447 * (alpha * T) ** (1.0 / 3.0)
    return np.minimum(np.floor(bandwidth), max(T - 1, 0)).astype(np.int64)


def leverages(X: np.ndarray, bread: np.ndarray | None = None) -> np.ndarray:
    """Return the diagonal of the hat matrix X (X'X)^-1 X' of each design.

    Parameters
    ----------
    X : numpy.ndarray, shape (M, n, p)
    bread : numpy.ndarray, shape (M, p, p), optional
        (X'X)^-1 when already computed.

    Returns
    -------
    numpy.ndarray, shape (M, n)
    """
    X = np.asarray(X, dtype=float)
    bread = gram_inverse(X.transpose(0, 2, 1) @ X) if bread is None else bread
    return np.einsum("mnp,mpq,mnq->mn", X, bread, X)


def ols(X: np.ndarray, y: np.ndarray, times: np.ndarray | None = None,
        lags: int | str | np.ndarray | None = None, *, hc3: bool = False, focus: int = 1) -> LinearFits:
    """Return the OLS fits of ``y`` on each design of ``X``, with Newey-West covariances.

    coef = (X'X)^-1 X'y (the pseudo-inverse when X'X is singular, e.g. a
    regressor without variation, which then gets no weight instead of an
    error). Gaussian log-likelihood at the MLE sigma^2 = RSS/n:
    -n/2 (log 2 pi + log(RSS/n) + 1); R^2 = 1 - RSS/TSS. Newey-West
    covariance: (X'X)^-1 S (X'X)^-1 n/(n-p), S = G_0 + sum_{l=1..L}
    (1 - l/(L+1)) (G_l + G_l'), G_l = sum_t u_t u_{t-l} x_t x_{t-l}'
    (Bartlett weights; the n/(n-p) small-sample factor as statsmodels'
    ``use_correction``). With ``hc3`` each residual u_t is replaced by
    u_t / (1 - h_t), h_t the trial's leverage: the HC3 adjustment of
    MacKinnon & White (1985), an approximate jackknife that keeps the
    interval honest when a few trials carry most of a regressor's variation
    (a learner's uncertainty in the first trials of a session), applied to
    every term of the Bartlett sum.

    Parameters
    ----------
    X : numpy.ndarray, shape (M, n, p)
        M designs over the same n observations.
    y : numpy.ndarray, shape (n,) or (M, n)
        The outcome (one per design when the designs transform it too).
    times : numpy.ndarray of int, shape (n,), optional
        The observations' positions on the trial axis: lags count trials, and
        a trial left out is a zero in the sums (the amplitude-modulated
        estimator of Datta & Du, 2012, from memory). Default 0..n-1.
    lags : int, sequence of int, "andrews" or None
        Lag truncation: one for every design, one per design, Andrews' (1991)
        data-driven lag of each design (:func:`andrews_lags` of the score
        series of coefficient ``focus``), or by default
        :func:`newey_west_lags` (n).
    hc3 : bool, default False
        Leverage-adjusted residuals in the sums.
    focus : int, default 1
        The coefficient whose scores choose the lag with "andrews", and whose
        ``df`` is reported (the last when the designs have fewer columns).

    Returns
    -------
    LinearFits

    References
    ----------
    Newey, W. K., & West, K. D. (1987). A simple, positive semi-definite,
    heteroskedasticity and autocorrelation consistent covariance matrix.
    Econometrica 55, 703-708.
    MacKinnon, J. G., & White, H. (1985). Some heteroskedasticity-consistent
    covariance matrix estimators with improved finite sample properties.
    J. Econometrics 29, 305-325.
    """
    X = np.asarray(X, dtype=float)
    M, n, p = X.shape
    focus = min(focus, p - 1)
    Y = np.broadcast_to(np.asarray(y, dtype=float), (M, n))
    times = np.arange(n) if times is None else np.asarray(times, dtype=np.int64)
    Xt = X.transpose(0, 2, 1)
    bread = gram_inverse(Xt @ X)
    coef = (bread @ (Xt @ Y[..., None]))[..., 0]
    resid = Y - (X @ coef[..., None])[..., 0]
    rss = (resid * resid).sum(axis=1)
    tss = ((Y - Y.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    loglik = -0.5 * n * (math.log(2 * math.pi) + np.log(rss / n) + 1.0)
    if hc3:
        room = 1.0 - leverages(X, bread)
        resid = np.divide(resid, room, out=np.zeros_like(resid), where=room > 1e-12)
    scores = np.zeros((M, int(times.max()) + 1 if n else 0, p))
    scores[:, times] = resid[..., None] * X
    if isinstance(lags, str):
        if lags != "andrews":
            raise ValueError(f"lags must be a count, a count per design, 'andrews' or None, got {lags!r}")
        lags = andrews_lags((scores @ bread[:, focus, :, None])[..., 0])
    lags = np.broadcast_to(np.asarray(newey_west_lags(n) if lags is None else lags, dtype=np.int64), (M,))
    cov = bread @ _bartlett_meat(scores, lags) @ bread * (n / (n - p))
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = 1.0 - rss / tss
    df = satterthwaite_df(np.einsum("mp,mnp->mn", bread[:, focus], X))
    return LinearFits(coef, cov, loglik, r2, n, lags.copy(), np.zeros(M), df)


def satterthwaite_df(weights: np.ndarray) -> np.ndarray:
    """Return the degrees of freedom (sum w^2)^2 / sum w^4 of a robust variance with influence weights w.

    A coefficient b = sum_t w_t y_t has the robust variance sum_t w_t^2 u_t^2;
    with independent Gaussian errors of equal variance its first two moments
    match a scaled chi-square with these degrees of freedom (Satterthwaite,
    1946): about n when every trial weighs alike, a handful when a few trials
    carry the regressor (a learner's uncertainty that changes only in the
    first trials of a session). Student's t with them keeps the interval's
    level there (the degrees-of-freedom advice of Imbens & Kolesár, 2016).

    Parameters
    ----------
    weights : numpy.ndarray, shape (M, n)
        Per design, the coefficient's row of (X'X)^-1 X'.

    Returns
    -------
    numpy.ndarray, shape (M,)

    References
    ----------
    Satterthwaite, F. E. (1946). An approximate distribution of estimates of
    variance components. Biometrics Bull. 2, 110-114.
    Imbens, G. W., & Kolesár, M. (2016). Robust standard errors in small
    samples: some practical advice. Rev. Econ. Stat. 98, 701-712.

    Examples
    --------
    >>> float(satterthwaite_df(np.ones((1, 50)))[0])
    50.0
    """
    w2 = np.asarray(weights, dtype=float) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.nan_to_num(w2.sum(axis=1) ** 2 / (w2 * w2).sum(axis=1))


def ar1_filter(rho: np.ndarray, times: np.ndarray, runs: np.ndarray | None = None
               ) -> tuple[np.ndarray, np.ndarray]:
    """Return (a, c), each (M, n): the AR(1) whitening w_k = c_k (v_k - a_k v_{k-1}) of observations at ``times``.

    For errors e_t = rho e_{t-1} + innovation on the trial axis, observed at
    increasing times t_1 < t_2 < ...: a_k = rho^(t_k - t_(k-1)) and
    c_k = sqrt((1 - rho^2) / (1 - a_k^2)), so a gap of g trials uses rho^g;
    the first observation of each run (a session: the process starts
    anew) gets a_k = 0, c_k = sqrt(1 - rho^2) (the stationary start of
    Prais & Winsten, 1954). The whitened errors are independent with the
    innovation variance, and the Jacobian of the map is prod_k c_k.

    Parameters
    ----------
    rho : numpy.ndarray, shape (M,)
        |rho| < 1.
    times : numpy.ndarray of int, shape (n,)
        Increasing within each run.
    runs : numpy.ndarray of bool, shape (n,), optional
        True on the first observation of each run; default only the first.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)

    References
    ----------
    Prais, S. J., & Winsten, C. B. (1954). Trend estimators and serial
    correlation. Cowles Commission Discussion Paper 383.
    """
    rho = np.asarray(rho, dtype=float)[:, None]
    times = np.asarray(times, dtype=np.int64)
    new = np.zeros(len(times), dtype=bool) if runs is None else np.asarray(runs, dtype=bool).copy()
    if len(times):
        new[0] = True
    gap = np.diff(times, prepend=times[:1])
    a = np.where(new, 0.0, np.sign(rho) ** gap * np.abs(rho) ** gap)
    c = np.sqrt((1.0 - rho * rho) / (1.0 - a * a))
    return a, c


def gls_ar1(X: np.ndarray, y: np.ndarray, times: np.ndarray | None = None, runs: np.ndarray | None = None,
            lags: int | str | np.ndarray | None = "andrews", *, hc3: bool = True, focus: int = 1) -> LinearFits:
    """Return least-squares fits of ``y`` on each design of ``X`` with AR(1) errors (two-step feasible GLS).

    Step one: OLS; rho = sum u_k u_{k-1} / sum u_{k-1}^2 over the residuals
    of neighbouring trials (clipped to +-:data:`AR1_RHO_MAX`). Step two: OLS
    of the whitened outcome on the whitened design (:func:`ar1_filter`), the
    Cochrane-Orcutt transformation with Prais-Winsten's first observation.
    The covariance is Newey-West's on the whitened regression (:func:`ols`
    with ``lags``, ``hc3``), robust to what AR(1) leaves; the
    log-likelihood is the exact Gaussian one of the original outcome,
    log L(whitened) + sum_k log c_k; R^2 = 1 - RSS/TSS of the original
    outcome at the GLS coefficients. Slow drift in a measure (rho near 1)
    then no longer passes for an effect of a slowly changing regressor.

    Parameters
    ----------
    X : numpy.ndarray, shape (M, n, p)
    y : numpy.ndarray, shape (n,)
    times : numpy.ndarray of int, shape (n,), optional
        Positions on the trial axis (gaps: trials left out); default 0..n-1.
    runs : numpy.ndarray of bool, shape (n,), optional
        True on the first observation of each run (see :func:`ar1_filter`).
    lags, hc3, focus
        As :func:`ols`, on the whitened regression.

    Returns
    -------
    LinearFits
        With ``rho``.

    References
    ----------
    Cochrane, D., & Orcutt, G. H. (1949). Application of least squares
    regression to relationships containing auto-correlated error terms.
    JASA 44, 32-61.
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    M, n, _ = X.shape
    times = np.arange(n) if times is None else np.asarray(times, dtype=np.int64)
    first = ols(X, y, lags=0).coef
    resid = y - (X @ first[..., None])[..., 0]
    follows = np.r_[False, np.diff(times) == 1] if n else np.zeros(0, bool)  # right after the previous one
    if runs is not None:
        follows &= ~np.asarray(runs, dtype=bool)
    k = np.flatnonzero(follows)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = (resid[:, k] * resid[:, k - 1]).sum(axis=1) / (resid[:, k - 1] ** 2).sum(axis=1)
    rho = np.clip(np.nan_to_num(rho), -AR1_RHO_MAX, AR1_RHO_MAX)
    a, c = ar1_filter(rho, times, runs)
    Xw = c[..., None] * (X - a[..., None] * np.concatenate([X[:, :1], X[:, :-1]], axis=1))
    yw = c * (y - a * np.r_[y[:1], y[:-1]])
    fit = ols(Xw, yw, times, lags, hc3=hc3, focus=focus)
    raw = y - (X @ fit.coef[..., None])[..., 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = 1.0 - (raw * raw).sum(axis=1) / float(((y - y.mean()) ** 2).sum())
    return replace(fit, loglik=fit.loglik + np.log(c).sum(axis=1), r2=r2, rho=rho)


def _bartlett_meat(scores: np.ndarray, lags: np.ndarray) -> np.ndarray:
    """Return S = G_0 + sum_l w_l (G_l + G_l') per design, w_l = max(0, 1 - l/(L+1)) with that design's L."""
    meat = scores.transpose(0, 2, 1) @ scores
    for lag in range(1, int(lags.max(initial=0)) + 1):
        weight = np.clip(1.0 - lag / (lags + 1.0), 0.0, None)
        use = weight > 0
        gamma = scores[use, lag:].transpose(0, 2, 1) @ scores[use, :-lag]
        meat[use] += weight[use, None, None] * (gamma + gamma.transpose(0, 2, 1))
    return meat


def gram_inverse(gram: np.ndarray) -> np.ndarray:
    """Return the inverses of a stack of Gram matrices X'X; the pseudo-inverse where one is singular.

    Parameters
    ----------
    gram : numpy.ndarray, shape (..., p, p)
        Symmetric positive semi-definite matrices.

    Returns
    -------
    numpy.ndarray, shape (..., p, p)
    """
    try:
        return np.linalg.inv(gram)
    except np.linalg.LinAlgError:
        return np.linalg.pinv(gram, hermitian=True)


def huber(X: np.ndarray, y: np.ndarray, t: float = HUBER_T) -> np.ndarray:
    """Return Huber M-estimates of ``y`` on each design of ``X``.

    Iteratively reweighted least squares from the OLS fit: weights
    w = min(1, t / |r / s|), scale s = median |r| / Phi^-1(3/4) re-estimated
    at each step (as statsmodels' RLM with HuberT and scale_est="mad"), until
    the coefficients move less than 1e-10 (relative) or after 50 steps.

    Parameters
    ----------
    X : numpy.ndarray, shape (M, n, p)
        M designs over the same n observations.
    y : numpy.ndarray, shape (n,)
        The outcome.
    t : float, default :data:`HUBER_T`
        The tuning constant, in scale units.

    Returns
    -------
    numpy.ndarray, shape (M, p)

    References
    ----------
    Huber, P. J. (1981). Robust Statistics. Wiley.
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    coef = ols(X, y, lags=0).coef
    resid = y - (X @ coef[..., None])[..., 0]
    scale = np.median(np.abs(resid), axis=1) / MAD_NORMAL
    for _ in range(_IRLS_MAX_ITER):
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.abs(resid) / scale[:, None]
            w = np.where(z > t, t / z, 1.0)
        w = np.where(scale[:, None] > 0, w, 1.0)
        Xw = (X * w[..., None]).transpose(0, 2, 1)
        new = (gram_inverse(Xw @ X) @ (Xw @ y)[..., None])[..., 0]
        resid = y - (X @ new[..., None])[..., 0]
        scale = np.median(np.abs(resid), axis=1) / MAD_NORMAL
        done = np.all(np.abs(new - coef) <= _IRLS_TOL * (1.0 + np.abs(coef)))
        coef = new
        if done:
            break
    return coef
