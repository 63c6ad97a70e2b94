"""Per-participant maximum-likelihood fits of learner models to guesses, with CV and per-block refits."""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from foretell.cluster import batches, job_count, workers_stopped
from foretell.errors import LogError, UsageError
from foretell.fitting.model import Model
from foretell.fitting.search import solve_model
from foretell.fitting.tables import FitTables, Predictions, assemble, model_tables
from foretell.fitting.trials import Participant, prepare
from foretell.logs import ValidatedLog, unscorable
from foretell.models import ModelSpec, model_specs
from foretell.params import PARAMS
from foretell.progress import stage
from foretell.tasks import Task
from foretell.validation import check_count, check_n_jobs, check_seed, child_rng

_CHUNK_TRIALS = 50_000  # most trials per batch of participants solved together


@dataclass(frozen=True)
class FitOptions:
    """How to fit: parameters freed or held, random starts, what to compute.

    Attributes
    ----------
    free : tuple of str
        Learner parameters fitted in every model that has them (``leak``, ``alpha``).
    fixed : tuple of (name, value)
        Parameters held at given values (e.g. ``(("lapse", 0.0),)``); they override ``free``.
    n_starts : int
        Starts per whole-session fit (see :func:`foretell.fitting.search.solve_model`).
    cv, per_block : bool
        Whether to add leave-one-block-out cross-validation and the block refits.
    warmup : int or None
        Unscored trials at the start of each session (None: the largest depth compared).
    seed : int
        The seed of the random starts (:func:`foretell.validation.child_rng`).
    """

    free: tuple[str, ...] = ()
    fixed: tuple[tuple[str, float], ...] = ()
    n_starts: int = 3
    cv: bool = True
    per_block: bool = True
    warmup: int | None = None
    seed: int = 0

    @classmethod
    def make(cls, *, free: Iterable[str] = (), fixed: Mapping[str, float] | None = None,
             n_starts: int = 3, cv: bool = True, per_block: bool = True,
             warmup: int | None = None, seed: int | np.random.Generator = 0) -> "FitOptions":
        """Return validated options from the keyword arguments of the public functions.

        Raises
        ------
        UsageError
            For an unknown or out-of-domain fixed parameter, a fixed lapse of 1,
            ``n_starts`` below 1, a negative ``warmup`` or a bad ``seed``.
        """
        fixed = dict(fixed or {})
        for name, value in fixed.items():
            if name not in PARAMS:
                raise UsageError(f"cannot fix {name!r}: fixable parameters are {', '.join(PARAMS)}")
            PARAMS[name].check(value, "fixed")
            if name == "lapse" and float(value) >= 1.0:
                raise UsageError("fixed lapse must be below 1: at 1 every guess ignores the learner")
        free = (free,) if isinstance(free, str) else tuple(free)
        return cls(free, tuple(sorted((k, float(v)) for k, v in fixed.items())), check_count("n_starts", n_starts),
                   bool(cv), bool(per_block), None if warmup is None else check_count("warmup", warmup, 0),
                   check_seed(seed))


def _fit_chunk(parts: Sequence[Participant], specs: Sequence[ModelSpec], options: FitOptions,
               symbols: Sequence[str]) -> tuple[list[dict], list[dict], list[np.ndarray]]:
    """Return every model's fit rows, block rows and prediction values for a batch of participants.

    Each participant x model draws its random starts from
    ``child_rng(seed, "starts", participant, model id)``: what a batch holds never
    changes a participant's fits.
    """
    fits, blocks, values = [], [], []
    for spec in specs:
        model = Model(spec, dict(options.fixed), parts, symbols)
        rngs = [child_rng(options.seed, "starts", p.participant, spec.model_id) for p in parts]
        rows, best = solve_model(model, rngs, n_starts=options.n_starts, cv=options.cv,
                                 per_block=options.per_block)
        f, b, v = model_tables(model, rows, best)
        fits += f
        blocks += b
        values.append(v)
    return fits, blocks, values


def fit_participant(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None,
                    **options) -> FitTables:
    """Return the fit tables of a validated log holding one participant.

    Parameters
    ----------
    log : ValidatedLog
        One participant's trials.
    task : Task
    models : sequence of str or ModelSpec, optional
    **options
        As :func:`fit_participants`.

    Returns
    -------
    FitTables

    Raises
    ------
    UsageError
        When the log holds more than one participant.
    """
    if log.frame["participant"].nunique() != 1:
        raise UsageError("fit_participant takes one participant's trials; use fit_participants")
    return fit_participants(log, task, models, **options)


def fit_participants(log: ValidatedLog, task: Task, models: Sequence[str | ModelSpec] | None = None, *,
                     free: Iterable[str] = (), fixed: Mapping[str, float] | None = None,
                     n_starts: int = 3, cv: bool = True, per_block: bool = True,
                     warmup: int | None = None, seed: int | np.random.Generator = 0, n_jobs: int = 1,
                     progress: bool | None = None) -> FitTables:
    """Return the fit tables of every participant of a validated log.

    Parameters
    ----------
    log : ValidatedLog
    task : Task
    models : sequence of str or ModelSpec, optional
        Model ids or specs (default :func:`foretell.models.default_models`).
    free : iterable of str
        Learner parameters (leak, alpha) fitted in every model that has them.
    fixed : mapping, optional
        Parameters held at given values.
    n_starts : int, default 3
        Starts per whole-session fit.
    cv, per_block : bool, default True
        Add leave-one-block-out cross-validation, and the block refits.
    warmup : int, optional
        Unscored trials at the start of each session (default K, the largest
        depth compared).
    seed : int or numpy.random.Generator, default 0
        Participant p's random starts for model m come from
        ``child_rng(seed, "starts", p, m)``.
    n_jobs : int, default 1
        joblib workers (-1: all cores); the tables do not depend on it.
    progress : bool, optional
        Participants fitted, on stderr (:func:`foretell.progress.shown`: True a bar on a
        terminal and plain lines otherwise; None only on a terminal).

    Returns
    -------
    FitTables
        Participants with nothing to score are listed in ``excluded``.

    Raises
    ------
    UsageError
        For a log that is not validated, or bad options.
    LogError
        When nobody has a scored trial.

    Notes
    -----
    The likelihood of a participant's guesses is the product over scored
    trials of the choice rule P(guess = a) = (1 - lapse)
    softmax(inv_temp log p)_a + lapse / m applied to the learner's prediction
    p (:mod:`foretell.choice`). In every session the first K trials are
    warm-up, so all models are scored on the same trials; missed guesses are
    not scored but their stimuli still feed the learner; learners restart at
    each session and carry on across blocks. AIC = 2k - 2 ln L (Akaike, 1974)
    and BIC = k ln n - 2 ln L (Schwarz, 1978), k free parameters, n scored trials.

    Every fit is a row: the whole session, each leave-one-block-out fold
    (fitted on the other blocks' guesses) and each block's refit (every free
    parameter refitted on that block's guesses, the learner still running
    over the whole session). The rows of many participants are solved
    together by a bounded projected Newton method on inv_temp and lapse
    (:mod:`foretell.fitting.optimise`), each row on its own, so how
    participants are batched (and ``n_jobs``) never changes a result. Free
    learner parameters are found on the profile likelihood: a grid that
    contains the nested model's values (no leak, alpha = 1/2), so a leaky
    model never fits worse than the model it nests, then Brent's method
    (:mod:`foretell.fitting.search`). A fit that does not converge, and every
    fit with two free learner parameters, is continued by bounded
    Nelder-Mead; ``converged`` and ``message`` report both. ``corr_<a>_<b>``
    are the estimates' correlations from the inverse Hessian
    (:mod:`foretell.fitting.tables`), which show trade-offs such as inv_temp
    against lapse on near-uniform predictions.
    """
    if not isinstance(log, ValidatedLog):
        raise UsageError("fit_participants takes a validated log (foretell.logs.load_log or validate_log)")
    options = FitOptions.make(free=free, fixed=fixed, n_starts=n_starts, cv=cv,
                              per_block=per_block, warmup=warmup, seed=seed)
    n_jobs = check_n_jobs(n_jobs)
    specs = model_specs(models, task, options.free)
    warm = max(s.depth for s in specs) if options.warmup is None else options.warmup
    prepared = prepare(log.frame, warm)
    lost = unscorable(log, warm)
    group_of = {p.participant: p.group for p in prepared}
    excluded = pd.DataFrame({"participant": lost["participant"],
                             "group": [group_of[pid] for pid in lost["participant"]],
                             "reason": lost["reason"]})
    out = set(lost["participant"])
    parts = [p for p in prepared if p.participant not in out]
    if not parts:
        raise LogError(f"no participant has a scored trial (warm-up {warm} trials per session, "
                       "missed guesses unscored): nothing to fit", path=log.source)
    fit_rows, block_rows, predictions = _fit_batches(parts, specs, options, task.symbols, n_jobs, progress)
    return assemble(fit_rows, block_rows, predictions.frame(), specs, dict(options.fixed), excluded)


def _fit_batches(parts: Sequence[Participant], specs: Sequence[ModelSpec], options: FitOptions,
                 symbols: Sequence[str], n_jobs: int, progress: bool | None
                 ) -> tuple[list[dict], list[dict], Predictions]:
    """Return every batch's fit rows and block rows, and the filled per-trial store, with its progress."""
    workers = job_count(n_jobs)
    chunks = [parts[a:b] for a, b in batches([len(p.guess) for p in parts], workers, _CHUNK_TRIALS)]
    jobs = (delayed(_fit_chunk)(chunk, specs, options, symbols) for chunk in chunks)
    fit_rows, block_rows, predictions = [], [], Predictions(parts, specs, symbols)
    with workers_stopped(n_jobs):
        with Parallel(n_jobs=workers, return_as="generator") as parallel, \
                stage("fit", "participants fitted", len(parts), progress) as bar:
            start = 0
            for chunk, (f, b, values) in zip(chunks, parallel(jobs)):
                fit_rows += f
                block_rows += b
                predictions.add(start, values)  # copied in as it comes (peak memory)
                start += len(chunk)
                bar.advance(len(chunk))
    return fit_rows, block_rows, predictions
