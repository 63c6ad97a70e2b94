"""The hierarchical group x block model of a learning-curve metric, and its posterior summaries."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import expit, gammaln, log_expit

from foretell.curves import TREND_SUMMARIES
from foretell.hierarchical.forms import choose_by_strength, form_weight, partial_level
from foretell.hierarchical.gate import Diagnostics, Gate, diagnose
from foretell.hierarchical.sampling import sample, structure
from foretell.stats.intervals import hdi
from foretell.validation import check_option

TRENDS = ("categorical", "linear")
KINDS = ("binomial", "gaussian")
DIAGNOSTIC_COLUMNS = ["metric", "likelihood", "trend", "parameterisation", "parameterisation_reason",
                      "n_participants", "n_blocks", "n_observations", "sampler", "chains", "draws", "rhat_max",
                      "ess_bulk_min", "divergences", "pareto_k_max", "ok", "provisional", "reasons",
                      "sampler_messages"]
"""Columns of :meth:`GroupModelFit.row` (the groups step's diagnostics table)."""


@dataclass(frozen=True, eq=False)
class GroupModelData:
    """One metric's values ready for the group model: one entry per observed participant x block.

    Attributes
    ----------
    metric : str
    kind : {"binomial", "gaussian"}
        Binomial: ``y`` successes out of ``n``. Gaussian: ``y`` the values on
        the comparison scale, standardised: (value - centre) / spread.
    y : numpy.ndarray
    n : numpy.ndarray or None
    participant, block : numpy.ndarray of int
        Index ``participants`` and ``units``.
    group : numpy.ndarray of int
        Indexes ``groups``, per participant.
    position : numpy.ndarray
        Each block's position in run order, centred and scaled to span 1
        from first to last (0 with one block).
    participants : tuple of str
    units : tuple of (str, str)
        (session, block) labels in run order.
    groups : tuple of str
    log : bool
        The comparison scale is the log of the metric.
    centre, spread : float
        The Gaussian standardisation.
    """

    metric: str
    kind: str
    y: np.ndarray
    n: np.ndarray | None
    participant: np.ndarray
    block: np.ndarray
    group: np.ndarray
    position: np.ndarray
    participants: tuple[str, ...]
    units: tuple[tuple[str, str], ...]
    groups: tuple[str, ...]
    log: bool = False
    centre: float = 0.0
    spread: float = 1.0

    def has_cell(self) -> np.ndarray:
        """Return (groups, blocks): whether any participant of the group has a value in the block."""
        out = np.zeros((len(self.groups), len(self.units)), dtype=bool)
        out[self.group[self.participant], self.block] = True
        return out


def model_data(curves: pd.DataFrame, metric: str, groups: Sequence[str], *, kind: str,
               log: bool = False) -> GroupModelData:
    """Return the :class:`GroupModelData` of ``metric`` for the participants of ``groups`` in ``curves``.

    Rows without a value (or with no trials, or a non-positive value of a
    log metric) are left out. Binomial: successes = round(value x n_trials).

    Parameters
    ----------
    curves : pandas.DataFrame
        Learning curves (participant, group, session, block, metric, value, n_trials).
    metric : str
    groups : sequence of str
        The groups modelled, in order.
    kind : {"binomial", "gaussian"}
    log : bool, default False
        Model the log of the value (Gaussian).

    Returns
    -------
    GroupModelData
    """
    check_option("kind", kind, KINDS)
    rows = curves[(curves["metric"] == metric) & curves["group"].isin(groups)]
    value = rows["value"].astype(float)
    keep = value.notna() & (rows["n_trials"] > 0) & ((value > 0) if log else True)
    rows, value = rows[keep], value[keep].to_numpy(float)
    units = rows[["session", "block"]].drop_duplicates()
    units = units.assign(**{f"_{c}": pd.to_numeric(units[c], errors="coerce").fillna(np.inf)
                            for c in ("session", "block")}).sort_values(["_session", "_block"], kind="stable")
    unit_list = [tuple(u) for u in units[["session", "block"]].itertuples(index=False)]
    unit_index = {u: i for i, u in enumerate(unit_list)}
    people = list(pd.unique(rows["participant"]))
    person_index = {p: i for i, p in enumerate(people)}
    group_list = [g for g in groups if (rows["group"] == g).any()]
    first_group = rows.groupby("participant", sort=False)["group"].first()
    n_units = len(unit_list)
    position = (np.arange(n_units) - (n_units - 1) / 2) / max(n_units - 1, 1)
    common = dict(metric=metric, participant=rows["participant"].map(person_index).to_numpy(np.int64),
                  block=np.array([unit_index[(s, b)] for s, b in zip(rows["session"], rows["block"])],
                                 dtype=np.int64),
                  group=np.array([group_list.index(first_group[p]) for p in people], dtype=np.int64),
                  position=position, participants=tuple(people), units=tuple(unit_list),
                  groups=tuple(group_list), log=log)
    if kind == "binomial":
        n = rows["n_trials"].to_numpy(np.int64)
        return GroupModelData(kind="binomial", y=np.rint(value * n).astype(np.int64), n=n, **common)
    y = np.log(value) if log else value
    centre, spread = float(y.mean()), float(y.std()) if len(y) > 1 and y.std() > 0 else 1.0
    return GroupModelData(kind="gaussian", y=(y - centre) / spread, n=None, centre=centre, spread=spread,
                          **common)


def participant_intercepts(data: GroupModelData) -> tuple[np.ndarray, np.ndarray]:
    """Return (estimates, standard errors) of each participant's intercept, on the model's scale.

    Binomial: the empirical logit of the participant's pooled rate,
    log((Y + 1/2) / (N - Y + 1/2)), with standard error
    sqrt(1 / (Y + 1/2) + 1 / (N - Y + 1/2)) (Cox, 1970). Gaussian: the
    participant's mean of y minus its group x block cell means, with standard
    error s / sqrt(blocks), s^2 the residual variance of the additive model
    participant + cell (NaN when it has no degrees of freedom left).

    Parameters
    ----------
    data : GroupModelData

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)

    References
    ----------
    Cox, D. R. (1970). The Analysis of Binary Data. Methuen.
    """
    P = len(data.participants)
    if data.kind == "binomial":
        y = np.bincount(data.participant, data.y, minlength=P) + 0.5
        miss = np.bincount(data.participant, data.n - data.y, minlength=P) + 0.5
        return np.log(y / miss), np.sqrt(1.0 / y + 1.0 / miss)
    cell = data.group[data.participant] * len(data.units) + data.block
    cells = np.bincount(cell, minlength=len(data.groups) * len(data.units))
    cell_mean = np.bincount(cell, data.y, minlength=len(cells)) / np.maximum(cells, 1)
    resid = data.y - cell_mean[cell]
    blocks = np.bincount(data.participant, minlength=P)
    est = np.bincount(data.participant, resid, minlength=P) / np.maximum(blocks, 1)
    dof = len(data.y) - P - int((cells > 0).sum()) + len(data.groups)
    s2 = float(((resid - est[data.participant]) ** 2).sum()) / dof if dof > 0 else math.nan
    return est, np.sqrt(s2 / np.maximum(blocks, 1))


@dataclass(frozen=True)
class GroupModelSpec:
    """How the hierarchical group model is built.

    Attributes
    ----------
    trend : {"categorical", "linear"}
        One mean per group x block, or per group a level and a slope in
        block position.
    parameterisation : {"centred", "non-centred"}
        Of the participant intercepts (the block slopes are always
        non-centred, see :func:`build_model`).
    random_effects : bool, default True
        Without them only the fixed group x block core remains.
    prior_scale : float, optional
        The sd of the Normal priors on the fixed effects (default 1.5 on the
        logit scale, 1 on the standardised Gaussian scale).

    Raises
    ------
    UsageError
        For an unknown trend or parameterisation.
    """

    trend: str = "categorical"
    parameterisation: str = "centred"
    random_effects: bool = True
    prior_scale: float | None = None

    def __post_init__(self) -> None:
        check_option("trend", self.trend, TRENDS)
        check_option("parameterisation", self.parameterisation, ("centred", "non-centred"))


def build_model(data: GroupModelData, spec: GroupModelSpec = GroupModelSpec()) -> object:
    """Return the PyMC model of one metric: group x block effects with participant random effects.

    eta_ib = cell[g(i), b] + u_i + v_i t_b, with t_b the block's position
    (:class:`GroupModelData`); binomial y_ib ~ Binomial(n_ib, logistic(eta_ib))
    or Gaussian y_ib ~ Normal(eta_ib, sigma). cell ~ Normal(0, s) per group x
    block ("categorical") or cell[g, b] = level_g + slope_g t_b with level,
    slope ~ Normal(0, s) ("linear"); u_i ~ Normal(0, sd_intercept), v_i ~
    Normal(0, sd_block_slope) (random intercepts and random block slopes, so
    the group x block contrast is not anti-conservative; Barr et al., 2013),
    sd_intercept, sd_block_slope, sigma ~ HalfNormal(1).

    The same model is written with each participant's own intercept
    a_i = m_g + u_i and slope b_i = k_g + v_i, centred on the group's level
    m_g = mean_b cell[g, b] and trend k_g = sum_b t_b cell[g, b] / sum_b t_b^2:
    eta_ib = a_i + b_i t_b + (cell[g, b] - m_g - k_g t_b). Centred:
    a_i ~ Normal(m_g, sd_intercept); non-centred: a_i = m_g + sd_intercept z_i,
    z_i ~ Normal(0, 1) (Betancourt & Girolami, 2015), as the data's
    ``intercept_form`` weight says
    (:func:`foretell.hierarchical.forms.partial_level`), so that both forms
    share one compiled model. The slopes b_i are always non-centred: block
    positions span only 1, so a participant's data pin the slope far less
    than the intercept, and a small slope spread makes the centred form a
    funnel. The data enter through ``pm.Data`` containers
    (:func:`group_data`): every metric of the same likelihood, trend and
    shape is sampled on one compiled model (:func:`group_structure`).

    Parameters
    ----------
    data : GroupModelData
    spec : GroupModelSpec, default GroupModelSpec()

    Returns
    -------
    pymc.Model

    References
    ----------
    Barr, D. J., Levy, R., Scheepers, C., & Tily, H. J. (2013). Random effects
    structure for confirmatory hypothesis testing: keep it maximal. J. Mem.
    Lang. 68, 255-278.
    Betancourt, M., & Girolami, M. (2015). Hamiltonian Monte Carlo for
    hierarchical models. In Current Trends in Bayesian Methodology with
    Applications, 79-101.
    """
    import pymc as pm

    n_groups, n_blocks, n_people = len(data.groups), len(data.units), len(data.participants)
    scale = spec.prior_scale if spec.prior_scale is not None else (1.5 if data.kind == "binomial" else 1.0)
    with pm.Model() as model:
        d = {k: pm.Data(k, v) for k, v in group_data(data, spec).items()}
        person, block, position = d["participant"], d["block"], d["position"]
        obs_group = d["group"][person]
        t = position[block]
        if spec.trend == "categorical":
            cell = pm.Normal("cell", 0.0, scale, shape=(n_groups, n_blocks))
        else:
            level = pm.Normal("level", 0.0, scale, shape=n_groups)
            slope = pm.Normal("slope", 0.0, scale, shape=n_groups)
            cell = pm.Deterministic("cell", level[:, None] + slope[:, None] * position[None, :])
        if not spec.random_effects:
            eta = cell[obs_group, block]
        else:
            level = cell.mean(axis=1)
            sd = pm.HalfNormal("sd_intercept", 1.0)
            intercept = partial_level("intercept", level[d["group"]], sd, d["intercept_form"], shape=n_people)
            residual = cell - level[:, None]
            eta = intercept[person]
            if n_blocks > 1:
                trend = (cell * position[None, :]).sum(axis=1) / (position ** 2).sum()
                residual = residual - trend[:, None] * position[None, :]
                sd = pm.HalfNormal("sd_block_slope", 1.0)
                z = pm.Normal("block_slope_z", 0.0, 1.0, shape=n_people)
                eta = eta + pm.Deterministic("block_slope", trend[d["group"]] + sd * z)[person] * t
            eta = eta + residual[obs_group, block]
        if data.kind == "binomial":
            pm.Binomial("y", n=d["n_trials"], logit_p=eta, observed=d["metric_value"], shape=d["metric_value"].shape)
        else:
            pm.Normal("y", mu=eta, sigma=pm.HalfNormal("sigma", 1.0), observed=d["metric_value"],
                      shape=d["metric_value"].shape)
    return model


def group_data(data: GroupModelData, spec: GroupModelSpec) -> dict[str, np.ndarray]:
    """Return the values of :func:`build_model`'s data containers for one metric.

    Parameters
    ----------
    data : GroupModelData
    spec : GroupModelSpec
        Its parameterisation gives the intercepts' form weight.

    Returns
    -------
    dict of str to numpy.ndarray
    """
    values = {"metric_value": data.y, "participant": data.participant, "block": data.block, "group": data.group,
              "position": np.asarray(data.position, float),
              "intercept_form": np.asarray(form_weight(spec.parameterisation), float)}
    if data.kind == "binomial":
        values["n_trials"] = data.n
    return values


def group_structure(data: GroupModelData, spec: GroupModelSpec) -> object:
    """Return the one compiled :func:`build_model` of ``data``'s structure and ``spec`` in this process.

    The structure: likelihood, trend, random effects, prior scale, and the
    participants, blocks and groups (not the metric, its values or the
    intercepts' form).

    Parameters
    ----------
    data : GroupModelData
    spec : GroupModelSpec

    Returns
    -------
    foretell.hierarchical.sampling.Structure
    """
    key = ("group", data.kind, spec.trend, spec.random_effects, spec.prior_scale, data.participants, data.units,
           data.groups)
    return structure(key, lambda: build_model(data, spec))


@dataclass(frozen=True)
class GroupModelFit:
    """A sampled group model: summaries, diagnostics, how it was built, and the posterior.

    Attributes
    ----------
    metric : str
    group_curves, effects : pandas.DataFrame
        See :func:`summarise_group_model`.
    joint : pandas.DataFrame
        See :func:`summarise_joint`.
    diagnostics : Diagnostics
    parameterisation, parameterisation_reason : str
    spec : GroupModelSpec
    messages : tuple of str
        The sampler's warnings.
    posterior : arviz.InferenceData
    """

    metric: str
    group_curves: pd.DataFrame
    effects: pd.DataFrame
    joint: pd.DataFrame
    diagnostics: Diagnostics
    parameterisation: str
    parameterisation_reason: str
    spec: GroupModelSpec
    messages: tuple[str, ...]
    posterior: object = None

    def row(self, data: GroupModelData) -> dict[str, object]:
        """Return the model's row of the diagnostics table: how it was built and what the gate found.

        Parameters
        ----------
        data : GroupModelData
            The data the model was fitted to.

        Returns
        -------
        dict
            Keys :data:`DIAGNOSTIC_COLUMNS`.
        """
        return {"metric": self.metric, "likelihood": data.kind, "trend": self.spec.trend,
                "parameterisation": self.parameterisation,
                "parameterisation_reason": self.parameterisation_reason,
                "n_participants": len(data.participants), "n_blocks": len(data.units),
                "n_observations": len(data.y), **self.diagnostics.row(),
                "sampler_messages": "; ".join(self.messages)}


def fit_group_model(data: GroupModelData, contrasts: Sequence[tuple[str, str]], *, trend: str = "categorical",
                    parameterisation: str = "auto", draws: int = 1000, chains: int = 4, tune: int = 1000,
                    seed: int = 0, cores: int = 1, progress: bool = False, gate: Gate = Gate()) -> GroupModelFit:
    """Return the sampled hierarchical model of one metric, summarised per group x block and contrast.

    The intercepts' form follows the strength of the participants' data
    (:func:`foretell.hierarchical.forms.choose_by_strength` on
    :func:`participant_intercepts`) unless ``parameterisation`` says. The
    posterior passes ``gate`` (R-hat, bulk ESS, divergences; the group model
    is not compared by PSIS-LOO, so its Pareto k is reported, not checked)
    or every summary is NaN with ``called`` False. Summaries: per group x
    block and contrast x block (:func:`summarise_group_model`), and per
    contrast over all blocks (:func:`summarise_joint`).

    Parameters
    ----------
    data : GroupModelData
    contrasts : sequence of (str, str)
        (group, reference) pairs.
    trend : {"categorical", "linear"}
    parameterisation : {"auto", "centred", "non-centred"}
    draws, chains, tune, seed, cores, progress
        Passed to :func:`foretell.hierarchical.sampling.sample`.
    gate : Gate, default Gate()

    Returns
    -------
    GroupModelFit
    """
    est, se = participant_intercepts(data)
    how, reason = choose_by_strength(est, se, data.group, parameterisation)
    spec = GroupModelSpec(trend=trend, parameterisation=how)
    idata, sampler, messages = sample(group_structure(data, spec), data=group_data(data, spec), draws=draws,
                                      tune=tune, chains=chains, seed=seed, cores=cores, progress=progress)
    idata.add_groups(log_likelihood={"y": pointwise_loglik(data, idata)}, dims={"y": ["observation"]})
    diag = diagnose(idata, sampler, gate, [v for v in idata.posterior.data_vars if not v.endswith(("_z", "_raw"))])
    curves, effects = summarise_group_model(data, idata, contrasts, called=diag.ok)
    joint = summarise_joint(data, idata, contrasts, called=diag.ok)
    return GroupModelFit(data.metric, curves, effects, joint, diag, how, reason, spec, tuple(messages), idata)


def pointwise_loglik(data: GroupModelData, idata: object) -> np.ndarray:
    """Return (chains, draws, observations): each participant x block value's log-likelihood at every draw.

    The linear predictor eta_ib of :func:`build_model` rebuilt from the
    posterior's ``cell``, ``intercept`` and ``block_slope``; binomial
    log C(n, y) + y log logistic(eta) + (n - y) log logistic(-eta), or
    Gaussian log Normal(y | eta, sigma) (common practice).

    Parameters
    ----------
    data : GroupModelData
    idata : arviz.InferenceData
        A posterior of :func:`build_model` on ``data``.

    Returns
    -------
    numpy.ndarray
    """
    post = idata.posterior
    cell = post["cell"].to_numpy()
    person, block, pos = data.participant, data.block, data.position
    if "intercept" in post:
        residual = cell - cell.mean(axis=-1, keepdims=True)
        eta = post["intercept"].to_numpy()[..., person]
        if "block_slope" in post:
            trend = (cell * pos).sum(axis=-1) / np.sum(pos ** 2)
            residual = residual - trend[..., None] * pos
            eta = eta + post["block_slope"].to_numpy()[..., person] * pos[block]
        eta = eta + residual[..., data.group[person], block]
    else:
        eta = cell[..., data.group[person], block]
    if data.kind == "binomial":
        y, n = data.y, data.n
        choose = gammaln(n + 1.0) - gammaln(y + 1.0) - gammaln(n - y + 1.0)
        return choose + y * log_expit(eta) + (n - y) * log_expit(-eta)
    sigma = post["sigma"].to_numpy()[..., None]
    return -0.5 * ((data.y - eta) / sigma) ** 2 - np.log(sigma) - 0.5 * math.log(2.0 * math.pi)


def _scale_draws(data: GroupModelData, cell: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return (curve draws on the metric's own scale, draws on the comparison scale) of the cell means."""
    if data.kind == "binomial":
        rate = expit(cell)
        return rate, rate
    value = cell * data.spread + data.centre
    return (np.exp(value) if data.log else value), value


def summarise_group_model(data: GroupModelData, idata: object, contrasts: Sequence[tuple[str, str]], *,
                          called: bool) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return (group curves, effects) of a sampled group model; every number NaN when not ``called``.

    Group curves: per group x block the posterior mean and HDI
    (:func:`foretell.stats.intervals.hdi`) of a typical participant's value
    (random effects at 0): the rate logistic(cell) for a rate, the value
    (exp of it for log metrics) for a continuous metric. Effects: per
    contrast x block the posterior of the difference group - reference on
    the comparison scale (rate difference; log units for log metrics), its
    HDI and P(difference > 0). Only group x block cells with data are
    summarised, and a contrast only in blocks where both groups have data.

    Parameters
    ----------
    data : GroupModelData
    idata : arviz.InferenceData
    contrasts : sequence of (str, str)
    called : bool
        Whether the posterior passed its gate.

    Returns
    -------
    (pandas.DataFrame, pandas.DataFrame)
        Columns group, session, block, metric, mean, hdi95_low, hdi95_high,
        called; and contrast, session, block, metric, diff_mean, hdi95_low,
        hdi95_high, prob_positive, called.
    """
    cell = idata.posterior["cell"].to_numpy()  # (chain, draw, group, block)
    curve, compared = _scale_draws(data, cell)
    present = data.has_cell()
    nothing = (math.nan, math.nan)
    curve_rows, effect_rows = [], []
    for b, (session, block) in enumerate(data.units):
        for g, name in enumerate(data.groups):
            if not present[g, b]:
                continue
            low, high = hdi(curve[..., g, b]) if called else nothing
            curve_rows.append({"group": name, "session": session, "block": block, "metric": data.metric,
                               "mean": float(curve[..., g, b].mean()) if called else math.nan,
                               "hdi95_low": low, "hdi95_high": high, "called": called})
        for g_name, ref_name in contrasts:
            if g_name not in data.groups or ref_name not in data.groups:
                continue
            g, r = data.groups.index(g_name), data.groups.index(ref_name)
            if not (present[g, b] and present[r, b]):
                continue
            diff = compared[..., g, b] - compared[..., r, b]
            low, high = hdi(diff) if called else nothing
            effect_rows.append({"contrast": f"{g_name}-{ref_name}", "session": session, "block": block,
                                "metric": data.metric, "diff_mean": float(diff.mean()) if called else math.nan,
                                "hdi95_low": low, "hdi95_high": high,
                                "prob_positive": float((diff > 0).mean()) if called else math.nan,
                                "called": called})
    return pd.DataFrame(curve_rows), pd.DataFrame(effect_rows)


def summarise_joint(data: GroupModelData, idata: object, contrasts: Sequence[tuple[str, str]], *,
                    called: bool) -> pd.DataFrame:
    """Return per contrast the posterior of the group difference averaged over blocks and of its block slope.

    With d_b the draws of the difference group - reference in block b on the
    comparison scale (as in :func:`summarise_group_model`), over the blocks
    where both groups have data, numbered x_b in run order (0, 1, ... over
    the model's blocks): "mean over blocks" is mean_b d_b; "learning slope"
    is the least-squares slope sum_b (x_b - mean x) d_b / sum_b (x_b - mean x)^2,
    the difference between the groups' slopes per block (NaN with one
    common block). Each is summarised by its posterior mean, HDI
    (:func:`foretell.stats.intervals.hdi`) and P(> 0): one interval for all
    blocks together, so it carries no per-block multiplicity. Every number
    is NaN when not ``called``.

    Parameters
    ----------
    data : GroupModelData
    idata : arviz.InferenceData
    contrasts : sequence of (str, str)
    called : bool
        Whether the posterior passed its gate.

    Returns
    -------
    pandas.DataFrame
        Columns contrast, metric, summary (:data:`foretell.curves.TREND_SUMMARIES`),
        estimate, low, high, prob_positive, n_blocks (the common blocks), called.
    """
    _, compared = _scale_draws(data, idata.posterior["cell"].to_numpy())
    present = data.has_cell()
    rows = []
    for g_name, ref_name in contrasts:
        if g_name not in data.groups or ref_name not in data.groups:
            continue
        g, r = data.groups.index(g_name), data.groups.index(ref_name)
        common = np.flatnonzero(present[g] & present[r])
        if not len(common):
            continue
        diff = compared[..., g, common] - compared[..., r, common]
        x = common - common.mean()
        draws = {TREND_SUMMARIES[0]: diff.mean(axis=-1),
                 TREND_SUMMARIES[1]: (diff * x).sum(axis=-1) / (x ** 2).sum() if len(common) > 1 else None}
        for summary, values in draws.items():
            ok = called and values is not None
            low, high = hdi(values) if ok else (math.nan, math.nan)
            rows.append({"contrast": f"{g_name}-{ref_name}", "metric": data.metric, "summary": summary,
                         "estimate": float(values.mean()) if ok else math.nan, "low": low, "high": high,
                         "prob_positive": float((values > 0).mean()) if ok else math.nan,
                         "n_blocks": len(common), "called": called})
    return pd.DataFrame(rows, columns=["contrast", "metric", "summary", "estimate", "low", "high", "prob_positive",
                                       "n_blocks", "called"])
