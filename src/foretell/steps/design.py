"""The design check: simulate participants on a task's own design, fit them as the analysis does, tabulate."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, ClassVar

import numpy as np
import pandas as pd


from foretell.errors import UsageError
from foretell.fitting.participants import fit_participants
from foretell.inputs import as_task
from foretell.logs import validate_log
from foretell.models import ModelSpec, lookalikes, model_specs
from foretell.progress import stage
from foretell.results import Result
from foretell.simulate import SpecDrawer, check_ranges, simulate_participant, spec_drawer
from foretell.stats.intervals import CI_LEVEL
from foretell.steps.confusion import (TARGET_DIAGONAL, TARGET_SPEARMAN, answer_text, confusion_table, credit,
                                      group_check, inversion_table, parameter_summary)
from foretell.steps.design_rt import EFFECT, RT_DATASETS, RTRecoveryResult, recover_rt
from foretell.steps.guesses import reuse_notes
from foretell.tasks import Task
from foretell.validation import check_count, check_n_jobs, check_seed, child_int, child_rng

if TYPE_CHECKING:
    from matplotlib.figure import Figure

MERGE_SEP = "="
"""Joins the ids of look-alike models counted as one (e.g. ``count-0=count-task``)."""


# -- the result ------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False, kw_only=True)
class RecoveryResult(Result):
    """The tables, answer and figures of a design check (:func:`recover`).

    Attributes
    ----------
    confusion : pandas.DataFrame
        trials, generating_model, fitted_model, fraction (credited participants
        / n: the BIC winner, ties within TIE_BIC sharing the credit, fits that
        did not converge left out), ci95_low, ci95_high (Clopper-Pearson at
        CI_LEVEL on the credited count rounded half to even), n, and on the
        diagonal recovered and n_needed (:func:`foretell.steps.confusion.confusion_table`).
    inversion : pandas.DataFrame
        trials, fitted_model, generating_model, fraction = P(generating |
        fitted) under a uniform prior over generating models, n.
    params : pandas.DataFrame
        trials, model (generating), participant, parameter, true, fitted (by
        the generating model itself), converged.
    recovery_summary : pandas.DataFrame
        trials, model, parameter, spearman, bias (mean fitted - true), rmse, n.
    group_check : pandas.DataFrame
        trials, generating_model, fitted_model, share (of the whole cell and
        GROUP_RESAMPLES bootstrap resamples in which random-effects BMS gives
        the model the top protected exceedance; ties share), n_groups, group_size.
    answer : str
        The answer in words, written as ``answer.txt``.
    rt : RTRecoveryResult or None
        The design check of the RT analysis (:func:`foretell.steps.design_rt.recover_rt`) when it was run:
        its tables, ``rt_answer.txt`` and figure join this result's.

    See Also
    --------
    foretell.steps.confusion : how each table is computed.
    """

    step: ClassVar[str] = "recover"
    confusion: pd.DataFrame
    inversion: pd.DataFrame
    params: pd.DataFrame
    recovery_summary: pd.DataFrame
    group_check: pd.DataFrame
    answer: str
    rt: RTRecoveryResult | None = None

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return every output table by name (the CSV file stems), the RT check's included."""
        return {"confusion": self.confusion, "inversion": self.inversion, "params": self.params,
                "recovery_summary": self.recovery_summary, "group_check": self.group_check,
                **(self.rt.tables() if self.rt is not None else {})}

    def texts(self) -> dict[str, str]:
        """Return ``answer.txt``: the answer in words (and the RT check's ``rt_answer.txt``)."""
        return {"answer.txt": self.answer + "\n", **(self.rt.texts() if self.rt is not None else {})}

    def figure_makers(self) -> dict[str, Callable[[], "Figure"]]:
        """Return a drawer per figure: ``confusion_<T>`` and ``params_<T>`` per trial count, ``recovery``."""
        from foretell.plots import design

        out: dict[str, Callable[[], Figure]] = {}
        for trials, cell in self.confusion.groupby("trials", sort=True):
            out[f"confusion_{trials}"] = lambda cell=cell, trials=trials: design.confusion_heatmap(
                cell, title=f"Model recovery at {trials} trials per participant")
        for trials, cell in self.params.groupby("trials", sort=True):
            out[f"params_{trials}"] = lambda cell=cell, trials=trials: design.true_vs_fitted(
                cell, title=f"Parameter recovery at {trials} trials per participant")
        out["recovery"] = lambda: design.recovery_by_trials(self.confusion, self.recovery_summary,
                                                            TARGET_DIAGONAL, TARGET_SPEARMAN, CI_LEVEL)
        return {**out, **(self.rt.figure_makers() if self.rt is not None else {})}


# -- the public entry point --------------------------------------------------------------------
def recover(task: object, *, models: Sequence[str] | None = None, n_participants: int,
            trial_counts: Sequence[int], fit: object = None, seed: int | np.random.Generator = 0,
            n_jobs: int = 1, progress: bool | None = None,
            ranges: Mapping[str, tuple[float, float]] | None = None,
            merge_lookalikes: bool = False, rt: bool = False, rt_datasets: int = RT_DATASETS,
            rt_effect: float = EFFECT) -> RecoveryResult:
    """Return the model and parameter recovery of ``models`` on the design of ``task``.

    Parameters
    ----------
    task : Task, str or pathlib.Path
        The task (:func:`foretell.inputs.as_task`).
    models : sequence of str, optional
        At least two model ids (default :func:`foretell.models.default_models`).
    n_participants : int
        Simulated participants per generating model and trial count.
    trial_counts : sequence of int
        Trials per participant (one session, the task's block length, the
        last block shorter when T is not a multiple).
    fit : FitResult or a ``foretell fit`` folder, optional
        Real fits whose converged parameters (inv_temp, lapse, leak) are
        resampled for each generating model (:func:`foretell.folders.as_fit`);
        models without fits fall back to the ranges, and the notes say so.
    seed : int or numpy.random.Generator, default 0
        Participant p of cell (T, g) is simulated from
        ``child_rng(seed, "simulate", T, g, p)``, its fits start from
        ``child_int(seed, "fit", T, g)`` and the group check resamples from
        ``child_rng(seed, "groups", T, g)``: a cell does not change when other
        trial counts or models are added.
    n_jobs : int, default 1
        Processes of the fitter; the tables do not depend on it.
    progress : bool, optional
        Cells done, on stderr (:func:`foretell.progress.shown`: True a bar on a terminal
        and plain lines otherwise; None only on a terminal).
    ranges : mapping, optional
        Uniform ranges replacing those of :data:`foretell.simulate.DEFAULT_RANGES`.
    merge_lookalikes : bool, default False
        Simulate and fit models with identical predictions once, under the
        joined name (``count-0=count-task``); otherwise they split the credit.
    rt, rt_datasets, rt_effect : bool, int, float; default False, 20, 0.04
        Also check the RT analysis, first: :func:`foretell.steps.design_rt.recover_rt`
        with the models simulated here, ``n_participants`` per dataset,
        ``trial_counts``, ``seed``, ``n_jobs``, and ``rt_datasets`` and ``rt_effect`` (s per bit).

    Returns
    -------
    RecoveryResult

    Raises
    ------
    UsageError
        For fewer than two models, bad counts, ranges outside the fit bounds.
    InputError
        For fits whose values are outside their domains (naming line and column).

    Notes
    -----
    Every model is fitted to every participant with the analysis's own fitter
    (:func:`foretell.fitting.participants.fit_participants`, no CV, no block
    refits). Recovery on simulated data is necessary for trusting the fits
    of real data, not sufficient: it assumes participants behave as one of
    the candidate models with parameters in the simulated ranges.

    References
    ----------
    Wilson, R. C., & Collins, A. G. E. (2019). Ten simple rules for the
    computational modeling of behavioral data. eLife 8:e49547 (rules 5-6).
    Clopper, C. J., & Pearson, E. S. (1934). Biometrika 26, 404-413.
    Stephan et al. (2009); Rigoux et al. (2014): random-effects selection.

    Examples
    --------
    >>> design = recover("lantern-relay", models=["count-0", "count-1"], n_participants=40,
    ...                  trial_counts=[200, 600])  # doctest: +SKIP
    >>> print(design.answer)  # doctest: +SKIP
    """
    from foretell.folders import as_fit

    task = as_task(task)
    plan = _Plan.make(task, models, merge_lookalikes)
    n_participants, seed, n_jobs = check_count("n_participants", n_participants), check_seed(seed), check_n_jobs(n_jobs)
    counts, bounds = check_trial_counts(trial_counts, plan.warmup), check_ranges(ranges)
    fitted = as_fit(fit, None, task)
    rt_check = recover_rt(task, models=[s.model_id for s in plan.specs.values()], n_participants=n_participants,
                          trial_counts=counts, n_datasets=rt_datasets, effect=rt_effect, seed=seed, n_jobs=n_jobs,
                          progress=progress) if rt else None  # first: its arguments are checked before the fits
    drawers, notes = _drawers(plan, bounds, fitted, _fits_file(fit))
    results = _run_cells(task, plan, drawers, counts, n_participants, seed, n_jobs, progress)
    confusion = confusion_table(pd.concat([r.credit for r in results], ignore_index=True), counts, plan.labels)
    params, groups = (pd.concat([getattr(r, k) for r in results], ignore_index=True) for k in ("params", "groups"))
    notes += [n for r in results for n in r.notes] + [f"RT check: {n}" for n in (rt_check.notes if rt else ())]
    summary = parameter_summary(params, notes)
    settings = {"task": task.name, "models": list(plan.labels), "n_participants": n_participants,
                "trial_counts": list(counts), "ranges": bounds, "fit": fitted is not None, "seed": seed,
                "merge_lookalikes": bool(merge_lookalikes), "rt": dict(rt_check.settings) if rt else None}
    return RecoveryResult(task=task, specs=tuple(plan.specs.values()), settings=settings, notes=tuple(notes),
                          confusion=confusion, inversion=inversion_table(confusion), params=params,
                          recovery_summary=summary, group_check=groups,
                          answer=answer_text(confusion, summary, n_participants), rt=rt_check)


def _run_cells(task: Task, plan: "_Plan", drawers: Mapping[str, SpecDrawer], counts: Sequence[int],
               n_participants: int, seed: int, n_jobs: int, progress: bool | None) -> list["_Cell"]:
    """Return every cell (trial count x generating model), in order, with a progress bar."""
    cells = [(t, g) for t in counts for g in plan.labels]
    results = []
    with stage("recover", "cells done", len(cells), progress) as bar:
        for t, g in cells:
            bar.detail(f"{g} at {t} trials")
            results.append(_run_cell(task, plan, g, drawers[g], n_participants, t, seed, n_jobs))
            bar.advance()
    return results


def _drawers(plan: "_Plan", bounds: Mapping[str, tuple[float, float]], fitted: object,
             source: str | None) -> tuple[dict[str, SpecDrawer], list[str]]:
    """Return the parameter drawer of each generating model (from the reused fits, else the ranges) and notes."""
    notes = [*plan.notes, *(reuse_notes(fitted) if fitted is not None else ())]
    drawers = {}
    for g in plan.labels:
        drawers[g], drawn = spec_drawer(plan.specs[g], bounds, None if fitted is None else fitted.fits, source)
        notes += drawn
    return drawers, notes


def _fits_file(fit: object) -> str | None:
    """Return the fits.csv a fit folder holds (to name it in messages), None for a FitResult or no fit."""
    if not isinstance(fit, (str, Path)):
        return None
    from foretell.folders import step_folder

    return str(step_folder(fit, "fit").path / "fits.csv")


# -- the plan: model labels, look-alikes, validated arguments -----------------------------------
@dataclass(frozen=True)
class _Plan:
    """The models to simulate and fit: one label per distinct model, the spec fitted under it."""

    labels: tuple[str, ...]
    specs: Mapping[str, ModelSpec]
    notes: tuple[str, ...]

    @property
    def warmup(self) -> int:
        """Return the unscored trials at the start of a session (the deepest model's depth)."""
        return max(s.depth for s in self.specs.values())

    def label_of(self) -> dict[str, str]:
        """Return the label of each fitted model id."""
        return {s.model_id: label for label, s in self.specs.items()}

    @classmethod
    def make(cls, task: Task, models: Sequence[str] | None, merge: bool) -> "_Plan":
        """Return the plan of ``models`` (default: the task's default set) on ``task``."""
        if isinstance(models, str):
            models = [m for m in models.split(",") if m.strip()]
        specs = model_specs(None if models is None else list(models), task)
        if len(specs) < 2:
            raise UsageError(f"recovery compares models: give at least two, got {len(specs)}")
        twins = [[s for s in specs if s.model_id in ids] for ids in lookalikes(specs)]
        if merge:
            chosen = {}
            for spec in specs:
                group = next((g for g in twins if spec in g), [spec])
                if spec is group[0]:
                    chosen[MERGE_SEP.join(s.model_id for s in group)] = spec
            notes = [f"{', '.join(s.model_id for s in g)} make identical predictions on {task.name}: "
                     f"simulated and fitted once, as {MERGE_SEP.join(s.model_id for s in g)}" for g in twins]
        else:
            chosen = {s.model_id: s for s in specs}
            notes = [f"{' and '.join(s.model_id for s in g)} make identical predictions on "
                     f"{task.name}: they tie on every participant and share the credit "
                     f"(merge_lookalikes counts them as one model)" for g in twins]
        return cls(tuple(chosen), chosen, tuple(notes))


def check_trial_counts(trials: Sequence[int] | int, warmup: int) -> tuple[int, ...]:
    """Return the trial counts of a design check in increasing order, after checking them.

    Parameters
    ----------
    trials : int or sequence of int
        Each at least ``warmup + 2`` (some scored trials after the warm-up).
    warmup : int
        The unscored trials at the start of a session.

    Returns
    -------
    tuple of int

    Raises
    ------
    UsageError
        For a count too small, none, or one listed twice.
    """
    if isinstance(trials, (int, np.integer)):
        trials = [trials]
    counts = [check_count("every trial count", t, warmup + 2) for t in trials]
    if not counts:
        raise UsageError("give at least one trial count")
    if len(set(counts)) != len(counts):
        raise UsageError(f"trial counts listed twice: {sorted({t for t in counts if counts.count(t) > 1})}")
    return tuple(sorted(counts))


# -- one cell: simulate, fit, credit -------------------------------------------------------------
@dataclass(frozen=True)
class _Cell:
    credit: pd.DataFrame  # trials, generating_model, participant, fitted_model, credit
    params: pd.DataFrame
    groups: pd.DataFrame
    notes: tuple[str, ...]


def _simulate(task: Task, drawer: SpecDrawer, n_participants: int, n_trials: int,
              seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return (log, truth) of one cell's simulated participants: one session each.

    Participant p draws from ``child_rng(seed, "simulate", n_trials, model, p)``.
    """
    width = max(2, len(str(n_participants)))
    logs, truth = [], []
    for k in range(1, n_participants + 1):
        pid = f"p{k:0{width}d}"
        rng = child_rng(seed, "simulate", n_trials, drawer.model, pid)
        spec = drawer.draw(rng)
        learner, values = spec.draw(task, rng)
        session = simulate_participant(task, learner, values["inv_temp"], values["lapse"], n_trials,
                                       rng, rt=spec.rt, miss_rate=spec.miss_rate,
                                       block_length=task.block_length)
        session.insert(0, "participant", pid)
        logs.append(session)
        truth.append({"participant": pid, **values})
    return pd.concat(logs, ignore_index=True), pd.DataFrame(truth)


def _run_cell(task: Task, plan: _Plan, label: str, drawer: SpecDrawer, n_participants: int,
              n_trials: int, seed: int, n_jobs: int) -> _Cell:
    """Return the credit, parameters and group check of the participants generated by ``label``."""
    log, truth = _simulate(task, drawer, n_participants, n_trials, seed)
    validated = validate_log(log, task, source=f"<{label} simulated at {n_trials} trials>")
    tables = fit_participants(validated, task, [plan.specs[g] for g in plan.labels],
                              seed=child_int(seed, "fit", n_trials, label), n_jobs=n_jobs, cv=False,
                              per_block=False, progress=False)
    fits = tables.fits.assign(fitted_model=tables.fits["model"].map(plan.label_of()),
                              converged=tables.fits["converged"].astype(bool))
    credited, notes = credit(fits, n_trials, label)
    if len(tables.excluded):
        notes.append(f"{label} at {n_trials} trials: {len(tables.excluded)} participants had no "
                     "scored guess and were not fitted")
    own = fits[fits["fitted_model"] == label].set_index("participant")
    names = list(plan.specs[label].free)
    params = truth.melt(id_vars="participant", value_vars=names, var_name="parameter", value_name="true")
    params["fitted"] = [own.at[p, n] for p, n in zip(params["participant"], params["parameter"])]
    params["converged"] = params["participant"].map(own["converged"]).astype(bool)
    params.insert(0, "model", label)
    params.insert(0, "trials", n_trials)
    groups = group_check(fits, plan.labels, n_trials, label, child_rng(seed, "groups", n_trials, label))
    return _Cell(credited, params, groups, tuple(notes))
