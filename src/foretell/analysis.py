"""The whole job on one study: fits, block-wise comparison, group selection and response trees."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import pandas as pd

from . import compare
from .contexts import context_agreement, context_report
from .fitting import fit_participants
from .logs import ValidatedLog, load_log, validate_log
from .models import ModelSpec
from .tasks import Task, load_task


@dataclass(frozen=True)
class FitResult:
    """Every table of a study's analysis, as tidy DataFrames (see README, "Outputs").

    ``fits``, ``blocks``, ``predictions``: the per-participant fits
    (:class:`foretell.fitting.FitTables`); ``winners``: best model per
    participant, overall (block ``all``) and per block; ``selection``,
    ``selection_blocks``, ``families``, ``families_blocks``: random-effects
    model selection over models and over model families, overall and per block;
    ``contexts`` and ``context_agreement``: the learner-free response trees;
    ``summary``: the console summary in plain words.
    """

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
    settings: Mapping[str, object] = field(default_factory=dict)

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return the output tables by file stem (``fits`` -> fits.csv); per-trial predictions as ``trials``."""
        return {"fits": self.fits, "blocks": self.blocks, "winners": self.winners,
                "selection": self.selection, "selection_blocks": self.selection_blocks,
                "families": self.families, "families_blocks": self.families_blocks,
                "contexts": self.contexts,
                "context_agreement": self.context_agreement, "trials": self.predictions}


def fit(log: ValidatedLog | pd.DataFrame | str | Path, task: Task | str | Path,
        models: Sequence[str | ModelSpec] | None = None, *, free: Iterable[str] = (),
        fixed: Mapping[str, float] | None = None, n_starts: int = 3, seed: int = 0,
        n_jobs: int = 1, progress: bool | None = None, criterion: str = "bic",
        context_depth: int | None = None) -> FitResult:
    """Return the analysis of a study: every model fitted per participant and compared.

    ``log`` is a validated log (:func:`foretell.logs.load_log`), a raw frame in
    the canonical format (validated here), or a path; ``task`` a Task or a path.
    ``models`` are model ids (default :func:`foretell.models.default_models`);
    ``free`` frees learner parameters (``leak``, ``alpha``); ``fixed`` holds
    parameters; ``seed`` fixes the optimiser's random starts (same seed, same
    tables, whatever ``n_jobs``). Group-level selection uses log evidence
    -BIC/2 (``criterion="bic"``) or the cross-validated log-likelihood
    (``"cv"``). ``context_depth`` is the response trees' maximal depth
    (default: the task's deepest context + 1).
    """
    free = (free,) if isinstance(free, str) else tuple(free)
    if not isinstance(task, Task):
        task = load_task(task)
    if isinstance(log, pd.DataFrame):
        log = validate_log(log, task)
    elif not isinstance(log, ValidatedLog):
        log = load_log(log, task)
    log = log.frame
    tables = fit_participants(log, task, models, free=free, fixed=fixed, n_starts=n_starts,
                              seed=seed, n_jobs=n_jobs, progress=progress)
    winners = compare.winners(tables.fits, tables.blocks)
    selection = compare.selection(tables.fits, criterion=criterion)
    selection_blocks = compare.selection_blocks(tables.blocks, tables.fits)
    by_family = partial(compare.default_families, task_depth=task.max_depth)
    families = compare.families(tables.fits, by_family, criterion=criterion)
    families_blocks = compare.families_blocks(tables.blocks, by_family, fits=tables.fits)
    contexts = context_report(log, task, max_depth=context_depth)
    summary = "\n".join([compare.summary_text(winners, selection, selection_blocks, families),
                         convergence_text(tables.fits, tables.blocks)])
    return FitResult(fits=tables.fits, blocks=tables.blocks, predictions=tables.predictions,
                     winners=winners, selection=selection, selection_blocks=selection_blocks,
                     families=families, families_blocks=families_blocks, contexts=contexts,
                     context_agreement=context_agreement(contexts, task), summary=summary,
                     settings={"task": task.name, "models": sorted(tables.fits["model"].unique()),
                               "free": free, "seed": seed, "criterion": criterion})


def convergence_text(fits: pd.DataFrame, blocks: pd.DataFrame) -> str:
    """Return one line on optimiser failures: whole-session fits, cross-validation folds, block refits.

    A cross-validation that could not run (fewer than two blocks) is said so,
    not counted as a failure.
    """
    parts = [(int(fits["converged"].eq(False).sum()), len(fits), "fits")]
    notes = []
    if "cv_converged" in fits.columns:
        parts.append((int(fits["cv_converged"].eq(False).sum()), len(fits), "cross-validations"))
        if fits["cv_converged"].isna().any():
            notes.append("cross-validation skipped where a participant has fewer than two blocks")
    if "converged" in blocks.columns:
        parts.append((int(blocks["converged"].eq(False).sum()), len(blocks), "block refits"))
    failed = [f"{k} of {n} {what}" for k, n, what in parts if k]
    line = ("optimiser: every fit converged" if not failed else
            "optimiser: did not converge for " + ", ".join(failed)
            + " (see the converged and message columns; comparisons leave those fits out)")
    return "; ".join([line, *notes])
