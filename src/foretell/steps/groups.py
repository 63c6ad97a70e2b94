"""The groups step: learning curves per participant and block, and the comparison of learning between groups."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from functools import partial
from typing import ClassVar

import numpy as np
import pandas as pd

from foretell.curves import (METRICS, available_metrics, context_learning, label_order, learning_curves, main_rate,
                             trial_frame)
from foretell.errors import UsageError
from foretell.folders import as_fit
from foretell.hierarchical.gate import Gate
from foretell.hierarchical.group_model import DIAGNOSTIC_COLUMNS, TRENDS, fit_group_model, model_data
from foretell.hierarchical.sampling import sampling_cores
from foretell.inputs import as_log, as_task
from foretell.logs import ValidatedLog
from foretell.progress import shown, stage
from foretell.regressors import kept_by_fit
from foretell.results import Result
from foretell.stats.intervals import CI_LEVEL, HDI_PROB
from foretell.stats.permutation import DEFAULT_PERMUTATIONS
from foretell.steps.contrasts import (MIN_GROUP_SIZE, MODEL_COLUMNS, PARAM_COLUMNS, joint_effects,
                                      model_effects, parameter_effects, permutation_effects)
from foretell.steps.guesses import FitResult, fit as fit_guesses
from foretell.tasks import Task
from foretell.validation import check_count, check_n_jobs, check_option, check_seed, child_int


@dataclass(frozen=True, eq=False, kw_only=True)
class GroupResult(Result):
    """Learning curves and group comparisons of a study (:func:`compare_groups`).

    Attributes
    ----------
    curves : pandas.DataFrame
        :func:`foretell.curves.learning_curves`.
    group_curves : pandas.DataFrame
        Group x block x metric: the participants' mean, and the group model's
        posterior mean and HDI of a typical participant (with ``called``).
    group_effects : pandas.DataFrame
        :func:`~foretell.steps.contrasts.permutation_effects` beside the
        model's difference, HDI and P(difference > 0), on the same scale;
        ``hdi_adjusted`` (False where an HDI is given) says that the per-block
        HDIs are not adjusted for looking at many blocks.
    group_joint : pandas.DataFrame
        :func:`~foretell.steps.contrasts.joint_effects`: per metric and
        contrast, the difference averaged over blocks and in the learning
        slope, each with one interval for all blocks.
    group_models, group_params : pandas.DataFrame
        :func:`~foretell.steps.contrasts.model_effects` and
        :func:`~foretell.steps.contrasts.parameter_effects`.
    group_diagnostics : pandas.DataFrame
        One row per group model: how it was built, and what the gate found.
    context_learning : pandas.DataFrame
        :func:`foretell.curves.context_learning`.
    """

    step: ClassVar[str] = "groups"
    curves: pd.DataFrame
    group_curves: pd.DataFrame
    group_effects: pd.DataFrame
    group_joint: pd.DataFrame
    group_models: pd.DataFrame
    group_params: pd.DataFrame
    group_diagnostics: pd.DataFrame
    context_learning: pd.DataFrame

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return the tables by file stem (``curves`` -> curves.csv)."""
        return {"curves": self.curves, "group_curves": self.group_curves, "group_effects": self.group_effects,
                "group_joint": self.group_joint, "group_models": self.group_models, "group_params": self.group_params,
                "group_diagnostics": self.group_diagnostics, "context_learning": self.context_learning}

    def texts(self) -> dict[str, str]:
        """Return summary.txt: the notes, one per line."""
        return {"summary.txt": "".join(f"{n}\n" for n in self.notes)}

    def figure_makers(self) -> dict[str, Callable[[], object]]:
        """Return the learning curve of each metric (``curve_<metric>``) and ``context_learning``, undrawn."""
        from foretell.plots.groups import context_figure, curve_figure

        shown = set(self.group_curves["metric"])
        makers = {f"curve_{m}": partial(curve_figure, self.group_curves, METRICS[m], curves=self.curves,
                                        seed=self.settings.get("seed", 0), **self._references(m))
                  for m in self.settings.get("metrics", METRICS) if m in shown}
        if len(self.context_learning):
            makers["context_learning"] = partial(context_figure, self.context_learning)
        return makers

    def _references(self, metric: str) -> dict[str, float]:
        """Return the reference lines of a rate's curve: chance guessing (1/m) and the best the source allows."""
        if metric not in ("accuracy", "optimal_rate"):
            return {}
        best = 1.0 if metric == "optimal_rate" else self.task.accuracy_ceiling() if self.task.has_source else None
        return {"chance": 1.0 / len(self.task.symbols), "ceiling": best}


# --------------------------------------------------------------------------- the whole comparison


def _group_curves(curves: pd.DataFrame, fitted: Sequence[pd.DataFrame]) -> pd.DataFrame:
    """Return per group x block x metric the participants' mean and the model's posterior summary."""
    base = curves.groupby(["group", "session", "block", "metric"], sort=False)["value"] \
        .agg(participant_mean="mean", n_participants="count").reset_index()
    post = pd.concat(fitted, ignore_index=True) if fitted else pd.DataFrame(
        columns=["group", "session", "block", "metric", "mean", "hdi95_low", "hdi95_high", "called"])
    out = base.merge(post, on=["group", "session", "block", "metric"], how="left")
    out["unit"] = out["metric"].map(lambda m: METRICS[m].unit)
    out["called"] = out["called"].astype("boolean")
    columns = ["group", "session", "block", "metric", "unit", "n_participants", "participant_mean", "mean",
               "hdi95_low", "hdi95_high", "called"]
    order = {m: i for i, m in enumerate(METRICS)}
    out = out.assign(_m=out["metric"].map(order), _s=label_order(out["session"]), _b=label_order(out["block"]))
    return out.sort_values(["_m", "group", "_s", "_b"], kind="stable")[columns].reset_index(drop=True)


def _group_effects(perm: pd.DataFrame, fitted: Sequence[pd.DataFrame]) -> pd.DataFrame:
    """Return the permutation tests beside the model's per-block differences, flagged as unadjusted HDIs."""
    keys = ["contrast", "session", "block", "metric"]
    post = pd.concat(fitted, ignore_index=True) if fitted else pd.DataFrame(
        columns=[*keys, "diff_mean", "hdi95_low", "hdi95_high", "prob_positive", "called"])
    out = perm.merge(post, on=keys, how="left")
    out["called"] = out["called"].astype("boolean")
    out["hdi_adjusted"] = pd.array(np.where(out["hdi95_low"].notna(), False, None), dtype="boolean")
    return out


def compare_groups(log: object, task: object, *, fit: object = None, models: Sequence[str] | None = None,
                   seed: int | np.random.Generator = 0, n_jobs: int = 1, progress: bool | None = None,
                   reference: str | None = None, metrics: Sequence[str] | None = None, trend: str = "categorical",
                   bayes: bool = True, draws: int = 1000, chains: int = 4, tune: int = 1000,
                   n_permutations: int = DEFAULT_PERMUTATIONS, parameterisation: str = "auto",
                   gate: Gate = Gate()) -> GroupResult:
    """Return the learning curves and the group comparisons of a study (:class:`GroupResult`).

    Every group is compared with ``reference`` (contrast "B-A" = group B
    minus reference A): per block and metric, by a permutation test with
    Holm's correction (:func:`~foretell.steps.contrasts.permutation_effects`)
    and, for the modelled metrics, by a hierarchical group x block model
    (:func:`foretell.hierarchical.group_model.fit_group_model`: binomial for
    the design's main rate, Gaussian for continuous metrics; "not called"
    when it fails ``gate``) whose per-block HDIs are not adjusted for the
    number of blocks; over all blocks at once, by the difference averaged
    over blocks and in the learning slope
    (:func:`~foretell.steps.contrasts.joint_effects`); the groups' model and
    family frequencies (:func:`~foretell.steps.contrasts.model_effects`) and
    fitted parameters (:func:`~foretell.steps.contrasts.parameter_effects`).
    A group with fewer than :data:`MIN_GROUP_SIZE` participants gets curves only.
    Metrics: :mod:`foretell.curves`.

    Parameters
    ----------
    log, task
        Converted by :func:`foretell.inputs.as_log` and :func:`foretell.inputs.as_task`.
    fit : FitResult or path, optional
        Earlier fits (:func:`foretell.folders.as_fit`); without them a guess
        design is fitted here (:func:`foretell.steps.guesses.fit` with
        ``models``). Participants the fit left out are left out here (noted).
    models : sequence of str, optional
        The models fitted when ``fit`` is not given.
    seed, n_jobs : int, default 0 and 1
        The seed (or a Generator; tests and intervals: :mod:`foretell.steps.contrasts`, the model of a
        metric: ``child_int(seed, "groups", metric)``); workers, and chains in parallel.
    progress : bool, optional
        Participants fitted and models sampled, on stderr (:func:`foretell.progress.shown`: True
        a bar on a terminal and plain lines otherwise; None only on a terminal).
    reference : str, optional
        Default: the first group in sorted order.
    metrics : sequence of str, optional
        Default: every metric the design and inputs allow (:func:`foretell.curves.available_metrics`).
    trend : {"categorical", "linear"}, default "categorical"
    bayes, draws, chains, tune : bool and int, default True, 1000, 4, 1000
        Run the group models; per chain; chains >= 2 (R-hat compares chains; Vehtari et al., 2021).
    n_permutations : int, default :data:`foretell.stats.permutation.DEFAULT_PERMUTATIONS`
        Re-splits of every permutation test, and of the permutation intervals of the summary over blocks.
    parameterisation : {"auto", "centred", "non-centred"}, default "auto"
    gate : Gate, default Gate()

    Returns
    -------
    GroupResult

    Raises
    ------
    UsageError
        For options out of range, an unknown reference group, or a metric the inputs do not allow.
    """
    task = as_task(task)
    log = as_log(log, task)
    seed, n_jobs = check_seed(seed), check_n_jobs(n_jobs)
    check_option("trend", trend, TRENDS)
    n_permutations = check_count("n_permutations", n_permutations, 1)
    if bayes:
        draws, chains, tune = (check_count(k, v, low) for k, v, low in
                               (("draws", draws, 1), ("chains", chains, 2), ("tune", tune, 0)))
    log, fitted, notes = _fitted(log, task, fit, models=models, seed=seed, n_jobs=n_jobs, progress=progress)
    frame = trial_frame(log)
    fits = None if fitted is None else fitted.fits.assign(  # the log's groups rule
        group=fitted.fits["participant"].astype(str).map(frame.groupby("participant")["group"].first()))
    metrics = _chosen_metrics(task, frame, fits is not None, metrics)
    groups, reference, contrasts, more = _contrasts(frame, reference)
    notes += more
    if task.response == "guess" and not task.has_source:
        notes.append("no optimal_rate: the task gives no source, so the rate modelled is accuracy")
    curves = learning_curves(log, task, metrics, **({} if fitted is None else {
        "fits": fitted.fits, "blocks": fitted.blocks, "winners": fitted.winners, "contexts": fitted.contexts}))
    modelled = _Modelled()
    if contrasts and bayes:
        run = {"draws": draws, "chains": chains, "tune": tune, "cores": sampling_cores(chains, n_jobs),
               "progress": shown(progress) == "bar", "gate": gate, "trend": trend,  # the sampler's own bar
               "parameterisation": parameterisation}
        modelled = _group_models(curves, task, metrics, groups, contrasts, seed, run, progress)
        notes += modelled.notes
    elif contrasts:
        notes.append("hierarchical models not run (bayes=False): permutation tests and intervals only")
    group_models, group_params, more = _fit_contrasts(fits, contrasts, task, n_permutations, seed)
    notes += more
    settings = {"models": None if fitted is None else list(fitted.model_ids), "reference": reference,
                "contrasts": [f"{g}-{r}" for g, r in contrasts], "metrics": list(metrics), "trend": trend,
                "draws": draws, "chains": chains, "tune": tune, "seed": seed, "bayes": bayes,
                "n_permutations": n_permutations, "hdi_prob": HDI_PROB,
                "ci_level": CI_LEVEL, "parameterisation": parameterisation, "gate": gate.settings(), "n_jobs": n_jobs}
    return GroupResult(task=task, specs=() if fitted is None else tuple(fitted.specs), settings=settings,
                       notes=tuple(notes), curves=curves, group_models=group_models, group_params=group_params,
                       context_learning=context_learning(log, task),
                       **modelled.tables(curves, contrasts, n_permutations, seed))


def _fitted(log: ValidatedLog, task: Task, fit: object, **options: object
            ) -> tuple[ValidatedLog, FitResult | None, list[str]]:
    """Return (the log without the participants the fit left out, the fit, notes naming them).

    The fit is ``fit`` (:func:`foretell.folders.as_fit`), else in a guess
    design the guesses step run here with ``options``, else None.
    """
    fitted = as_fit(fit, log, task)
    if fitted is None and task.response == "guess":
        fitted = fit_guesses(log, task, **options)
    keep, notes = kept_by_fit(log, fitted.excluded if fitted is not None else None)
    if not keep.all():
        log = replace(log, frame=log.frame[keep].reset_index(drop=True))
    return log, fitted, notes


def _fit_contrasts(fits: pd.DataFrame | None, contrasts: Sequence[tuple[str, str]], task: Task,
                   n_permutations: int, seed: int) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
    """Return (group_models, group_params, notes): the groups' model frequencies and fitted parameters compared."""
    if fits is None:
        return (pd.DataFrame(columns=MODEL_COLUMNS), pd.DataFrame(columns=PARAM_COLUMNS),
                ["no fit results given: no gain_bits, inv_temp, model-frequency or parameter comparison"])
    if not contrasts:
        return pd.DataFrame(columns=MODEL_COLUMNS), pd.DataFrame(columns=PARAM_COLUMNS), []
    group_models, notes = model_effects(fits, contrasts, task)
    return group_models, parameter_effects(fits, contrasts, n_permutations=n_permutations, seed=seed), notes


def _chosen_metrics(task: Task, frame: pd.DataFrame, has_fits: bool, metrics: Sequence[str] | str | None
                    ) -> list[str]:
    """Return the metrics asked for (default: every one available), refusing those not available."""
    has_rt = "rt" in frame.columns and bool(frame["rt_ok"].astype(bool).any())
    allowed = available_metrics(task, has_fits, has_rt)
    if metrics is None:
        return allowed
    metrics = [metrics] if isinstance(metrics, str) else list(metrics)
    wrong = [m for m in metrics if m not in allowed]
    if wrong:
        raise UsageError(f"metric(s) {', '.join(map(repr, wrong))} not available here; available: "
                         f"{', '.join(allowed)}")
    return metrics


def _contrasts(frame: pd.DataFrame, reference: str | None
               ) -> tuple[list[str], str, list[tuple[str, str]], list[str]]:
    """Return (the groups large enough for inference, the reference, the contrasts, notes on what was not made)."""
    groups = sorted(frame["group"].unique())
    if reference is None:
        reference = groups[0]
    elif reference not in groups:
        raise UsageError(f"reference group {reference!r} is not in the log; groups: {', '.join(groups)}")
    sizes = frame.groupby("group")["participant"].nunique()
    small = [g for g in groups if sizes[g] < MIN_GROUP_SIZE]
    notes = []
    if len(groups) == 1:
        notes.append(f"one group ({groups[0]}): learning curves only, no group inference was made")
    notes += [f"group {g} has {sizes[g]} participant(s), fewer than {MIN_GROUP_SIZE}: curves only, no inference "
              "about it" for g in small if len(groups) > 1]
    contrasts = [] if reference in small else [(g, reference) for g in groups if g != reference and g not in small]
    if len(groups) > 1 and reference in small:
        notes.append(f"the reference group {reference} is too small: no group inference was made")
    return [g for g in groups if g not in small], reference, contrasts, notes


@dataclass(frozen=True)
class _Modelled:
    """What the hierarchical models of the metrics gave: their summaries (one frame per metric), rows, notes."""

    curves: list[pd.DataFrame] = field(default_factory=list)
    effects: list[pd.DataFrame] = field(default_factory=list)
    joint: list[pd.DataFrame] = field(default_factory=list)
    diagnostics: list[dict[str, object]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def tables(self, curves: pd.DataFrame, contrasts: Sequence[tuple[str, str]], n_permutations: int,
               seed: int) -> dict[str, pd.DataFrame]:
        """Return group_curves, group_effects (beside the permutation tests), group_joint and group_diagnostics."""
        perm = permutation_effects(curves, contrasts, n_permutations=n_permutations, seed=seed)
        posterior = pd.concat(self.joint, ignore_index=True) if self.joint else None
        return {"group_curves": _group_curves(curves, self.curves), "group_effects": _group_effects(perm, self.effects),
                "group_joint": joint_effects(curves, contrasts, posterior=posterior, n_permutations=n_permutations,
                                             seed=seed),
                "group_diagnostics": pd.DataFrame(self.diagnostics, columns=DIAGNOSTIC_COLUMNS)}


def _group_models(curves: pd.DataFrame, task: Task, metrics: Sequence[str], groups: Sequence[str],
                  contrasts: Sequence[tuple[str, str]], seed: int, run: Mapping[str, object],
                  progress: bool | None) -> _Modelled:
    """Return the summaries, diagnostics rows and notes of the hierarchical model of each modelled metric."""
    out = _Modelled()
    modelled = [m for m in metrics if METRICS[m].modelled and (METRICS[m].kind != "rate" or m == main_rate(task))]
    with stage("groups", "models sampled", len(modelled), progress, eta=False, every=0) as bar:
        for metric in modelled:
            bar.detail(metric)
            out = _group_model(out, curves, metric, groups, contrasts, seed, run)
            bar.advance()
    return out


def _group_model(out: _Modelled, curves: pd.DataFrame, metric: str, groups: Sequence[str],
                 contrasts: Sequence[tuple[str, str]], seed: int, run: Mapping[str, object]) -> _Modelled:
    """Return ``out`` with the hierarchical model of ``metric`` added (or a note saying why there is none)."""
    gate = run["gate"]
    data = model_data(curves, metric, groups, kind=METRICS[metric].likelihood, log=METRICS[metric].log)
    if len(data.groups) < 2:
        out.notes.append(f"{metric}: no hierarchical model (fewer than two groups with values)")
    else:
        fit = fit_group_model(data, contrasts, seed=child_int(seed, "groups", metric), **run)
        out.curves.append(fit.group_curves)
        out.effects.append(fit.effects)
        out.joint.append(fit.joint)
        out.diagnostics.append(fit.row(data))
        if not fit.diagnostics.ok:
            out.notes.append(f"{metric}: hierarchical model not called ({'; '.join(fit.diagnostics.reasons)})")
        elif fit.diagnostics.provisional:
            out.notes.append(f"{metric}: hierarchical model provisional (fewer chains or draws than the full run of "
                             f"{gate.full_chains} x {gate.full_draws})")
    return out
