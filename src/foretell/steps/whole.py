"""The whole job in one call: validation, fits and comparisons, reaction times, groups, events, report.

:func:`analyze` runs the steps in order, each on the results of those before
it, and returns an :class:`AnalysisResult` whose files are the steps' own
under one plainly named subfolder each, plus ``report.html`` and its figures;
with ``out`` it writes them through :func:`foretell.outputs.write`.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, ClassVar

import pandas as pd


from ..folders import STEP_FOLDERS, ResultFolder, as_recovery, fingerprints
from ..inputs import as_log, as_task
from ..logs import ValidatedLog, log_summary, unscorable
from ..models import default_warmup
from ..progress import stage
from ..results import Result, prefixed
from ..validation import check_count, check_n_jobs, check_option, check_seed

if TYPE_CHECKING:
    from ..report.build import Report
    from ..tasks import Task

STEPS = ("fit", "rt", "groups", "events", "eeg", "report")
"""The steps that can be skipped (validation always runs: every other step needs a checked log)."""
DEMO_DRAWS = 300
"""Posterior draws (and tuning steps) per chain in demo mode: its Bayesian comparisons are provisional."""
DEMO_CHAINS = 2
"""Markov chains per model in demo mode."""
TRIALS = ("best", "all", "none")
"""The choices of rows for fit/trials.csv."""


@dataclass(frozen=True, eq=False, kw_only=True)
class ValidationResult(Result):
    """What validating the log found: a summary per participant, who has nothing to fit, the warnings.

    Attributes
    ----------
    summary : pandas.DataFrame
        :func:`foretell.logs.log_summary` (one row per participant, then everyone).
    unscorable : pandas.DataFrame or None
        :func:`foretell.logs.unscorable` in guess designs (participants with
        nothing to fit, and why); None in reaction designs.
    warnings : tuple of str
        What reading and screening the log noticed.
    """

    step: ClassVar[str] = "validation"
    summary: pd.DataFrame
    unscorable: pd.DataFrame | None = None
    warnings: tuple[str, ...] = ()

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return ``summary`` and, in guess designs, ``unscorable``."""
        out = {"summary": self.summary}
        if self.unscorable is not None:
            out["unscorable"] = self.unscorable
        return out

    def texts(self) -> dict[str, str]:
        """Return ``warnings.txt``: one warning per line."""
        return {"warnings.txt": "".join(f"{w}\n" for w in self.warnings)}


@dataclass(frozen=True, eq=False, kw_only=True)
class AnalysisResult(Result):
    """The whole analysis of a study: every step's result, and the report built from them.

    Attributes
    ----------
    steps : mapping of str to Result
        The results by output subfolder, in the order run: ``validation``,
        ``fit``, ``rt``, ``groups``, ``events``, ``recovery`` (those that ran;
        ``result.steps["rt"]``, ...).

    Notes
    -----
    Its files are the steps' own under their subfolder (``fit/fits.csv``,
    ``groups/figures/curve_accuracy.png``, ...), plus ``report.html`` and
    the figures only the report shows (``figures/winners.png``, ...). Each
    figure is drawn once: the report embeds the very PNG that is written.
    """

    step: ClassVar[str] = "analyze"
    steps: Mapping[str, Result] = field(default_factory=dict)

    @classmethod
    def of(cls, result: Result) -> AnalysisResult:
        """Return an analysis that holds one step's result only (e.g. to read its findings).

        Parameters
        ----------
        result : Result
            A step's result; it goes under the step's folder (:data:`STEP_FOLDERS`).

        Returns
        -------
        AnalysisResult
        """
        folder = STEP_FOLDERS.get(result.step, result.step)
        return cls(task=result.task, specs=result.specs, settings={"steps": {folder: dict(result.settings)}},
                   notes=(), steps={folder: result})

    @property
    def fit(self) -> Result | None:
        """Return the fits and comparisons (:class:`foretell.steps.guesses.FitResult`), if they ran."""
        return self.steps.get("fit")

    @cached_property
    def _step_tables(self) -> dict[str, dict[str, pd.DataFrame]]:
        return {folder: result.tables() for folder, result in self.steps.items()}

    def step_tables(self, folder: str) -> dict[str, pd.DataFrame]:
        """Return the tables of the step in ``folder`` by file stem (computed once)."""
        return self._step_tables[folder]

    @cached_property
    def figure_pngs(self) -> dict[str, bytes]:
        """Return every step's figures as PNG by output path (``groups/figures/<name>.png``), each drawn once."""
        from ..plots import figure_png

        return {f"{folder}/figures/{name}.png": figure_png(draw())
                for folder, result in self.steps.items() for name, draw in result.figure_makers().items()}

    @cached_property
    def report(self) -> "Report | None":
        """Return the report built from these results (None when the report step was skipped)."""
        from ..report.build import build_report

        if "report" in self.settings.get("skip", ()):
            return None
        return build_report(self, provisional=bool(self.settings.get("provisional", False)))

    @property
    def report_html(self) -> str | None:
        """Return the report's HTML (None when the report step was skipped)."""
        return None if self.report is None else self.report.html

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return every step's tables under its subfolder (``fit/fits``, ``rt/rt_compare``, ...)."""
        out: dict[str, pd.DataFrame] = {}
        for folder, tables in self._step_tables.items():
            out |= prefixed(folder, tables)
        return out

    def texts(self) -> dict[str, str]:
        """Return every step's texts under its subfolder, and ``report.html``."""
        out: dict[str, str] = {}
        for folder, result in self.steps.items():
            out |= prefixed(folder, result.texts())
        if self.report is not None:
            out["report.html"] = self.report.html
        return out

    def blobs(self) -> dict[str, bytes]:
        """Return every step's other files and figures under its subfolder, and the report's own figures."""
        out: dict[str, bytes] = {}
        for folder, result in self.steps.items():
            out |= prefixed(folder, result.blobs())
        out |= self.figure_pngs
        if self.report is not None:
            out |= self.report.figures
        return out


@dataclass(frozen=True)
class _Run:
    """The inputs and checked options that every step of one analysis reads."""

    log: ValidatedLog
    task: "Task"
    models: list[str] | None
    rt_models: list[str] | None
    free: tuple[str, ...]
    skip: tuple[str, ...]
    seed: int
    n_jobs: int
    bayes: bool
    draws: int
    chains: int
    tune: int
    refits: int | None
    loo: bool
    trials: str
    provisional: bool
    recovery: object
    epochs: object = None
    locked: str | None = None
    progress: bool | None = None
    command: str | None = None

    def settings(self, done: Mapping[str, Result]) -> dict[str, object]:
        """Return the analysis's full option set, with each step's own under ``steps``."""
        recovery = self.recovery.path if isinstance(self.recovery, ResultFolder) else self.recovery
        described = None if recovery is None else "in memory" if isinstance(recovery, Result) else str(recovery)
        return {"task": self.task.name, "models": self.models, "rt_models": self.rt_models,
                "free": list(self.free), "skip": list(self.skip), "seed": self.seed, "n_jobs": self.n_jobs,
                "bayes": self.bayes, "draws": self.draws, "chains": self.chains, "tune": self.tune,
                "refits": self.refits, "loo": self.loo, "trials": self.trials, "provisional": self.provisional,
                "recovery": described, "command": self.command,
                "steps": {folder: dict(result.settings) for folder, result in done.items()}}


def _validation(run: _Run, done: Mapping[str, Result]) -> Result:
    log, task = run.log, run.task
    left = unscorable(log, default_warmup(task)) if task.response == "guess" else None
    return ValidationResult(task=task, settings={"source": log.source, "rt_unit": log.rt_unit},
                            summary=log_summary(log), unscorable=left, warnings=tuple(log.warnings))


def _fit(run: _Run, done: Mapping[str, Result]) -> Result | str:
    if run.task.response != "guess":
        return f"fit: not applicable to a {run.task.response} design"
    from .guesses import fit

    return fit(run.log, run.task, models=run.models, free=run.free, seed=run.seed, n_jobs=run.n_jobs,
               trials=run.trials, progress=run.progress)


def _rt(run: _Run, done: Mapping[str, Result]) -> Result | str:
    if not bool(run.log.frame["rt_ok"].any()):
        return "reaction times: none usable in this log; step skipped"
    from .measures import analyze_rt

    fitted = done.get("fit")
    models = run.rt_models or (fitted.model_ids if fitted is not None else run.models)
    return analyze_rt(run.log, run.task, models=models, fit=fitted, bayes=run.bayes, draws=run.draws,
                      chains=run.chains, tune=run.tune, seed=run.seed, n_jobs=run.n_jobs, refits=run.refits,
                      loo=run.loo, progress=run.progress)


def _groups(run: _Run, done: Mapping[str, Result]) -> Result | str:
    frame = run.log.frame
    if (frame["group"].nunique() if "group" in frame.columns else 0) < 2:
        return "groups: the log has fewer than two groups; no group comparison"
    from .groups import compare_groups

    return compare_groups(run.log, run.task, fit=done.get("fit"), draws=run.draws, chains=run.chains,
                          tune=run.tune, seed=run.seed, bayes=run.bayes, n_jobs=run.n_jobs, progress=run.progress)


def _events(run: _Run, done: Mapping[str, Result]) -> Result:
    from .events import export_events

    return export_events(run.log, run.task, fit=done.get("fit"), models=run.models,
                         n_jobs=run.n_jobs, progress=run.progress)


def _eeg(run: _Run, done: Mapping[str, Result]) -> Result | str:
    if run.epochs is None:
        return "eeg: no epochs given; step skipped"
    from .eeg import analyze_eeg

    return analyze_eeg(run.log, run.task, epochs=run.epochs, fit=done.get("fit"), models=run.models,
                       locked=run.locked, seed=run.seed, n_jobs=run.n_jobs, progress=run.progress)


def _recovery(run: _Run, done: Mapping[str, Result]) -> Result:
    return as_recovery(run.recovery, run.task)


RUNNERS: tuple[tuple[str, Callable[[_Run, Mapping[str, Result]], Result | str]], ...] = (
    ("validation", _validation), ("fit", _fit), ("rt", _rt), ("groups", _groups), ("events", _events),
    ("eeg", _eeg), (STEP_FOLDERS["recover"], _recovery))
"""Each step's output folder and its runner: a function of the run and the results before it."""


def analyze(log: object, task: object, *, out: str | Path | None = None, models: Sequence[str] | None = None,
            rt_models: Sequence[str] | None = None, free: Iterable[str] = (), skip: Iterable[str] = (),
            recovery: object = None, seed: object = 0, n_jobs: int = 1, progress: bool | None = None,
            bayes: bool = True, draws: int = 1000, chains: int = 4, tune: int = 1000, refits: int | None = None,
            loo: bool = False, trials: str = "best", epochs: object = None, locked: str | None = None, force: bool = False, inputs: Sequence[str | Path] = (),
            manifest: Mapping[str, object] | None = None, provisional: bool = False) -> AnalysisResult:
    """Return (and with ``out``, write) the whole analysis of a study.

    Parameters
    ----------
    log : str, pathlib.Path, pandas.DataFrame or ValidatedLog
        The response log (:func:`foretell.inputs.as_log`).
    task : Task, str or pathlib.Path
        The task (:func:`foretell.inputs.as_task`).
    out : str or pathlib.Path, optional
        Write the result there (:func:`foretell.outputs.write`): one
        subfolder per step and ``report.html``. The folder is checked and
        held before any work.
    models : sequence of str, optional
        Model ids of the fits (default: the task's set); also the events' models.
    rt_models : sequence of str, optional
        Model ids of the RT models (default: the fitted models).
    free : iterable of str
        Extra free learner parameters of the fits (``leak``, ``alpha``).
    skip : iterable of str
        Steps of :data:`STEPS` to leave out.
    recovery : RecoveryResult, ResultFolder, str or pathlib.Path, optional
        A design check of this task (:func:`foretell.folders.as_recovery`),
        shown under ``recovery/`` and in the report.
    seed : int or numpy.random.Generator, default 0
        Seed of every random step (:func:`foretell.validation.check_seed`).
    n_jobs : int, default 1
        Parallel jobs of every step (-1: all cores).
    progress : bool, optional
        Steps done, and inside each step participants fitted and models sampled, on stderr
        (:func:`foretell.progress.shown`: True a bar on a terminal and plain lines otherwise;
        None only on a terminal).
    bayes : bool, default True
        Fit the hierarchical Bayesian models of the RT and group steps
        (without: summed BIC and permutation tests only).
    draws, chains, tune : int
        Posterior draws per chain, chains, tuning steps of those models.
    refits, loo : int, bool; optional, default False
        Compare the RT models by PSIS-LOO (``loo``), with at most ``refits`` exact leave-one-out refits
        per model (default of :func:`foretell.analyze_rt`).
    trials : {"best", "all", "none"}
        Rows of ``fit/trials.csv``.
    epochs : str or pathlib.Path, optional
        The participants' EEG epochs (:func:`foretell.analyze_eeg`): a pattern
        of ``*-epo.fif`` files or a BIDS derivatives folder; without it the
        eeg step is skipped.
    locked : {"guess", "reveal", "stimulus"}, optional
        The event the epochs are locked to (default: the trial's first event).
    force : bool, default False
        Replace a folder that foretell wrote before.
    inputs : sequence of paths
        Files the run read: the manifest of the caller records them, and
        ``out`` may not be, hold or lie in any of them.
    manifest : mapping, optional
        Provenance merged into the manifest (:func:`foretell.outputs.provenance`).
    provisional : bool, default False
        Mark the Bayesian comparisons provisional in the report (demo mode).

    Returns
    -------
    AnalysisResult
        Every step's result; steps that do not apply (no RTs, fewer than two
        groups, a reaction design for the fits) are absent and ``notes`` says why.

    Raises
    ------
    UsageError
        An unknown step in ``skip``, or a bad option.
    OutputError
        When ``out`` may not be written.
    """
    task = as_task(task)
    log = as_log(log, task)
    run = _Run(log, task, models=list(models) if models else None, rt_models=list(rt_models) if rt_models else None,
               free=tuple(free), skip=tuple(sorted({str(check_option("skip", s, STEPS)) for s in skip})),
               seed=check_seed(seed), n_jobs=check_n_jobs(n_jobs), bayes=bool(bayes),
               draws=check_count("draws", draws), chains=check_count("chains", chains),
               tune=check_count("tune", tune, 0), refits=refits, loo=bool(loo), trials=str(check_option("trials", trials, TRIALS)),
               provisional=bool(provisional), recovery=recovery, epochs=epochs, locked=locked, progress=progress,
               command=(manifest or {}).get("command"))
    folders = ([recovery.path if isinstance(recovery, ResultFolder) else recovery]
               if isinstance(recovery, (str, Path, ResultFolder)) else [])
    held = contextlib.nullcontext()
    if out is not None:
        from ..outputs import reserve

        held = reserve(out, inputs=[*inputs, *folders], force=force)
    with held:
        result, timings = _run_steps(run)
        if out is not None:
            from ..outputs import write

            record = {**dict(manifest or {}), **fingerprints(task, log), "timings_s": timings}
            write(out, result, inputs=[*inputs, *folders], force=force, manifest=record)
    return result


def _run_steps(run: _Run) -> tuple[AnalysisResult, dict[str, float]]:
    """Return the analysis of ``run`` (each step on the results before it) and the seconds each step took."""
    planned = [(folder, step) for folder, step in RUNNERS if folder not in run.skip
               and (folder != STEP_FOLDERS["recover"] or run.recovery is not None)]
    report = "report" not in run.skip
    started = time.perf_counter()
    timings: dict[str, float] = {}
    done: dict[str, Result] = {}
    notes: list[str] = []
    with stage("analysis", "steps done", len(planned) + report, run.progress, eta=False, every=0) as bar:
        for folder, step in planned:
            bar.detail(folder)
            t0 = time.perf_counter()
            outcome = step(run, done)
            if isinstance(outcome, str):
                notes.append(outcome)
            else:
                done[folder] = outcome
                notes += list(outcome.notes)
            timings[f"{folder}_s"] = round(time.perf_counter() - t0, 3)
            bar.advance()
        fitted = done.get("fit")
        result = AnalysisResult(task=run.task, specs=fitted.specs if fitted is not None else (),
                                settings=run.settings(done), notes=tuple(notes), steps=done)
        if report:  # the report and every figure, drawn once now: the result holds them
            bar.detail("report")
            t0 = time.perf_counter()
            _ = result.report
            timings["report_s"] = round(time.perf_counter() - t0, 3)
            bar.advance()
    timings["total_s"] = round(time.perf_counter() - started, 3)
    return result, timings
