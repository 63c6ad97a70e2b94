"""The hierarchical model of a per-trial measure: participant x block units, their likelihood, the PyMC model."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from foretell.hierarchical.forms import form_weight, partial_level
from foretell.labels import block_label
from foretell.measure import Measure, participant_spans
from foretell.stats.regression import gram_inverse

PRIOR_SCALES = {"mu_a": 1.0, "tau_a": 1.0, "mu_b": 1.0, "tau_b": 0.5, "g": 1.0, "tau_d": 0.5, "tau_unit": 0.5,
                "sigma": 1.0}
"""Prior scales on the standardised outcome and regressors (unit SD over the kept trials): weakly
informative there whatever the measure's own unit (Gelman, Simpson & Betancourt, 2017)."""




@dataclass(frozen=True, eq=False)
class UnitStats:
    """Sufficient statistics of a Gaussian linear model per unit (participant x block).

    Attributes
    ----------
    n : numpy.ndarray, shape (U,)
        Trials per unit.
    gram, cross, yy : numpy.ndarray, shapes (U, q, q), (U, q), (U,)
        Per unit, sum w_t w_t', sum w_t y_t and sum y_t^2 over its trials, w_t
        the trial's columns (the first is 1).
    """

    n: np.ndarray
    gram: np.ndarray
    cross: np.ndarray
    yy: np.ndarray


def unit_statistics(y: np.ndarray, w: np.ndarray, unit_start: np.ndarray) -> UnitStats:
    """Return the :class:`UnitStats` of trials ``y``, columns ``w`` cut into units at ``unit_start``.

    Parameters
    ----------
    y : numpy.ndarray, shape (n,)
    w : numpy.ndarray, shape (n, q)
        Unit after unit; the first column is 1.
    unit_start : numpy.ndarray of int
        The first trial of each unit (increasing, from 0).

    Returns
    -------
    UnitStats
    """
    y = np.asarray(y, dtype=float)
    w = np.asarray(w, dtype=float)
    start = np.asarray(unit_start, dtype=np.int64)
    n = np.diff(np.r_[start, len(y)]).astype(float)
    q = w.shape[1]
    if not len(start):
        return UnitStats(n, np.zeros((0, q, q)), np.zeros((0, q)), np.zeros(0))
    gram = np.add.reduceat(w[:, :, None] * w[:, None, :], start)
    return UnitStats(n, gram, np.add.reduceat(w * y[:, None], start), np.add.reduceat(y * y, start))


def _quadratic(theta, gram):
    """Return sum_jk theta_j gram_jk theta_k per unit, for numpy arrays (any leading axes) or PyTensor tensors."""
    if isinstance(theta, np.ndarray):
        return np.einsum("...ui,uij,...uj->...u", theta, gram, theta)
    return (theta[:, :, None] * gram * theta[:, None, :]).sum(axis=(1, 2))


def gaussian_unit_loglik(theta, sigma, log_sigma, stats: UnitStats, tau=None, log=np.log):
    """Return, per unit, log p(y_u | theta_u, sigma_u[, tau]) of a Gaussian linear model from its sums.

    Trial t of unit u: y_t = theta_u' w_t + e_u + eps_t, eps_t ~ Normal(0,
    sigma^2). The residual sum of squares comes from the unit's sums:
    SS = y'y - 2 theta'W'y + theta'W'W theta. Without ``tau`` (no unit
    effect) log L = -n log sigma - n/2 log 2 pi - SS / (2 sigma^2). With
    ``tau`` the unit's own level e_u ~ Normal(0, tau^2) is integrated out:
    y_u ~ Normal(W theta, sigma^2 I + tau^2 1 1'), whose log density, by the
    matrix determinant lemma and the Sherman-Morrison formula, is
    -n/2 log 2 pi - (n-1) log sigma - 1/2 log(sigma^2 + n tau^2)
    - [SS - tau^2 S^2 / (sigma^2 + n tau^2)] / (2 sigma^2), S the sum of the
    residuals (common practice: the one-way random-effects likelihood).
    Arithmetic only, so the same formula serves numpy arrays and PyTensor tensors.

    Parameters
    ----------
    theta : array-like, shape (..., U, q)
        Per unit, the coefficients of its columns.
    sigma, log_sigma : array-like, shape (..., U)
    stats : UnitStats
    tau : array-like, optional
        The spread of the units' own levels (broadcasting against sigma).
    log : callable, default numpy.log
        The logarithm of the arrays' library.

    Returns
    -------
    array-like, shape (..., U)
    """
    ss = stats.yy - 2.0 * (theta * stats.cross).sum(axis=-1) + _quadratic(theta, stats.gram)
    constant = 0.5 * math.log(2 * math.pi) * stats.n
    if tau is None:
        return -stats.n * log_sigma - constant - ss / (2.0 * sigma * sigma)
    resid_sum = stats.cross[:, 0] - (theta * stats.gram[:, 0, :]).sum(axis=-1)
    var = sigma * sigma + stats.n * tau * tau
    return (-constant - (stats.n - 1.0) * log_sigma - 0.5 * log(var)
            - (ss - tau * tau * resid_sum * resid_sum / var) / (2.0 * sigma * sigma))


@dataclass(frozen=True, eq=False)
class PooledUnits:
    """One model's kept trials of every participant, reduced to participant x block units.

    The outcome is standardised over every kept trial, y* = (y - centre) /
    scale, and so is the learner's regressor: the priors are on the data's
    scale (Gelman, Simpson & Betancourt, 2017).

    Attributes
    ----------
    stats : UnitStats
        Columns w = (1, the baseline's columns, [log trial], [the standardised regressor]).
    participant : numpy.ndarray of int
        The unit's participant (index into ``participants``).
    participants, groups, units : tuple of str
        Participants, groups, and unit labels "participant|session|block".
    group_of : numpy.ndarray of int
        Each participant's group (index into ``groups``).
    n_nuisance : int
        The baseline's columns after the 1.
    practice : bool
        Whether log trial follows them (each participant's own practice slope).
    slope : bool
        Whether the last column is a learner's regressor.
    unit_levels : bool
        Whether each unit has its own level (the baseline's block intercepts).
    y_scale : float
        The outcome's standard deviation (sigma on the outcome's scale = sigma* y_scale).
    slope_unit : float
        The factor turning a slope on the standardised scales into the
        reported slope per bit (y_scale / the regressor's SD x the measure's
        :meth:`~foretell.measure.Measure.slope_factor`).
    """

    stats: UnitStats
    participant: np.ndarray
    participants: tuple[str, ...]
    group_of: np.ndarray
    groups: tuple[str, ...]
    units: tuple[str, ...]
    n_nuisance: int
    practice: bool
    slope: bool
    unit_levels: bool
    y_scale: float
    slope_unit: float

    @property
    def n_trials(self) -> int:
        """Return the kept trials over every unit."""
        return int(self.stats.n.sum())


def pool_measure(measure: Measure, frame: pd.DataFrame, table: Mapping[str, np.ndarray], model: int | None,
                 n_models: int) -> PooledUnits:
    """Return every participant's kept trials for one learner model (or the baseline), as participant x block units.

    The kept trials are those of every model together
    (:meth:`~foretell.measure.Measure.kept`), so that every model is scored
    on the same units.

    Parameters
    ----------
    measure : foretell.measure.Measure
    frame : pandas.DataFrame
        The log's trials.
    table : mapping of str to numpy.ndarray
        Columns of the :func:`foretell.regressors.regressors` table.
    model : int or None
        The model's position among the table's models; None for the baseline.
    n_models : int

    Returns
    -------
    PooledUnits
    """
    ys, ws, xs, starts, owners, labels, groups, raw = [], [], [], [], [], [], [], []
    start = 0
    spans = participant_spans(frame)
    for i, (pid, rows) in enumerate(spans.items()):
        cols, _ = measure.model_columns(table, rows, n_models)
        kept = measure.kept(rows, cols)
        order = measure.block_order[rows][kept]
        keys = frame.iloc[rows][["session", "block"]].to_numpy()[kept]
        cuts = np.r_[0, np.flatnonzero(order[1:] != order[:-1]) + 1] if kept.any() else np.array([], np.int64)
        ys.append(measure.outcome(rows)[kept])
        ws.append(np.concatenate([measure.nuisance[rows], measure.practice[rows]], axis=1)[kept])
        xs.append(cols[model][measure.main][kept] if model is not None else np.zeros(int(kept.sum())))
        raw.append(measure.values[rows][kept])
        starts.append(cuts + start)
        owners.append(np.full(len(cuts), i))
        labels += [f"{pid}|{block_label(keys[k, 0])}|{block_label(keys[k, 1])}" for k in cuts]
        groups.append(str(frame["group"].iloc[rows.start]) if "group" in frame.columns else "all")
        start += int(kept.sum())
    y, x = np.concatenate(ys), np.concatenate(xs)
    y_centre, y_scale = _centre_scale(y)
    x_centre, x_scale = _centre_scale(x)
    columns = [np.ones((len(y), 1)), np.concatenate(ws)] + ([((x - x_centre) / x_scale)[:, None]]
                                                           if model is not None else [])
    stats = unit_statistics((y - y_centre) / y_scale, np.concatenate(columns, axis=1),
                            np.concatenate(starts).astype(np.int64))
    names = tuple(dict.fromkeys(groups))
    factor = measure.slope_factor(np.concatenate(raw)) if len(y) else math.nan
    return PooledUnits(stats, np.concatenate(owners).astype(np.int64), tuple(spans),
                       np.array([names.index(g) for g in groups]), names, tuple(labels),
                       measure.nuisance.shape[1], measure.practice.shape[1] > 0, model is not None,
                       measure.block_intercepts, y_scale,
                       y_scale / x_scale * factor)


def _centre_scale(values: np.ndarray) -> tuple[float, float]:
    """Return (mean, standard deviation) of ``values``; a scale of 1 when they do not vary."""
    if not len(values):
        return 0.0, 1.0
    sd = float(np.std(values))
    return float(np.mean(values)), (sd if sd > 0 else 1.0)


def participant_estimates(pooled: PooledUnits) -> tuple[np.ndarray, np.ndarray]:
    """Return (estimates, standard errors), both (participants, r): each participant's own least squares.

    Per participant, OLS of the standardised outcome on the columns with a
    coefficient of their own (1, [log trial], [the regressor]: the shared
    baseline columns left out), their sums added over the participant's
    units; classical standard errors sqrt(s^2 [(W'W)^-1]_jj), s^2 = RSS /
    (n - r): the precision the hierarchical model's Gaussian likelihood gives
    each participant. NaN for a participant with no more trials than columns.

    Parameters
    ----------
    pooled : PooledUnits

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Columns in the order 1, [log trial], [regressor].
    """
    s = pooled.stats
    own = np.r_[0, np.arange(1 + pooled.n_nuisance, s.gram.shape[-1])]
    P, r = len(pooled.participants), len(own)
    gram, cross, yy, n = np.zeros((P, r, r)), np.zeros((P, r)), np.zeros(P), np.zeros(P)
    for total, part in ((gram, s.gram[:, own][:, :, own]), (cross, s.cross[:, own]), (yy, s.yy), (n, s.n)):
        np.add.at(total, pooled.participant, part)
    est, se = np.full((P, r), np.nan), np.full((P, r), np.nan)
    fit = n > r
    if fit.any():
        inv = gram_inverse(gram[fit])
        coef = (inv @ cross[fit][..., None])[..., 0]
        rss = np.maximum(yy[fit] - (coef * cross[fit]).sum(-1), 0.0)
        est[fit] = coef
        se[fit] = np.sqrt((rss / (n[fit] - r))[:, None] * np.diagonal(inv, axis1=1, axis2=2))
    return est, se


def leave_out(pooled: PooledUnits, unit: int) -> tuple[PooledUnits, PooledUnits]:
    """Return (the data without ``unit``, every unit) for an exact leave-one-unit-out refit.

    The left-out unit's sums are zero in the first (it adds exactly 0 to the
    likelihood of :func:`gaussian_unit_loglik`), kept in the second, which
    gives its likelihood under the refitted posterior. The standardisation
    of the full data is kept, so every refit has the same prior.

    Parameters
    ----------
    pooled : PooledUnits
    unit : int
        Index of the unit left out.

    Returns
    -------
    (PooledUnits, PooledUnits)
    """
    s = pooled.stats
    keep = np.ones(len(s.n))
    keep[unit] = 0.0
    without = UnitStats(s.n * keep, s.gram * keep[:, None, None], s.cross * keep[:, None], s.yy * keep)
    return replace(pooled, stats=without), pooled


SLOPE_VARIABLES = ("mu_b", "tau_b", "b_raw", "b", "slope_mean", "slope_diff")
"""The learner slope's variables: present in the one compiled structure, prior-only for the baseline, and
dropped from the baseline's posterior."""


def _structure_key(pooled: PooledUnits) -> tuple:
    """Return what fixes the measure model's graph and shapes: participants, groups and column counts."""
    return ("measure", pooled.participants, pooled.groups, pooled.n_nuisance, pooled.practice, pooled.unit_levels)


def measure_structure(pooled: PooledUnits) -> object:
    """Return the one compiled :func:`build_measure_model` of ``pooled``'s structure in this process.

    Every learner model, the baseline and every leave-one-unit-out refit of
    one study share it: their data differ, not the graph
    (:func:`measure_data`).

    Parameters
    ----------
    pooled : PooledUnits

    Returns
    -------
    foretell.hierarchical.sampling.Structure
    """
    from foretell.hierarchical.sampling import structure

    return structure(_structure_key(pooled), lambda: build_measure_model(pooled))


def measure_data(pooled: PooledUnits, forms: Mapping[str, str]) -> dict[str, np.ndarray]:
    """Return the values of :func:`build_measure_model`'s data containers for ``pooled`` and ``forms``.

    The baseline's sums get a slope column of zeros (its slope is then
    prior-only, and the same compiled model serves it).

    Parameters
    ----------
    pooled : PooledUnits
    forms : mapping of str to str
        "intercept", "practice" and "slope" -> "centred" or "non-centred"
        (missing ones non-centred).

    Returns
    -------
    dict of str to numpy.ndarray
    """
    s = pooled.stats
    pad = 0 if pooled.slope else 1
    return {"gram": np.pad(s.gram, ((0, 0), (0, pad), (0, pad))), "cross": np.pad(s.cross, ((0, 0), (0, pad))),
            "yy": s.yy, "n_trials": s.n, "unit_participant": pooled.participant,
            "participant_group": np.asarray(pooled.group_of, np.int64),
            "form_weight": np.array([form_weight(forms.get(k, "non-centred"))
                                     for k in ("intercept", "practice", "slope")]),
            "slope_unit": np.asarray(pooled.slope_unit if pooled.slope else 1.0, float),
            "y_scale": np.asarray(pooled.y_scale, float)}


def build_measure_model(pooled: PooledUnits) -> object:
    """Return the PyMC model of the pooled, standardised outcome, its data in ``pm.Data`` containers.

    y*_t = a_i + e_u + g' z_t + d_i l_t + b_i x*_t + eps_t, eps_t ~
    Normal(0, sigma_i): participant i's intercept a_i ~ Normal(mu_a, tau_a);
    the time-on-task curve and post-error slowing g' z_t shared by everyone
    (the baseline's columns), with each participant's own practice slope
    d_i ~ Normal(0, tau_d) on log trial l_t, so that a learner cannot
    borrow a participant's practice curve; the slope b_i ~ Normal(mu_b[group],
    tau_b) (prior-only in the baseline, whose regressor column is 0); the
    unit's own level e_u ~ Normal(0, tau_unit) when the baseline has block
    intercepts (integrated out analytically, :func:`gaussian_unit_loglik`);
    sigma_i ~ HalfNormal. Every prior is on the standardised scales
    (:data:`PRIOR_SCALES`): means and g Normal(0, s), spreads and sigma
    HalfNormal(s). ``slope_mean`` = mu_b in the reported unit per bit
    (:attr:`PooledUnits.slope_unit`), ``sigma_outcome`` = sigma_i on the
    outcome's own scale; with several groups ``slope_diff`` =
    slope_mean[g] - slope_mean[first group]. The participant-level values
    are centred or not as the data's ``form_weight`` says
    (:func:`foretell.hierarchical.forms.partial_level`), so that one
    compiled model serves every learner, the baseline and every refit
    (:func:`measure_data`, :func:`measure_structure`).

    Parameters
    ----------
    pooled : PooledUnits
        Gives the structure (participants, groups, columns) and the first data.

    Returns
    -------
    pymc.Model

    References
    ----------
    Betancourt, M., & Girolami, M. (2015). Hamiltonian Monte Carlo for
    hierarchical models. In Current Trends in Bayesian Methodology with
    Applications, 79-101.
    Gelman, A., Simpson, D., & Betancourt, M. (2017). The prior can often
    only be understood in the context of the likelihood. Entropy 19, 555.
    """
    import pymc as pm
    import pytensor.tensor as pt

    s = PRIOR_SCALES
    q = pooled.n_nuisance
    P = len(pooled.participants)
    coords = {"participant": list(pooled.participants), "group": list(pooled.groups),
              "baseline_column": [f"z{j + 1}" for j in range(q)]}
    with pm.Model(coords=coords) as model:
        d = {k: pm.Data(k, v) for k, v in measure_data(pooled, {}).items()}
        w, g = d["form_weight"], d["participant_group"]
        parts = [partial_level("a", pm.Normal("mu_a", 0.0, s["mu_a"]), pm.HalfNormal("tau_a", s["tau_a"]), w[0],
                               dims="participant")[:, None]]
        if q:
            shared = pm.Normal("g", 0.0, s["g"], dims="baseline_column")
            parts.append(pt.broadcast_to(shared[None, :], (P, q)))
        if pooled.practice:
            tau_d = pm.HalfNormal("tau_d", s["tau_d"])
            parts.append(partial_level("d", 0.0, tau_d, w[1], dims="participant")[:, None])
        mu_b = pm.Normal("mu_b", 0.0, s["mu_b"], dims="group")
        tau_b = pm.HalfNormal("tau_b", s["tau_b"])
        parts.append(partial_level("b", mu_b[g], tau_b, w[2], dims="participant")[:, None])
        slope = pm.Deterministic("slope_mean", mu_b * d["slope_unit"], dims="group")
        if len(pooled.groups) > 1:
            model.add_coord("group_contrast", [f"{gr} - {pooled.groups[0]}" for gr in pooled.groups[1:]])
            pm.Deterministic("slope_diff", slope[1:] - slope[0], dims="group_contrast")
        sigma = pm.HalfNormal("sigma", s["sigma"], dims="participant")
        pm.Deterministic("sigma_outcome", sigma * d["y_scale"], dims="participant")
        tau = pm.HalfNormal("tau_unit", s["tau_unit"]) if pooled.unit_levels else None
        p = d["unit_participant"]
        theta = pt.concatenate(parts, axis=1)[p]
        stats = UnitStats(d["n_trials"], d["gram"], d["cross"], d["yy"])
        ll = gaussian_unit_loglik(theta, sigma[p], pm.math.log(sigma)[p], stats, tau=tau, log=pm.math.log)
        pm.Potential("y", ll.sum())
    return model


def unit_loglik(idata: object, pooled: PooledUnits) -> np.ndarray:
    """Return (chains, draws, units): each participant x block unit's log-likelihood at every posterior draw.

    Parameters
    ----------
    idata : arviz.InferenceData
        From :func:`build_measure_model` on data of the same participants and columns.
    pooled : PooledUnits

    Returns
    -------
    numpy.ndarray
    """
    post = idata.posterior
    p = pooled.participant
    a = post["a"].to_numpy()
    parts = [a[..., None]]
    if pooled.n_nuisance:
        parts.append(np.broadcast_to(post["g"].to_numpy()[..., None, :], a.shape + (pooled.n_nuisance,)))
    for name, present in (("d", pooled.practice), ("b", pooled.slope)):
        if present:
            parts.append(post[name].to_numpy()[..., None])
    theta = np.concatenate(parts, axis=-1)[..., p, :]
    sigma = post["sigma"].to_numpy()[..., p]
    tau = post["tau_unit"].to_numpy()[..., None] if pooled.unit_levels else None
    return gaussian_unit_loglik(theta, sigma, np.log(sigma), pooled.stats, tau=tau)
