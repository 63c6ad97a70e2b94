"""Sampling the measure models of every learner and the baseline: refits, diagnostics, comparison, population."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from foretell.hierarchical.forms import choose_by_strength
from foretell.hierarchical.gate import Diagnostics, Gate, diagnose
from foretell.hierarchical.loo import ELPD_COLUMNS, RefitWrapper, compare_loo, exact_refits, psis_loo
from foretell.hierarchical.measure_model import (SLOPE_VARIABLES, PooledUnits, leave_out, measure_data,
                                                 measure_structure, participant_estimates, pool_measure, unit_loglik)
from foretell.hierarchical.sampling import sample
from foretell.measure import BASELINE_MODEL, Measure
from foretell.progress import stage
from foretell.validation import child_int

HIERARCHICAL = ("intercept", "practice", "slope")
"""The participant-level parameters of :func:`build_measure_model` drawn from a population."""
DIAGNOSTIC_COLUMNS = ("model", "sampler", "intercept_form", "practice_form", "slope_form", "form_reason", "chains",
                      "draws", "target_accept", "rhat_max", "ess_bulk_min", "divergences", "pareto_k_max",
                      "loo_refits", "ok", "provisional", "reasons")
"""Columns of :func:`fit_measure_models`' diagnostics table."""
POPULATION_COLUMNS = ("model", "group", "parameter", "unit", "mean", "ci95_low", "ci95_high", "n_participants")
"""Columns of :func:`fit_measure_models`' population table (95% equal-tailed posterior intervals)."""


class MeasureRefits(RefitWrapper):
    """Exact leave-one-unit-out refits of the measure model
    (:func:`~foretell.hierarchical.measure_model.leave_out`), on the model's one compiled structure.

    Parameters
    ----------
    pooled : PooledUnits
    forms : mapping of str to str
        The parameterisation of the full model, kept in every refit.
    run : mapping
        ``draws``, ``tune``, ``chains``, ``cores``, ``progress`` of :func:`sample`.
    seed : int
        The run's seed; the refit without unit u samples with
        ``child_int(seed, *labels, "without", <u's label>)``, the same
        whichever other units are refitted.
    labels : tuple
        What the model is (e.g. ("rt", "count-1")).
    gate : Gate
        Each refit is diagnosed against it (R-hat, ESS, divergences).
    var_names : sequence of str
        The parameters the gate checks.
    """

    def __init__(self, pooled: PooledUnits, forms: Mapping[str, str], run: Mapping[str, object], seed: int,
                 labels: tuple, gate: Gate, var_names: Sequence[str]) -> None:
        self.pooled, self.forms, self.run, self.seed = pooled, forms, dict(run), seed
        self.labels, self.gate, self.var_names = labels, gate, list(var_names)

    def sel_observations(self, unit: int) -> tuple[PooledUnits, PooledUnits]:
        """Return (the data without ``unit``, every unit)."""
        return leave_out(self.pooled, unit)

    def sample(self, data: PooledUnits, unit: int) -> tuple[object, tuple[str, ...]]:
        """Return (the posterior without ``unit``, the gate's reasons to reject it)."""
        seed = child_int(self.seed, *self.labels, "without", self.pooled.units[unit])
        idata, sampler, _ = _sampled(data, self.forms, seed, self.run)
        return idata, diagnose(idata, sampler, self.gate, self.var_names).reasons

    def log_likelihood_i(self, excluded: PooledUnits, posterior: object, unit: int) -> np.ndarray:
        """Return the left-out unit's log-likelihood at every draw of the refitted posterior."""
        return unit_loglik(posterior, excluded)[..., unit]


@dataclass(frozen=True, eq=False)
class MeasureFit:
    """A sampled measure model: the posterior, its PSIS-LOO (exact where refitted) and the gate's findings.

    Attributes
    ----------
    posterior : arviz.InferenceData
        With a ``log_likelihood`` group over the units.
    loo : arviz.ELPDData or None
        None when the model was not scored by PSIS-LOO.
    diagnostics : Diagnostics
    forms, form_reasons : dict of str to str
        The parameterisation of each parameter of :data:`HIERARCHICAL`, and why.
    refits : int
        Exact leave-one-out refits made.
    notes : tuple of str
    """

    posterior: object
    loo: object
    diagnostics: Diagnostics
    forms: dict[str, str]
    form_reasons: dict[str, str]
    refits: int
    notes: tuple[str, ...]

    def row(self, name: str) -> dict[str, object]:
        """Return the model's row of the diagnostics table (:data:`DIAGNOSTIC_COLUMNS`)."""
        accept = self.posterior.sample_stats.attrs.get("target_accept", math.nan)
        return {"model": name, "intercept_form": self.forms["intercept"],
                "practice_form": self.forms.get("practice", ""), "slope_form": self.forms.get("slope", ""),
                "form_reason": "; ".join(f"{p}: {why}" for p, why in self.form_reasons.items()),
                **self.diagnostics.row(), "target_accept": accept, "loo_refits": self.refits}


def choose_forms(pooled: PooledUnits, requested: Mapping[str, str]) -> tuple[dict[str, str], dict[str, str]]:
    """Return (forms, reasons) of the participant-level parameters by the strength of each participant's data.

    :func:`foretell.hierarchical.forms.choose_by_strength` on
    :func:`~foretell.hierarchical.measure_model.participant_estimates`, per
    parameter of :data:`HIERARCHICAL` the model has (practice with a trial
    term in the baseline, the slope in learner models) unless ``requested``.

    Parameters
    ----------
    pooled : PooledUnits
    requested : mapping of str to str
        Per parameter of :data:`HIERARCHICAL`: "auto", "centred" or "non-centred".

    Returns
    -------
    (dict of str to str, dict of str to str)
    """
    est, se = participant_estimates(pooled)
    pick = {"intercept": 0}
    if pooled.practice:
        pick["practice"] = 1
    if pooled.slope:
        pick["slope"] = est.shape[1] - 1
    forms: dict[str, str] = {}
    reasons: dict[str, str] = {}
    for name, j in pick.items():
        forms[name], reasons[name] = choose_by_strength(est[:, j], se[:, j], pooled.group_of, requested[name])
    return forms, reasons


def fit_measure_model(pooled: PooledUnits, name: str, *, requested: Mapping[str, str], draws: int, chains: int,
                      tune: int, seed: int, labels: tuple, cores: int = 1, progress: bool = False,
                      gate: Gate = Gate(), refits: int = 10, loo: bool = True) -> MeasureFit:
    """Return the sampled measure model of ``pooled``, checked, and with ``loo`` scored by PSIS-LOO.

    The study's one compiled model
    (:func:`~foretell.hierarchical.measure_model.measure_structure`) on this
    model's data. The forms follow :func:`choose_forms`. The sampler
    resamples a posterior with divergent transitions at a higher target
    acceptance (:func:`foretell.hierarchical.sampling.sample`). With
    ``loo``, units whose Pareto k
    exceeds ``gate.pareto_k_max`` are left out one at a time and the model
    refitted without them (exact leave-one-out; :class:`MeasureRefits`), at
    most ``refits`` of them, and only when the posterior passes the gate on
    every other ground; otherwise the gate fails on k and a note says why.

    Parameters
    ----------
    pooled : PooledUnits
    name : str
        The model's id (in notes).
    requested : mapping of str to str
        Per parameter of :data:`HIERARCHICAL`: "auto", "centred" or "non-centred".
    draws, chains, tune, cores, progress
        Passed to :func:`foretell.hierarchical.sampling.sample`.
    seed : int
        The run's seed; the model samples with ``child_int(seed, *labels)``.
    labels : tuple
        What the model is, e.g. ("rt", "count-1").
    gate : Gate, default Gate()
    refits : int, default 10
        Most exact refits.
    loo : bool, default True
        Score by PSIS-LOO (``MeasureFit.loo``; None without it, and Pareto
        k reported, not checked).

    Returns
    -------
    MeasureFit

    References
    ----------
    Vehtari, A., Gelman, A., & Gabry, J. (2017). Practical Bayesian model
    evaluation using leave-one-out cross-validation and WAIC. Stat. Comput.
    27, 1413-1432.
    """
    forms, reasons = choose_forms(pooled, requested)
    run = {"draws": draws, "tune": tune, "chains": chains, "cores": cores, "progress": progress}
    idata, sampler, messages = _sampled(pooled, forms, child_int(seed, *labels), run)
    idata.add_groups(log_likelihood={"y": unit_loglik(idata, pooled)}, coords={"unit": list(pooled.units)},
                     dims={"y": ["unit"]})
    names = [v for v in idata.posterior.data_vars if not v.endswith("_raw")]
    if loo:
        scored, diag, notes, n_refits = _loo_checked(idata, sampler, pooled, name, names, gate, refits,
                                                     MeasureRefits(pooled, forms, run, seed, labels, gate, names))
    else:
        scored, diag, notes, n_refits = None, diagnose(idata, sampler, gate, names), [], 0
    how = "; ".join(f"{p}: {why}" for p, why in reasons.items())
    what = "baseline model (no learner)" if not pooled.slope else "hierarchical model"
    notes.append(f"{name}: {what} on the standardised outcome ({how}); sampled with {sampler} NUTS, {chains} "
                 f"chains x {draws} draws after {tune} tuning")
    notes += [f"{name}: sampler said: {m}" for m in messages]
    return MeasureFit(idata, scored, diag, forms, reasons, n_refits, tuple(notes))


def _loo_checked(idata: object, sampler: str, pooled: PooledUnits, name: str, names: Sequence[str], gate: Gate,
                 refits: int, wrapper: MeasureRefits) -> tuple[object, Diagnostics, list[str], int]:
    """Return (PSIS-LOO with exact refits where needed, diagnostics, notes, refits made) of a sampled model."""
    loo = psis_loo(idata)
    bad = np.flatnonzero(np.asarray(loo.pareto_k) > gate.pareto_k_max)
    notes, failed, n_refits = [], {}, 0
    high = (f"{name}: {len(bad)} participant x block {'unit has' if len(bad) == 1 else 'units have'} "
            f"Pareto k > {gate.pareto_k_max:g}")
    if len(bad) and not diagnose(idata, sampler, replace(gate, pareto_k_max=math.inf), names, loo=loo).ok:
        notes.append(f"{high}; not refitted: the posterior fails the gate on other grounds")
    elif len(bad) and len(pooled.units) == 1:
        notes.append(f"{high}; a single unit cannot be left out")
    elif 0 < len(bad) <= refits:
        loo, failed = exact_refits(loo, wrapper, bad)
        n_refits = len(bad)
        notes.append(f"{high}: estimated by exact leave-one-out refits")
    elif len(bad):
        notes.append(f"{high}; exact leave-one-out would need as many refits, {refits} allowed "
                     "(refits=, --refits)")
    diag = diagnose(idata, sampler, gate, names, loo=loo)
    if failed:  # the first, and how many more
        (u, why), more = next(iter(failed.items())), len(failed) - 1
        extra = f" (and {more} more of {len(bad)} refits)" if more else ""
        diag = replace(diag, ok=False, reasons=diag.reasons + (
            f"exact refit without {pooled.units[u]}: {', '.join(why)}{extra}",))
    return loo, diag, notes, n_refits


def _sampled(pooled: PooledUnits, forms: Mapping[str, str], seed: int, run: Mapping[str, object]
             ) -> tuple[object, str, list[str]]:
    """Return :func:`sample` of the study's one compiled measure model on ``pooled``; the baseline's posterior
    without the slope's prior-only variables."""
    idata, sampler, messages = sample(measure_structure(pooled), data=measure_data(pooled, forms), seed=seed, **run)
    if not pooled.slope:
        idata.posterior = idata.posterior.drop_vars([v for v in SLOPE_VARIABLES if v in idata.posterior])
    return idata, sampler, messages


def population_rows(idata: object, pooled: PooledUnits, name: str, unit: str) -> list[dict[str, object]]:
    """Return the population table's rows of one model: the mean slope per group, and the residual SD.

    ``slope_mean`` (learner models): posterior mean and 95% equal-tailed
    credible interval (``ci95_low``, ``ci95_high``) of mu_b in the reported unit per bit. ``sigma``: of the mean
    over participants of sigma_i, on the outcome's own scale (log units
    for a log-transformed measure).
    """
    post = idata.posterior
    rows = []
    counts = np.bincount(pooled.group_of, minlength=len(pooled.groups))
    if pooled.slope:
        draws = post["slope_mean"].to_numpy().reshape(-1, len(pooled.groups))
        rows += [_summary(name, group, "slope_mean", unit, draws[:, j], int(counts[j]))
                 for j, group in enumerate(pooled.groups)]
    sigma = post["sigma_outcome"].to_numpy().reshape(-1, len(pooled.participants)).mean(axis=1)
    rows.append(_summary(name, "all", "sigma", "outcome", sigma, len(pooled.participants)))
    return rows


def _summary(model: str, group: str, parameter: str, unit: str, draws: np.ndarray, n: int) -> dict[str, object]:
    low, high = np.quantile(draws, [0.025, 0.975])
    return {"model": model, "group": group, "parameter": parameter, "unit": unit, "mean": float(draws.mean()),
            "ci95_low": float(low), "ci95_high": float(high), "n_participants": n}


def fit_measure_models(measure: Measure, frame: pd.DataFrame, table: Mapping[str, np.ndarray],
                       models: Sequence[str], run: Mapping[str, object], *, seed: int, requested: Mapping[str, str],
                       gate: Gate, refits: int, progress: bool | None = False,
                       sampled: Sequence[str] | None = None, loo: bool = True
                       ) -> tuple[dict[str, object], pd.DataFrame, pd.DataFrame, pd.DataFrame, list[str]]:
    """Return (posteriors, diagnostics, ELPD comparison, population, notes): learner models and the baseline.

    Each sampled learner model's :func:`fit_measure_model` and the
    baseline's (:data:`foretell.measure.BASELINE_MODEL`, sampled with
    ``child_int(seed, "rt", model)``), on the same units and on one compiled
    model; then, with ``loo``, :func:`foretell.hierarchical.loo.compare_loo`
    over the models that pass the gate, with standard errors over
    participants (without it the comparison table is empty).

    Parameters
    ----------
    measure : foretell.measure.Measure
    frame : pandas.DataFrame
    table : mapping of str to numpy.ndarray
        Columns of the :func:`foretell.regressors.regressors` table.
    models : sequence of str
        The learner models' ids, in the table's order.
    run : mapping
        ``draws``, ``chains``, ``tune``, ``cores``, ``progress``.
    seed : int
    requested : mapping of str to str
        Forms per parameter of :data:`HIERARCHICAL`.
    gate : Gate
    refits : int
        Most exact refits per model.
    progress : bool, optional
        Models sampled (:func:`foretell.progress.stage`); default not shown.
    sampled : sequence of str, optional
        The learner models sampled (default: every one of ``models``).
    loo : bool, default True
        Score and compare the models by PSIS-LOO, with exact refits.

    Returns
    -------
    (dict, pandas.DataFrame, pandas.DataFrame, pandas.DataFrame, list of str)
        The diagnostics have columns :data:`DIAGNOSTIC_COLUMNS`, the population :data:`POPULATION_COLUMNS`.
    """
    posteriors, diagnostics, loos, rows, population, notes = {}, {}, {}, [], [], []
    clusters = None
    units = [*((j, m) for j, m in enumerate(models) if sampled is None or m in sampled), (None, BASELINE_MODEL)]
    with stage("rt", "models sampled", len(units), progress, eta=False, every=0) as bar:
        for j, name in units:
            bar.detail(name)
            pooled = pool_measure(measure, frame, table, j, len(models))
            if pooled.n_trials == 0:
                notes.append(f"{name}: no kept trials for the hierarchical model")
                bar.advance()
                continue
            fit = fit_measure_model(pooled, name, requested=requested, seed=seed, labels=("rt", name), gate=gate,
                                    refits=refits, loo=loo, **run)
            posteriors[name], diagnostics[name], loos[name] = fit.posterior, fit.diagnostics, fit.loo
            rows.append(fit.row(name))
            population += population_rows(fit.posterior, pooled, name, measure.slope_name)
            notes += fit.notes
            clusters = pooled.participant
            bar.advance()
    elpd, more = compare_loo(loos, diagnostics, gate, clusters=clusters, baseline=BASELINE_MODEL) if loo else (
        pd.DataFrame(columns=list(ELPD_COLUMNS)), ["no ELPD comparison of the hierarchical models: PSIS-LOO not "
                                                   "requested (loo=True, --loo)"])
    return (posteriors, pd.DataFrame(rows, columns=list(DIAGNOSTIC_COLUMNS)), elpd,
            pd.DataFrame(population, columns=list(POPULATION_COLUMNS)), notes + more)
