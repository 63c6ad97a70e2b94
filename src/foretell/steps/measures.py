"""The rt step: reaction times (or any per-trial measure) explained by each learner model's uncertainty or surprise."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import ClassVar

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from foretell.cluster import batches, job_count, workers_stopped
from foretell.errors import UsageError
from foretell.fitting.participants import fit_participants
from foretell.folders import as_fit
from foretell.hierarchical.forms import requested_forms
from foretell.hierarchical.gate import Gate
from foretell.hierarchical.measure_fit import DIAGNOSTIC_COLUMNS, HIERARCHICAL, POPULATION_COLUMNS, \
    fit_measure_models
from foretell.hierarchical.sampling import sampling_cores
from foretell.inputs import as_log, as_task
from foretell.labels import ALL
from foretell.logs import ValidatedLog
from foretell.measure import BASELINE_MODEL, BASELINE_WORDS, DROP_REASONS, TRIAL_SPLINE_DF, Measure, \
    choose_measure, participant_spans
from foretell.models import ModelSpec, lookalikes, model_specs
from foretell.progress import shown, stage
from foretell.outputs import netcdf_bytes
from foretell.regressors import design, kept_by_fit, stack_tables
from foretell.results import Result
from foretell.steps.measure_calls import (HIERARCHICAL_MODELS, bic_words, block_words, compare_table, in_play,
                                          merge_elpd, rank_blocks, rfx_selection, same_evidence, verdict_words)
from foretell.steps.measure_fits import LEAK_BOOTSTRAP, Path, participant_path
from foretell.validation import check_count, check_n_jobs, check_option, check_seed, child_int

LOO_REFITS = 10
"""Most exact leave-one-unit-out refits per model when PSIS-LOO's Pareto k is too high (each is a
full MCMC run; Vehtari, Gelman & Gabry, 2017, advise refitting when only a few units are affected)."""
_BATCH_TRIALS = 200_000  # most trials per batch of participants on the per-participant path


@dataclass(frozen=True, eq=False, kw_only=True)
class RTResult(Result):
    """The analysis of a per-trial measure by learner models and the baseline (:func:`analyze_rt`).

    Attributes
    ----------
    measure : str
        The measure's name ("rt", a log column, or "measure"); it prefixes the table names.
    fits : pandas.DataFrame
        Participant x model (and the baseline ``none``): OLS and Huber fits on the kept trials.
    compare : pandas.DataFrame
        The model ranking: by ELPD when the hierarchical models were compared by PSIS-LOO (``loo``), else by
        random-effects selection over participants.
    selection : pandas.DataFrame
        Group x model: random-effects selection of per-participant BIC, ``all`` and each group.
    blocks : pandas.DataFrame
        Session x block x model: random-effects selection of each block's BIC.
    diagnostics : pandas.DataFrame
        Model: parameterisation and why, sampler, the gate's findings.
    population : pandas.DataFrame
        Model x group: the hierarchical models' mean slope and residual SD in the measure's units.
    regressors : pandas.DataFrame
        Trial x model (:func:`foretell.regressors.regressors`).
    posteriors : mapping of str to arviz.InferenceData
        Model id -> posterior of the hierarchical model.
    """

    step: ClassVar[str] = "rt"
    measure: str
    fits: pd.DataFrame
    compare: pd.DataFrame
    selection: pd.DataFrame
    blocks: pd.DataFrame
    diagnostics: pd.DataFrame
    population: pd.DataFrame
    regressors: pd.DataFrame
    posteriors: Mapping[str, object] = field(default_factory=dict)

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return the tables by file stem: <measure>_fits, _compare, _selection, _blocks, _diagnostics,
        _population, and regressors."""
        m = self.measure
        return {f"{m}_fits": self.fits, f"{m}_compare": self.compare, f"{m}_selection": self.selection,
                f"{m}_blocks": self.blocks, f"{m}_diagnostics": self.diagnostics,
                f"{m}_population": self.population, "regressors": self.regressors}

    def texts(self) -> dict[str, str]:
        """Return summary.txt: the notes, one per line."""
        return {"summary.txt": "".join(f"{n}\n" for n in self.notes)}

    def blobs(self) -> dict[str, bytes]:
        """Return each posterior as ``posterior_<model>.nc`` (netCDF bytes)."""
        return {f"posterior_{m}.nc": netcdf_bytes(idata) for m, idata in self.posteriors.items()}

    def verdict(self, group: str = ALL) -> str | None:
        """Return the learner model the random-effects comparison calls for ``group``, or None.

        A learner is called when the selection of per-participant BIC with
        the baseline (``selection``, :func:`foretell.summaries.verdict`) names
        it: it beats the baseline ``none`` and the other learners. None when
        nothing stands out, the baseline leads, or no participant had usable fits.

        Parameters
        ----------
        group : str, default "all"

        Returns
        -------
        str or None

        Raises
        ------
        UsageError
            For a group the selection does not have.
        """
        known = list(dict.fromkeys([ALL, *self.selection["group"].astype(str)]))
        if str(group) not in known:
            raise UsageError(f"no group {group!r} in the selection; groups: {', '.join(known) or 'none'}")
        rows = self.selection[(self.selection["group"].astype(str) == str(group)) & self.selection["called"]]
        model = str(rows["model"].iloc[0]) if len(rows) else None
        return None if model in (None, BASELINE_MODEL) else model


def analyze_rt(log: object, task: object, *, fit: object = None, models: Sequence[str | ModelSpec] | None = None,
               seed: int | np.random.Generator = 0, n_jobs: int = 1, progress: bool | None = None,
               measure: str | pd.Series | np.ndarray = "rt", locked: str | None = None,
               regressors: Sequence[str] | None = None, fixed: Mapping[str, float] | None = None,
               baseline: str | Sequence[str] | None = None, log_transform: bool | None = None,
               block_start: int | None = None, bootstrap: int | None = None, bayes: bool = True,
               draws: int = 1000, chains: int = 4, tune: int = 1000,
               parameterisation: str | Mapping[str, str] = "auto", gate: Gate = Gate(),
               refits: int | None = None, hierarchical_models: str = "in_play", loo: bool = False) -> RTResult:
    """Return the :class:`RTResult` of explaining a per-trial measure by each learner model.

    Every model holds a time-on-task baseline, and the baseline alone (model ``none``) joins every
    comparison: a learner is called only when it beats the baseline and the other learners. Per
    participant: :mod:`foretell.steps.measure_fits`; across participants and block by block,
    random-effects selection: :mod:`foretell.steps.measure_calls`; with ``bayes``, hierarchical models:
    :func:`foretell.hierarchical.measure_fit.fit_measure_models`. The tables do not depend on ``n_jobs``
    or on a Dask cluster (:func:`foretell.cluster.job_backend`).

    Parameters
    ----------
    log, task
        Converted by :func:`foretell.inputs.as_log` and :func:`foretell.inputs.as_task`.
    fit : FitResult or path, optional
        Earlier fits (:func:`foretell.folders.as_fit`): learner values; the participants they left out stay out.
    models : sequence of str or ModelSpec, optional
        Default: the models of ``fit``, else the task's default set.
    seed, n_jobs, progress : int, int, bool; default 0, 1, None
        The seed (or a Generator); workers and parallel chains; participants fitted and models sampled
        on stderr (:func:`foretell.progress.shown`: True a bar on a terminal and plain lines otherwise).
    measure : str, pandas.Series or numpy.ndarray, default "rt"
        "rt" (seconds), a numeric column of the log, or values aligned with its rows (named "measure").
    locked, regressors, log_transform, block_start
        See :func:`foretell.measure.choose_measure` (``regressors`` is its ``names``).
    fixed : mapping, optional
        Held learner values (:func:`foretell.regressors.learner_values`); a free leak none gives is fitted
        to the guesses (guess designs) or chosen on held-out blocks (reaction designs).
    baseline : str or sequence of str, optional
        Time-on-task terms (:func:`foretell.measure.baseline_terms`).
    bootstrap : int, optional
        Resamples behind the interval of a leak chosen on the measure (0: none; default :data:`LEAK_BOOTSTRAP`).
    bayes, draws, chains, tune : bool and int, default True, 1000, 4, 1000
        Run the hierarchical models; per chain; chains >= 2 (R-hat compares chains; Vehtari et al., 2021).
    parameterisation, gate, refits : str or mapping, Gate, int; default "auto", Gate(), :data:`LOO_REFITS`
        :func:`foretell.hierarchical.forms.requested_forms` of "intercept" and "slope"; the diagnostics
        gate; most exact leave-one-out refits per model.
    hierarchical_models, loo : {"in_play", "all"}, bool; default "in_play", False
        The learners sampled beside the baseline: those the random-effects selection leaves in play
        (:func:`foretell.steps.measure_calls.in_play`), or all; with ``loo``, compare them by PSIS-LOO over
        participant x block units, with exact refits (same compiled model) where Pareto k is too high.

    Returns
    -------
    RTResult

    Raises
    ------
    UsageError
        For options out of range or not applicable to the design.
    """
    task = as_task(task)
    log = as_log(log, task, measures=(measure,) if isinstance(measure, str) and measure != "rt" else ())
    seed, n_jobs = check_seed(seed), check_n_jobs(n_jobs)
    refits = LOO_REFITS if refits is None else check_count("refits", refits, 0)
    bootstrap = LEAK_BOOTSTRAP if bootstrap is None else check_count("bootstrap", bootstrap, 0)
    if bayes:
        draws, chains, tune = (check_count(k, v, low) for k, v, low in
                               (("draws", draws, 1), ("chains", chains, 2), ("tune", tune, 0)))
    forms = requested_forms(parameterisation, HIERARCHICAL)
    check_option("hierarchical_models", hierarchical_models, HIERARCHICAL_MODELS)
    fitted = as_fit(fit, log, task)
    name, values = _values(log, measure)
    keep, notes = kept_by_fit(log, fitted.excluded if fitted is not None else None)
    if not keep.all():
        log, values = replace(log, frame=log.frame[keep].reset_index(drop=True)), values[keep]
    specs = model_specs(fitted.model_ids if models is None and fitted is not None else models, task)
    chosen = choose_measure(log, task, specs, name, values, locked=locked, names=regressors,
                            log_transform=log_transform, block_start=block_start, baseline=baseline)
    fits, more = _learner_fits(log, task, specs, fitted.fits if fitted is not None else None, fixed, seed, n_jobs)
    path = Path(task, tuple(specs), fixed, fits, seed, bootstrap)
    table, fits_table, block_rows = _per_participant(log, chosen, path, n_jobs, progress)
    table = _with_measure(table, log, chosen)
    selection, compare, blocks, more = _compared(fits_table, block_rows, chosen, specs, seed, bootstrap, more)
    notes += _drop_notes(chosen, log.frame) + more
    diagnostics, population, posteriors = (pd.DataFrame(columns=DIAGNOSTIC_COLUMNS),
                                           pd.DataFrame(columns=POPULATION_COLUMNS), {})
    if bayes:
        run = {"draws": draws, "chains": chains, "tune": tune, "cores": sampling_cores(chains, n_jobs),
               "progress": shown(progress) == "bar", "gate": gate, "refits": refits, "loo": loo,
               "forms": forms, "which": hierarchical_models, "seed": seed, "progress_option": progress}
        posteriors, diagnostics, population, compare, more = _hierarchical(chosen, log, table, specs, selection,
                                                                           compare, run)
        notes += more
    settings = {"models": [s.model_id for s in specs], "measure": chosen.name, "locked": locked,
                "regressors": list(chosen.columns), "fixed": dict(fixed or {}), "baseline": list(chosen.baseline),
                "trial_spline_df": TRIAL_SPLINE_DF, "log_transform": chosen.log_transform, "block_start": block_start,
                "bootstrap": bootstrap, "bayes": bayes, "draws": draws, "chains": chains, "tune": tune,
                "parameterisation": forms, "gate": gate.settings(), "refits": refits,
                "hierarchical_models": hierarchical_models, "loo": loo, "seed": seed, "n_jobs": n_jobs}
    return RTResult(task=task, specs=tuple(specs), settings=settings, notes=tuple(notes), measure=chosen.name,
                    fits=fits_table, compare=compare, selection=selection, blocks=blocks, diagnostics=diagnostics,
                    population=population, regressors=table, posteriors=posteriors)


def _hierarchical(chosen: Measure, log: ValidatedLog, table: pd.DataFrame, specs: Sequence[ModelSpec],
                  selection: pd.DataFrame, compare: pd.DataFrame, run: Mapping[str, object]
                  ) -> tuple[dict, pd.DataFrame, pd.DataFrame, pd.DataFrame, list[str]]:
    """Return (posteriors, diagnostics, population, compare, notes) of the hierarchical models in play.

    ``run``: draws, chains, tune, cores, progress (the sampler's own bar),
    gate, refits, loo, forms, which ("in_play" or "all"), seed and
    progress_option (the step's ``progress``).
    """
    columns = {c: table[c].to_numpy() for c in (*chosen.columns, "leak", "alpha", "params_from")}
    ids = [s.model_id for s in specs]
    sampled, why = in_play(selection, ids) if run["which"] == "in_play" else (ids, "all requested")
    notes = [f"hierarchical models sampled: {', '.join([*sampled, BASELINE_MODEL])} ({why}; "
             "hierarchical_models='all' samples every learner)"]
    sampler = {k: run[k] for k in ("draws", "chains", "tune", "cores", "progress")}
    posteriors, diagnostics, elpd, population, more = fit_measure_models(
        chosen, log.frame, columns, ids, sampler, seed=run["seed"], requested=run["forms"], gate=run["gate"],
        refits=run["refits"], progress=run["progress_option"], sampled=sampled, loo=run["loo"])
    return posteriors, diagnostics, population, merge_elpd(compare, elpd), notes + more


def _compared(fits: pd.DataFrame, block_rows: pd.DataFrame, chosen: Measure, specs: Sequence[ModelSpec],
              seed: int, bootstrap: int, notes: list[str]
              ) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, list[str]]:
    """Return (selection, compare, blocks, notes) of the per-participant path, look-alike models compared once."""
    merge = same_evidence(fits, lookalikes(specs))
    selection = rfx_selection(fits, seed, merge)
    blocks = rank_blocks(block_rows, chosen, seed, merge)
    notes = (notes + _leak_notes(fits, bootstrap) + verdict_words(selection) + bic_words(fits)
             + [w for w in [block_words(blocks)] if w] + _slope_notes(fits, chosen))
    return selection, compare_table(fits, selection), blocks, notes


def _learner_fits(log: ValidatedLog, task: object, specs: Sequence[ModelSpec], fits: pd.DataFrame | None,
                  fixed: Mapping[str, float] | None, seed: int, n_jobs: int) -> tuple[pd.DataFrame | None, list[str]]:
    """Return (the learner values to use, notes): in guess designs a free leak no fit gives is fitted to the guesses.

    Choosing the leak on the measure itself and then testing the measure's
    slope at it makes the slope's interval too narrow; the guesses are
    independent evidence about the leak (:func:`foretell.fitting.participants.fit_participants`,
    warm-up as in the measure, no cross-validation or block refits).
    """
    if design(task) != "guess" or (fixed is not None and "leak" in fixed):
        return fits, []
    given = set(fits["model"]) if fits is not None else set()
    leaky = [s for s in specs if "leak" in s.free and s.model_id not in given]
    if not leaky:
        return fits, []
    fitted = fit_participants(log, task, leaky, cv=False, per_block=False, warmup=max(s.depth for s in specs),
                              seed=child_int(seed, "rt", "leak"), n_jobs=n_jobs, progress=False).fits
    note = (f"leak of {', '.join(s.model_id for s in leaky)} fitted to each participant's guesses (maximum "
            "likelihood, as foretell fit does), not chosen on the measure")
    return (fitted if fits is None else pd.concat([fits, fitted], ignore_index=True)), [note]


def _per_participant(log: ValidatedLog, chosen: Measure, path: Path, n_jobs: int, progress: bool | None
                     ) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Return (regressors, fits, block rows): participants in batches of whole participants on the workers."""
    edges = [r.start for r in participant_spans(log.frame).values()] + [len(log.frame)]
    workers = job_count(n_jobs)
    ranges = batches(np.diff(edges), workers, _BATCH_TRIALS)
    jobs = (delayed(participant_path)(_rows_of(log, chosen, edges[a], edges[b]), path) for a, b in ranges)
    done = []
    with workers_stopped(n_jobs), stage("rt", "participants fitted", len(edges) - 1, progress) as bar:
        for (a, b), one in zip(ranges, Parallel(n_jobs=workers, return_as="generator")(jobs)):
            done.append(one)
            bar.advance(b - a)
    return (stack_tables([t for t, _, _ in done]), pd.DataFrame([row for _, f, _ in done for row in f]),
            pd.DataFrame([row for _, _, b in done for row in b]))


def _with_measure(table: pd.DataFrame, log: ValidatedLog, chosen: Measure) -> pd.DataFrame:
    """Return the regressors table with the measure's raw value of each trial (column named as the measure).

    ``used``: whether the trial has no reason to be left out of the fits (screened out, warm-up, and, in
    reaction designs, an error, after an error or at a block's start); a model whose regressor is undefined
    on a trial also leaves it out.
    """
    keys = ["participant", "session", "block", "trial"]
    values = log.frame[keys].assign(**{chosen.name: chosen.values, "used": chosen.reason == 0})
    return table.merge(values, on=keys, how="left", validate="many_to_one", sort=False)


def _values(log: ValidatedLog, measure: str | pd.Series | np.ndarray) -> tuple[str, np.ndarray]:
    """Return (the measure's name, its raw values per log row): "rt", a log column, or aligned values ("measure")."""
    frame = log.frame
    if isinstance(measure, str):
        if measure != "rt" and measure not in frame.columns:
            raise UsageError(f"measure {measure!r} is not a column of the log; columns: "
                             f"{', '.join(map(str, frame.columns))}")
        raw = pd.to_numeric(frame[measure], errors="coerce") if measure in frame.columns \
            else pd.Series(np.nan, index=frame.index)
        if measure != "rt" and raw.isna().all():
            raise UsageError(f"measure {measure!r} holds no numbers")
        return measure, raw.to_numpy(dtype=float)
    raw = pd.to_numeric(measure, errors="coerce") if isinstance(measure, pd.Series) \
        else pd.Series(np.asarray(measure, dtype=float))
    if len(raw) != len(frame):
        raise UsageError(f"the measure has {len(raw)} values but the log has {len(frame)} trials")
    if isinstance(measure, pd.Series) and not measure.index.equals(frame.index):
        raw = raw.reindex(frame.index)
    return "measure", raw.to_numpy(dtype=float)


def _rows_of(log: ValidatedLog, chosen: Measure, start: int, stop: int) -> tuple[ValidatedLog, Measure]:
    """Return the log and the measure restricted to rows start:stop (whole participants)."""
    rows = slice(start, stop)
    return replace(log, frame=log.frame.iloc[rows].reset_index(drop=True)), chosen.part(rows)


def _drop_notes(chosen: Measure, frame: pd.DataFrame) -> list[str]:
    """Return the plain-words account of the model and of the trials left out."""
    what = {"screen": "screened out or missing", "warmup": "session warm-up", "error": "error trials",
            "after_error": "trials after an error", "block_start": "first trials of a block"}
    counts = {r: int((chosen.reason == i).sum()) for i, r in enumerate(DROP_REASONS, 1)}
    parts = [f"{n} {what[r]}" for r, n in counts.items() if n and r in what]
    transform = "log " if chosen.log_transform else ""
    terms = ", ".join(BASELINE_WORDS[t] + (f" ({TRIAL_SPLINE_DF} df)" if t == "trial_spline" else "")
                      for t in chosen.baseline) or "an intercept alone"
    return [f"{chosen.name}: {transform}{chosen.name} on {', '.join(chosen.columns)} plus the time-on-task "
            f"baseline ({terms}); the baseline alone is model {BASELINE_MODEL}; "
            f"{int((chosen.reason == 0).sum())} of {len(frame)} trials usable"
            + (f" (left out: {', '.join(parts)})" if parts else "")]


def _leak_notes(fits: pd.DataFrame, bootstrap: int) -> list[str]:
    """Return the line saying which leaks were chosen on the measure and how their intervals were made."""
    if "params_from" not in fits.columns:
        return []
    chosen = fits.loc[fits["params_from"] == "held_out", "model"].unique().tolist()
    if not chosen:
        return []
    how = (f"slope intervals from {bootstrap} moving-block resamples that repeat the choice (Efron, 2014)"
           if bootstrap else "no slope interval (bootstrap=0)")
    return [f"leak of {', '.join(chosen)} chosen per participant on held-out blocks of the measure; {how}"]


def _slope_notes(fits: pd.DataFrame, chosen: Measure) -> list[str]:
    """Return a line on how many participants' slopes exclude 0 at the 95% level, per model."""
    if "slope_low" not in fits.columns:
        return []
    lines = []
    for model, rows in fits[fits["model"] != BASELINE_MODEL].groupby("model", sort=False):
        rows = rows.dropna(subset=["slope_low"])
        lines.append(f"{model}: the 95% interval of the {chosen.main} slope (AR(1) GLS, HAC at Andrews' lag with "
                     f"HC3 scores or the leak bootstrap, Student's t at Satterthwaite's degrees of freedom) is "
                     f"above 0 for {int((rows['slope_low'] > 0).sum())} and "
                     f"below 0 for {int((rows['slope_high'] < 0).sum())} of {len(rows)} participants (not "
                     "corrected for multiple comparisons)")
    return lines

