"""The whole job on one study: fits, block-wise comparison, group selection and response trees."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import pandas as pd

from .. import compare
from ..contexts import DEFAULT_REPLICATES, context_agreement, context_report
from ..fitting.participants import fit_participants
from ..errors import UsageError
from ..labels import ALL
from ..logs import ValidatedLog, load_log, validate_log
from ..learners.mixture import MAX_TREE_DEPTH
from ..models import ModelSpec, model_specs
from ..params import PARAMS
from ..summaries import convergence_text, summary_text
from ..text import plural
from ..tasks import Task, load_task


@dataclass(frozen=True)
class FitResult:
    """Every table of a study's analysis, as tidy DataFrames (see README, "Outputs").

    ``fits``, ``blocks``, ``predictions``: the per-participant fits
    (:class:`foretell.fitting.participants.FitTables`); ``winners``: best model per
    participant, overall (block ``all``) and per block; ``selection``,
    ``selection_blocks``, ``families``, ``families_blocks``: random-effects
    model selection over models and over model families, overall and per block;
    ``contexts`` and ``context_agreement``: the learner-free response trees
    and their check against each participant's winning model; ``summary``: the
    console summary in plain words; ``excluded``: participants with nothing to
    fit and why; ``lookalikes``: sets of models identical on this task (the
    first of each was compared); ``notes``: lines for the console.
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
    excluded: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=["participant", "group", "reason"]))
    lookalikes: tuple[tuple[str, ...], ...] = ()
    settings: Mapping[str, object] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    def tables(self, trials: str = "best") -> dict[str, pd.DataFrame]:
        """Return the output tables by file stem (``fits`` -> fits.csv).

        ``trials`` chooses the rows of the per-trial predictions table
        ``trials``: "best" (each participant's whole-session winning model),
        "all" (every model) or "none" (no table).
        """
        out = {"excluded": self.excluded, "fits": self.fits, "blocks": self.blocks, "winners": self.winners,
               "selection": self.selection, "selection_blocks": self.selection_blocks,
               "families": self.families, "families_blocks": self.families_blocks,
               "contexts": self.contexts, "context_agreement": self.context_agreement}
        if trials == "all":
            out["trials"] = self.predictions
        elif trials == "best":
            best = self.winners.loc[self.winners["block"] == ALL, ["participant", "best_model"]]
            keep = self.predictions.merge(best.rename(columns={"best_model": "model"}),
                                          on=["participant", "model"])
            out["trials"] = keep.reset_index(drop=True)
        elif trials != "none":
            raise UsageError(f"trials must be 'best', 'all' or 'none', got {trials!r}")
        return out


def fit(log: ValidatedLog | pd.DataFrame | str | Path, task: Task | str | Path,
        models: Sequence[str | ModelSpec] | None = None, *, free: Iterable[str] = (),
        fixed: Mapping[str, float] | None = None, n_starts: int = 3, seed: int = 0,
        n_jobs: int = 1, progress: bool | None = None, criterion: str = "bic",
        context_depth: int | None = None, merge_lookalikes: bool = True,
        n_replicates: int = DEFAULT_REPLICATES) -> FitResult:
    """Return the analysis of a study: every model fitted per participant and compared.

    ``log`` is a validated log (:func:`foretell.logs.load_log`), a raw frame in
    the canonical format (validated here), or a path; ``task`` a Task or a path.
    ``models`` are model ids (default :func:`foretell.models.default_models`);
    ``free`` frees learner parameters (``leak``, ``alpha``); ``fixed`` holds
    parameters; ``seed`` fixes the optimiser's random starts, the Gibbs
    sampler of the group comparisons and the response-tree replicates (same
    seed, same tables, whatever ``n_jobs``). Winners and group-level selection
    use log evidence -BIC/2 (``criterion="bic"``) or the cross-validated
    log-likelihood (``"cv"``), for the whole session and per block. Models
    identical on this task (:func:`foretell.compare.lookalikes`) are compared
    once unless ``merge_lookalikes`` is false. ``context_depth`` is the
    response trees' maximal depth (default: the task's deepest context + 1,
    within the tree mixture's limit); ``n_replicates`` the number of guess
    sequences simulated from each participant's winning model for the
    response-tree check.
    """
    free = (free,) if isinstance(free, str) else tuple(free)
    if not isinstance(task, Task):
        task = load_task(task)
    check_guess_design(task)
    if criterion not in compare.CRITERIA:
        raise UsageError(f"criterion must be one of {', '.join(compare.CRITERIA)}, got {criterion!r}")
    context_depth = response_tree_depth(task, context_depth)
    specs = model_specs(models, task, free)  # every model id and depth is checked before any work
    if isinstance(log, pd.DataFrame):
        log = validate_log(log, task)
    elif not isinstance(log, ValidatedLog):
        log = load_log(log, task)
    tables = fit_participants(log, task, specs, free=free, fixed=fixed, n_starts=n_starts,
                              seed=seed, n_jobs=n_jobs, progress=progress)
    merge = compare.lookalikes(specs, tables.predictions) if merge_lookalikes else []
    fams = compare.default_families(specs)
    options = {"criterion": criterion, "merge": merge, "seed": seed}
    winners = compare.winners(tables.fits, tables.blocks, criterion=criterion, merge=merge)
    selection = compare.selection(tables.fits, **options)
    selection_blocks = compare.selection_blocks(tables.blocks, **options)
    families = compare.families(tables.fits, fams, **options)
    families_blocks = compare.families_blocks(tables.blocks, fams, **options)
    fitted = log.frame[~log.frame["participant"].isin(tables.excluded["participant"])]
    contexts = context_report(fitted, task, max_depth=context_depth, fits=tables.fits,
                              winners=winners, n_replicates=n_replicates, seed=seed)
    summary = "\n".join([summary_text(winners, selection, selection_blocks, families,
                                      families_blocks, merge=merge),
                         convergence_text(tables.fits, tables.blocks), bound_text(tables.fits)])
    notes = tuple(f"participant {row.participant} left out: {row.reason}"
                  for row in tables.excluded.itertuples(index=False))
    return FitResult(fits=tables.fits, blocks=tables.blocks, predictions=tables.predictions,
                     winners=winners, selection=selection, selection_blocks=selection_blocks,
                     families=families, families_blocks=families_blocks, contexts=contexts,
                     context_agreement=context_agreement(contexts, task), summary=summary,
                     excluded=tables.excluded, lookalikes=tuple(tuple(m) for m in merge),
                     settings={"task": task.name, "models": [s.model_id for s in specs],
                               "free": list(free), "fixed": dict(fixed or {}), "seed": seed,
                               "n_starts": n_starts, "criterion": criterion,
                               "context_depth": context_depth, "n_replicates": n_replicates,
                               "merge_lookalikes": merge_lookalikes},
                     notes=notes)


def check_guess_design(task: Task) -> None:
    """Raise UsageError unless ``task`` is a guess design (the guess models need guesses)."""
    if task.response != "guess":
        raise UsageError(f"task {task.name!r} is a {task.response} design: the guess models of "
                         "fit do not apply (use foretell rt for its reaction times)")


def bound_text(fits: pd.DataFrame) -> str:
    """Return one line counting fits that ended at a parameter bound, per parameter and side.

    ``at_bound`` in fits.csv names the parameters; the side is the bound the
    value is nearer to (:data:`foretell.params.PARAMS`). An upper inv_temp
    bound means near-deterministic guessing, a lower lapse bound no lapses:
    both are limits of what the data can tell, not estimates.
    """
    at = fits["at_bound"].fillna("").astype(str) if "at_bound" in fits.columns else pd.Series([], dtype=str)
    counts: dict[tuple[str, str], int] = {}
    for i in at.index[at != ""]:
        for name in at[i].split(";"):
            p = PARAMS[name]
            value = float(fits.at[i, name])
            side = "upper" if abs(value - p.high) < abs(value - p.low) else "lower"
            counts[(name, side)] = counts.get((name, side), 0) + 1
    if not counts:
        return "bounds: no fitted parameter ended at a bound"
    parts = [f"{name} at its {side} bound {PARAMS[name].high if side == 'upper' else PARAMS[name].low:g} "
             f"in {plural(n, 'fit')}" for (name, side), n in sorted(counts.items())]
    return (f"bounds (of {plural(len(fits), 'fit')}; at_bound in fits.csv): " + ", ".join(parts)
            + "; read those values as limits, not estimates")


def response_tree_depth(task: Task, depth: int | None = None) -> int:
    """Return the depth of the response trees: ``depth``, or the task's deepest context + 1 within the limit.

    The limit is the tree mixture's :data:`foretell.learners.mixture.MAX_TREE_DEPTH`;
    an explicit depth beyond it is a UsageError (raised before any fitting).
    """
    if depth is None:
        return min(task.max_depth + 1, MAX_TREE_DEPTH)
    if isinstance(depth, bool) or not isinstance(depth, int) or not 0 <= depth <= MAX_TREE_DEPTH:
        raise UsageError(f"the response-tree depth must be a whole number from 0 to {MAX_TREE_DEPTH}, "
                         f"got {depth!r}")
    return depth
