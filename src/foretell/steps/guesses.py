"""The fit step: every model fitted to each participant's guesses, compared per block and per group."""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np
import pandas as pd

from .. import compare
from ..contexts import DEFAULT_REPLICATES, context_agreement, context_report, response_tree_depth
from ..errors import UsageError
from ..fitting.participants import fit_participants
from ..inputs import as_log, as_task
from ..labels import ALL
from ..models import ModelSpec, lookalikes, model_specs
from ..results import Result
from ..summaries import bound_text, convergence_text, summary_text
from ..tasks import Task
from ..validation import check_count, check_n_jobs, check_option, check_seed

TRIALS = ("best", "all", "none")
"""Rows of trials.csv: each participant's whole-session winner, every model, or no table."""


@dataclass(frozen=True, eq=False, kw_only=True)
class FitResult(Result):
    """Every table of a study's fits and comparisons (see README, "Outputs of foretell fit").

    Attributes
    ----------
    fits, blocks, predictions, excluded : pandas.DataFrame
        The per-participant fits (:class:`foretell.fitting.tables.FitTables`).
    winners : pandas.DataFrame
        Best model per participant, whole session (block ``all``) and per block
        (:func:`foretell.compare.winners`).
    selection, selection_blocks, families, families_blocks : pandas.DataFrame
        Random-effects selection over models and model families, whole
        session and per block (:func:`foretell.compare.selection`, ...).
    contexts, context_agreement : pandas.DataFrame
        The response trees and their check against each participant's winning
        model (:mod:`foretell.contexts`).
    summary : str
        The console summary in plain words.
    lookalikes : tuple of tuple of str
        Sets of models identical on this task (the first of each was compared).

    Notes
    -----
    ``settings["trials"]`` chooses the rows of the ``trials`` table:
    "best" (each participant's whole-session winner), "all" or "none".
    """

    step: ClassVar[str] = "fit"
    fits: pd.DataFrame
    blocks: pd.DataFrame
    predictions: pd.DataFrame
    winners: pd.DataFrame
    selection: pd.DataFrame
    selection_blocks: pd.DataFrame
    families: pd.DataFrame
    families_blocks: pd.DataFrame
    contexts: pd.DataFrame
    context_agreement: pd.DataFrame
    summary: str
    excluded: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=["participant", "group", "reason"]))
    lookalikes: tuple[tuple[str, ...], ...] = ()

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return the output tables by file stem (``fits`` -> fits.csv), ``trials`` as ``settings["trials"]``."""
        out = {"excluded": self.excluded, "fits": self.fits, "blocks": self.blocks, "winners": self.winners,
               "selection": self.selection, "selection_blocks": self.selection_blocks,
               "families": self.families, "families_blocks": self.families_blocks,
               "contexts": self.contexts, "context_agreement": self.context_agreement}
        trials = check_option("trials", self.settings.get("trials", "best"), TRIALS)
        if trials == "all":
            out["trials"] = self.predictions
        elif trials == "best":
            best = self.winners.loc[self.winners["block"] == ALL, ["participant", "best_model"]]
            keep = self.predictions.merge(best.rename(columns={"best_model": "model"}),
                                          on=["participant", "model"])
            out["trials"] = keep.reset_index(drop=True)
        return out

    def texts(self) -> dict[str, str]:
        """Return ``summary.txt``: the console summary."""
        return {"summary.txt": self.summary + "\n"}


def fit(log: object, task: object, *, models: Sequence[str | ModelSpec] | None = None,
        seed: int | np.random.Generator = 0, n_jobs: int = 1, progress: bool | None = None,
        free: Iterable[str] = (), fixed: Mapping[str, float] | None = None, n_starts: int = 3,
        criterion: str = "bic", context_depth: int | None = None, merge_lookalikes: bool = True,
        n_replicates: int = DEFAULT_REPLICATES, trials: str = "best") -> FitResult:
    """Return the fits of every model to each participant's guesses, and their comparisons.

    Parameters
    ----------
    log : str, pathlib.Path, pandas.DataFrame or ValidatedLog
        The response log (:func:`foretell.inputs.as_log`).
    task : Task, str or pathlib.Path
        The task (:func:`foretell.inputs.as_task`); a guess design.
    models : sequence of str or ModelSpec, optional
        Model ids (default :func:`foretell.models.default_models`).
    seed : int or numpy.random.Generator, default 0
        Fixes the optimiser's random starts, the Gibbs sampler of the group
        comparisons and the response-tree replicates; every stream is a child
        keyed by what it is for (:func:`foretell.validation.child_rng`).
    n_jobs : int, default 1
        Processes for the per-participant fits; the tables do not depend on it.
    progress : bool, optional
        Participants fitted, on stderr (:func:`foretell.progress.shown`: True a bar on a
        terminal and plain lines otherwise; None only on a terminal).
    free : iterable of str
        Learner parameters (``leak``, ``alpha``) fitted in every model that has them.
    fixed : mapping, optional
        Parameters held at given values.
    n_starts : int, default 3
        Starts per whole-session fit.
    criterion : {"bic", "cv"}
        Log evidence -BIC/2 or the leave-one-block-out cross-validated
        log-likelihood, for winners and group selection.
    context_depth : int, optional
        The response trees' depth (:func:`foretell.contexts.response_tree_depth`).
    merge_lookalikes : bool, default True
        Compare models identical on this task once (:func:`foretell.models.lookalikes`).
    n_replicates : int, default 20
        Guess sequences simulated from each participant's winning model for
        the response-tree check.
    trials : {"best", "all", "none"}
        Rows of the ``trials`` table (:data:`TRIALS`).

    Returns
    -------
    FitResult

    Raises
    ------
    UsageError
        For bad options, or a task that is not a guess design (checked before any work).
    LogError
        When the log does not validate, or nobody has a scored trial.

    References
    ----------
    Stephan et al. (2009), Penny et al. (2010), Rigoux et al. (2014): random-effects
    selection (:mod:`foretell.stats.selection`); Kass & Raftery (1995): the strength
    of a participant's win.

    Examples
    --------
    >>> result = fit("study.csv", "lantern-relay", seed=0, n_jobs=2)  # doctest: +SKIP
    >>> print(result.summary)  # doctest: +SKIP
    """
    task = as_task(task)
    check_guess_design(task)
    check_option("criterion", criterion, compare.CRITERIA)
    check_option("trials", trials, TRIALS)
    seed, n_jobs = check_seed(seed), check_n_jobs(n_jobs)
    n_replicates = check_count("n_replicates", n_replicates)
    context_depth = response_tree_depth(task, context_depth)
    free = (free,) if isinstance(free, str) else tuple(free)
    specs = model_specs(models, task, free)  # every model id and depth is checked before any work
    log = as_log(log, task)
    tables = fit_participants(log, task, specs, free=free, fixed=fixed, n_starts=n_starts,
                              seed=seed, n_jobs=n_jobs, progress=progress)
    merge = lookalikes(specs, tables.predictions) if merge_lookalikes else []
    compared = _comparisons(tables, specs, merge, criterion, seed)
    fitted = log.frame[~log.frame["participant"].isin(tables.excluded["participant"])]
    contexts = context_report(fitted, task, max_depth=context_depth, fits=tables.fits,
                              winners=compared["winners"], n_replicates=n_replicates, seed=seed)
    summary = "\n".join([summary_text(*compared.values(), merge=merge),
                         convergence_text(tables.fits, tables.blocks), bound_text(tables.fits, compared["winners"])])
    settings = {"task": task.name, "models": [s.model_id for s in specs], "free": list(free),
                "fixed": dict(fixed or {}), "seed": seed, "n_starts": n_starts, "criterion": criterion,
                "context_depth": context_depth, "n_replicates": n_replicates,
                "merge_lookalikes": merge_lookalikes, "trials": trials,
                "lookalikes": [list(m) for m in merge]}  # recorded for readers of the folder (folders.as_fit)
    return FitResult(task=task, specs=tuple(specs), settings=settings, notes=exclusion_notes(tables.excluded),
                     fits=tables.fits, blocks=tables.blocks, predictions=tables.predictions, **compared,
                     contexts=contexts,
                     context_agreement=context_agreement(contexts, task), summary=summary,
                     excluded=tables.excluded, lookalikes=tuple(tuple(m) for m in merge))


def exclusion_notes(excluded: pd.DataFrame) -> tuple[str, ...]:
    """Return one line per participant the fit left out, e.g. "participant p07 left out: every guess missed".

    Parameters
    ----------
    excluded : pandas.DataFrame
        participant, reason (:attr:`FitResult.excluded`).

    Returns
    -------
    tuple of str
        The fit's own notes (the README's error catalogue quotes them).
    """
    return tuple(f"participant {row.participant} left out: {row.reason}"
                 for row in excluded.itertuples(index=False))


def check_guess_design(task: Task) -> None:
    """Raise UsageError unless ``task`` is a guess design (the guess models need guesses).

    Raises
    ------
    UsageError
        For a reaction design ("use foretell rt for its reaction times").
    """
    if task.response != "guess":
        raise UsageError(f"task {task.name!r} is a {task.response} design: the guess models of "
                         "fit do not apply (use foretell rt for its reaction times)")


def reuse_notes(fit: FitResult) -> tuple[str, ...]:
    """Return the notes of reused fits that a later step repeats: what the reuse found, not the fit's exclusions.

    Parameters
    ----------
    fit : FitResult
        Fits as :func:`foretell.folders.as_fit` returned them.

    Returns
    -------
    tuple of str
        The notes less :func:`exclusion_notes` (a step that leaves those
        participants out says so in its own words).
    """
    own = set(exclusion_notes(fit.excluded))
    return tuple(n for n in fit.notes if n not in own)


def _comparisons(tables, specs, merge, criterion: str, seed: int) -> dict[str, pd.DataFrame]:
    """Return the winners and the model and family selections (whole session and per block), in summary order."""
    fams = compare.default_families(specs)
    options = {"criterion": criterion, "merge": merge, "seed": seed}
    return {"winners": compare.winners(tables.fits, tables.blocks, criterion=criterion, merge=merge),
            "selection": compare.selection(tables.fits, **options),
            "selection_blocks": compare.selection_blocks(tables.blocks, **options),
            "families": compare.families(tables.fits, fams, **options),
            "families_blocks": compare.families_blocks(tables.blocks, fams, **options)}
