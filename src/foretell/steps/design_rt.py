"""The design check of the RT analysis: RTs simulated from each learner and from two nulls, analysed by the rt step."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, ClassVar

import numpy as np
import pandas as pd
from joblib import Parallel, delayed


from foretell.cluster import job_count, workers_stopped
from foretell.errors import UsageError
from foretell.inputs import as_task
from foretell.learners.base import check_hyper
from foretell.logs import validate_log
from foretell.models import ModelSpec, lookalikes, model_specs
from foretell.progress import stage
from foretell.results import Result
from foretell.simulate import SpecDrawer, check_ranges, spec_drawer
from foretell.simulate_rt import EFFECT, NULLS, RTSimulation, simulate_dataset
from foretell.stats.intervals import CI_LEVEL
from foretell.steps.measures import analyze_rt
from foretell.steps.rt_power import (FALSE_POSITIVE_LEVEL, NOT_CALLED, TARGET_POWER, power_table, rate_table,
                                     rt_answer)
from foretell.tasks import Task
from foretell.validation import check_count, check_n_jobs, check_seed, child_int

if TYPE_CHECKING:
    from matplotlib.figure import Figure

RT_DATASETS = 20
"""Default simulated datasets per generating process and trial count."""


@dataclass(frozen=True, eq=False, kw_only=True)
class RTRecoveryResult(Result):
    """The tables and answer of the RT design check (:func:`recover_rt`).

    Attributes
    ----------
    rt_power : pandas.DataFrame
        Columns :data:`foretell.steps.rt_power.POWER_COLUMNS`: per trial count, generating process
        (a learner or one of :data:`foretell.simulate_rt.NULLS`) and called learner (or
        :data:`foretell.steps.rt_power.NOT_CALLED`), the datasets in which the RT analysis called it,
        their share and its Clopper-Pearson interval; ``counts_as`` says
        what the row is: "power" (the generating learner called),
        "confusion" (another learner), "false positive" (a learner called on
        a null), "not called".
    rt_rates : pandas.DataFrame
        Columns :data:`foretell.steps.rt_power.RATE_COLUMNS`: per trial count and process the power
        (learners) or false-positive share (nulls: any learner called), its
        interval, the target, whether the interval shows the target is met
        (``shown``), and the datasets that would show it at the observed share.
    answer : str
        The answer in words, written as ``rt_answer.txt``.
    """

    step: ClassVar[str] = "recover_rt"
    rt_power: pd.DataFrame
    rt_rates: pd.DataFrame
    answer: str

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return ``rt_power`` and ``rt_rates`` by file stem."""
        return {"rt_power": self.rt_power, "rt_rates": self.rt_rates}

    def texts(self) -> dict[str, str]:
        """Return ``rt_answer.txt``: the answer in words."""
        return {"rt_answer.txt": self.answer + "\n"}

    def figure_makers(self) -> dict[str, Callable[[], "Figure"]]:
        """Return the drawer of ``rt_power``: power and false positives against trials per participant."""
        from foretell.plots.design import rt_power_figure

        return {"rt_power": lambda: rt_power_figure(self.rt_rates, TARGET_POWER, FALSE_POSITIVE_LEVEL, CI_LEVEL)}


def recover_rt(task: object, *, models: Sequence[str] | None = None, n_participants: int,
               trial_counts: Sequence[int], n_datasets: int = RT_DATASETS, effect: float = EFFECT,
               simulation: RTSimulation = RTSimulation(), seed: int | np.random.Generator = 0, n_jobs: int = 1,
               progress: bool | None = None) -> RTRecoveryResult:
    """Return how often the RT analysis calls each learner on RTs simulated on the design of ``task``.

    For every trial count and generating process (each learner of
    ``models``, and the nulls "practice-only" and "drift-only"),
    ``n_datasets`` datasets of ``n_participants`` simulated participants
    are analysed as the rt step does (:func:`foretell.steps.measures.analyze_rt`
    with ``models``, the learners' values at their defaults, without the
    hierarchical models, which the call does not rest on), and the learner
    it calls is read from ``RTResult.verdict(group="all")``.
    Guesses come from :func:`foretell.simulate.simulate_participant` (the
    generating learner's; on the nulls the models in turn, participant by
    participant) with parameters drawn from
    :data:`foretell.simulate.DEFAULT_RANGES`; RTs from ``simulation``
    (:class:`RTSimulation`), replacing the guess simulator's, missing where
    the guess was missed. Power = the share of a learner's datasets in which
    it is called; false positive = the share of a null's datasets in which
    any learner is called; each with its Clopper-Pearson interval at
    :data:`foretell.stats.intervals.CI_LEVEL`.

    Parameters
    ----------
    task : Task, str or pathlib.Path
        Converted by :func:`foretell.inputs.as_task`.
    models : sequence of str, optional
        At least two learner model ids (default :func:`foretell.models.default_models`).
    n_participants : int
        Simulated participants per dataset.
    trial_counts : sequence of int
        Trials per participant (one session in the task's blocks).
    n_datasets : int, default :data:`RT_DATASETS`
        Datasets per process and trial count.
    effect : float, default :data:`foretell.simulate_rt.EFFECT`
        Seconds per bit at the baseline RT, in [0, 1].
    simulation : RTSimulation, default RTSimulation()
        :class:`foretell.simulate_rt.RTSimulation`.
    seed : int or numpy.random.Generator, default 0
        Participant p of dataset d of cell (T, process) is simulated from
        ``child_rng(seed, "rt", T, process, d, p)``, its analysis seeded with
        ``child_int(seed, "rt-analysis", T, process, d)``.
    n_jobs : int, default 1
        Datasets analysed in parallel; the tables do not depend on it.
    progress : bool, optional
        Cells done, on stderr (:func:`foretell.progress.shown`: True a bar on a terminal
        and plain lines otherwise; None only on a terminal).

    Returns
    -------
    RTRecoveryResult

    Raises
    ------
    UsageError
        For fewer than two models or bad counts and values.

    References
    ----------
    Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed.
    Clopper, C. J., & Pearson, E. S. (1934). Biometrika 26, 404-413.

    Examples
    --------
    >>> check = recover_rt("lantern-relay", models=["count-0", "count-1", "count-2"], n_participants=20,
    ...                    trial_counts=[300, 600], n_datasets=40)  # doctest: +SKIP
    >>> print(check.answer)  # doctest: +SKIP
    """
    from foretell.steps.design import check_trial_counts

    task = as_task(task)
    specs = model_specs(None if models is None else list(models), task)
    if len(specs) < 2:
        raise UsageError(f"the RT design check compares learners: give at least two, got {len(specs)}")
    n_participants = check_count("n_participants", n_participants)
    n_datasets = check_count("n_datasets", n_datasets)
    counts = check_trial_counts(trial_counts, max(s.depth for s in specs))
    check_hyper("effect", effect, 0.0, 1.0)
    if not isinstance(simulation, RTSimulation):
        raise UsageError(f"simulation must be an RTSimulation, got {type(simulation).__name__}")
    seed, n_jobs = check_seed(seed), check_n_jobs(n_jobs)
    plan = _RTPlan(task, tuple(specs), n_participants, effect, simulation, seed)
    called = _run(plan, counts, n_datasets, n_jobs, progress)
    power = power_table(called, counts, plan.labels)
    rates = rate_table(power)
    notes = [f"{' and '.join(ids)} make identical predictions on {task.name}: the RT analysis cannot tell "
             "them apart" for ids in lookalikes(specs)]
    settings = {"task": task.name, "models": list(plan.labels), "n_participants": n_participants,
                "trial_counts": list(counts), "n_datasets": n_datasets, "effect": effect,
                "simulation": asdict(simulation), "seed": seed, "n_jobs": n_jobs}
    return RTRecoveryResult(task=task, specs=tuple(specs), settings=settings, notes=tuple(notes), rt_power=power,
                            rt_rates=rates, answer=rt_answer(rates, n_participants, n_datasets,
                                                             simulation.words(effect)))


@dataclass(frozen=True)
class _RTPlan:
    """What every simulated dataset shares: the task, the learners, the participants, the RT law, the seed."""

    task: Task
    specs: tuple[ModelSpec, ...]
    n_participants: int
    effect: float
    simulation: RTSimulation
    seed: int

    @property
    def labels(self) -> tuple[str, ...]:
        """Return the learners' ids."""
        return tuple(s.model_id for s in self.specs)

    def drawers(self) -> dict[str, SpecDrawer]:
        """Return the parameter drawer of each learner (the default ranges)."""
        bounds = check_ranges(None)
        return {s.model_id: spec_drawer(s, bounds)[0] for s in self.specs}


def _run(plan: _RTPlan, counts: Sequence[int], n_datasets: int, n_jobs: int,
         progress: bool | None) -> list[dict[str, object]]:
    """Return one row per dataset (trials, generating, dataset, called), cell by cell, with a progress bar."""
    cells = [(t, g) for t in counts for g in (*plan.labels, *NULLS)]
    workers = job_count(n_jobs)
    drawers = plan.drawers()
    rows = []
    with stage("recover --rt", "cells done", len(cells), progress) as bar, workers_stopped(n_jobs):
        for t, g in cells:
            bar.detail(f"{g} at {t} trials")
            called = Parallel(n_jobs=workers)(delayed(_dataset_verdict)(plan, drawers, g, t, d)
                                              for d in range(1, n_datasets + 1))
            rows += [{"trials": t, "generating": g, "dataset": d, "called": c}
                     for d, c in enumerate(called, start=1)]
            bar.advance()
    return rows


def _dataset_verdict(plan: _RTPlan, drawers: Mapping[str, SpecDrawer], process: str, n_trials: int,
                     dataset: int) -> str:
    """Return the learner the RT analysis calls on one simulated dataset, or ``NOT_CALLED``."""
    frame = simulate_dataset(plan.task, drawers, process, plan.n_participants, n_trials, dataset, plan.seed,
                             plan.effect, plan.simulation)
    log = validate_log(frame, plan.task, source=f"<{process} dataset {dataset} at {n_trials} trials>")
    result = analyze_rt(log, plan.task, models=list(plan.specs), bayes=False, n_jobs=1, progress=False,
                        seed=child_int(plan.seed, "rt-analysis", n_trials, process, dataset))
    return result.verdict(group="all") or NOT_CALLED
