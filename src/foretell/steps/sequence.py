"""The sequence step: each participant's stimulus sequence for the experiment, drawn from the task's source."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd

from foretell.errors import UsageError
from foretell.inputs import as_task
from foretell.labels import ALL
from foretell.results import Result
from foretell.tasks import Task
from foretell.text import plural
from foretell.validation import check_count, check_seed, child_rng

MAX_STATIONARY_PASTS = 50_000
"""The most pasts of maximal depth for which the contexts' stationary shares are computed."""


@dataclass(frozen=True, eq=False, kw_only=True)
class SequenceResult(Result):
    """The stimulus sequences of an experiment and how their contexts compare with the source.

    Attributes
    ----------
    sequences : pandas.DataFrame
        participant, block, trial (1.. within the block), stimulus: one row
        per trial to present; written as ``sequences/<participant>.csv``.
    blocks : pandas.DataFrame
        participant, block, trials, redraws (how often the block was drawn
        again to pass the context check), fewest (the fewest trials of any
        context in the block kept).
    contexts : pandas.DataFrame
        participant (``all`` = everyone), context, trials (trials whose
        context, given the stimuli shown before them, is this one), share
        (of the trials whose context is determined), stationary (the
        context's probability under the source's stationary distribution;
        NaN when not computed).
    transitions : pandas.DataFrame
        participant (``all`` = everyone), context, symbol, count, frequency
        (count / the context's trials; NaN when it has none), probability
        (the source's).
    """

    step: ClassVar[str] = "sequence"
    sequences: pd.DataFrame
    blocks: pd.DataFrame
    contexts: pd.DataFrame
    transitions: pd.DataFrame

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return one ``sequences/<participant>`` table per participant, then blocks, contexts, transitions."""
        per = {f"sequences/{p}": rows.reset_index(drop=True)
               for p, rows in self.sequences.groupby("participant", sort=True)}
        return per | {"blocks": self.blocks, "contexts": self.contexts, "transitions": self.transitions}


def make_sequences(task: object, *, n_participants: int, n_blocks: int, trials_per_block: int | None = None,
                   burn_in: int | None = None, min_context_count: int = 0, max_redraws: int = 1000,
                   seed: int | np.random.Generator = 0) -> SequenceResult:
    """Return every participant's stimulus sequence, drawn from the task's source with :meth:`Task.sample`.

    Parameters
    ----------
    task : Task, str or pathlib.Path
        A task that gives its source (:func:`foretell.inputs.as_task`).
    n_participants : int
        Participants, labelled p01, p02, ... (zero-padded to the same width).
    n_blocks : int
        Blocks per participant. A participant's blocks are one continuous
        sequence: each block starts from the past the previous one ended in.
    trials_per_block : int, optional
        Default: the task's ``block_length``.
    burn_in : int, optional
        None (the default): the past before the first trial is drawn from the
        source's exact stationary distribution over pasts of maximal depth
        (:meth:`Task.sample`; with several recurrent classes, one is drawn
        uniformly). A number k: the chain starts from a uniformly drawn past
        and k symbols are drawn and discarded, for sources whose chain is too
        large for the exact distribution.
    min_context_count : int, default 0
        Every context of the source must be the context of at least this
        many trials of each block (contexts are those the participant can
        tell from the stimuli shown before, so the first trials of a session
        count for none); a block that fails is drawn again.
    max_redraws : int, default 1000
        Most redraws of one block before giving up.
    seed : int or numpy.random.Generator, default 0
        Participant p draws from ``child_rng(seed, p)`` (its label): adding
        participants leaves the others' sequences unchanged.

    Returns
    -------
    SequenceResult
        The notes say how many blocks were redrawn.

    Raises
    ------
    TaskError
        When the task gives no source, or (with ``burn_in=None``) its chain
        is too large for the exact stationary distribution.
    UsageError
        For bad counts, no block length, or a block still failing the check
        after ``max_redraws`` redraws.

    Examples
    --------
    >>> result = make_sequences("lantern-relay", n_participants=20, n_blocks=5, seed=1)  # doctest: +SKIP
    >>> foretell.write("sequences/", result)  # doctest: +SKIP
    """
    task = as_task(task)
    seed = check_seed(seed)
    n_participants, n_blocks = check_count("n_participants", n_participants), check_count("n_blocks", n_blocks)
    if trials_per_block is None and task.block_length is None:
        raise UsageError(f"task {task.name!r} gives no block_length: give trials_per_block")
    size = check_count("trials_per_block", task.block_length if trials_per_block is None else trials_per_block)
    burn = None if burn_in is None else check_count("burn_in", burn_in, 0)
    least, most = check_count("min_context_count", min_context_count, 0), check_count("max_redraws", max_redraws, 0)
    width = max(2, len(str(n_participants)))
    labels = [f"p{i:0{width}d}" for i in range(1, n_participants + 1)]
    rows, blocks = [], []
    for label in labels:
        x, redraws, fewest = _participant(task, child_rng(seed, label), n_blocks, size, burn, least, most, label)
        rows.append(pd.DataFrame({"participant": label, "block": np.repeat(np.arange(1, n_blocks + 1), size),
                                  "trial": np.tile(np.arange(1, size + 1), n_blocks),
                                  "stimulus": np.array(task.symbols, dtype=object)[x]}))
        blocks.append(pd.DataFrame({"participant": label, "block": np.arange(1, n_blocks + 1), "trials": size,
                                    "redraws": redraws, "fewest": fewest}))
    sequences = pd.concat(rows, ignore_index=True)
    contexts, transitions = context_tables(task, sequences)
    blocks = pd.concat(blocks, ignore_index=True)
    settings = {"task": task.name, "n_participants": n_participants, "n_blocks": n_blocks,
                "trials_per_block": size, "burn_in": burn, "min_context_count": least,
                "max_redraws": most, "seed": seed}
    return SequenceResult(task=task, settings=settings, notes=tuple(_notes(task, blocks, burn, least)),
                          sequences=sequences, blocks=blocks, contexts=contexts, transitions=transitions)


def _participant(task: Task, rng: np.random.Generator, n_blocks: int, size: int, burn: int | None,
                 least: int, most: int, label: str) -> tuple[np.ndarray, list[int], list[int]]:
    """Return one participant's symbol indices, the redraws of each block and its fewest context trials."""
    d = task.max_depth
    past = None
    if burn is not None:
        start = rng.integers(task.n_symbols, size=d)
        past = np.r_[start, task.sample(burn, rng, initial=start)][-d:] if d else []
    shown: list[np.ndarray] = []
    redraws, fewest = [], []
    for block in range(1, n_blocks + 1):
        seen = np.concatenate(shown)[-d:] if shown and d else np.empty(0, dtype=np.int64)
        for attempt in range(most + 1):
            x = task.sample(size, rng, initial=past)
            counts = _context_counts(task, np.concatenate([seen, x]), len(x))
            if counts.min() >= least:
                break
        else:
            worst = task.context_label(task.contexts[int(np.argmin(counts))])
            raise UsageError(f"participant {label}, block {block}: after {plural(most, 'redraw')} context "
                             f"{worst!r} still occurs fewer than {least} times in {size} trials; lower "
                             "min_context_count or lengthen the blocks")
        shown.append(x)
        redraws.append(attempt)
        fewest.append(int(counts.min()))
        past = np.concatenate(shown)[-d:] if d else []
    return np.concatenate(shown), redraws, fewest


def _context_counts(task: Task, x: np.ndarray, last: int) -> np.ndarray:
    """Return how many of the last ``last`` trials of ``x`` have each context (given the trials before them in ``x``)."""
    ctx = task.context_indices(x)[len(x) - last:]
    return np.bincount(ctx[ctx >= 0], minlength=len(task.contexts))


def context_tables(task: Task, sequences: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return the context and transition tables of stimulus sequences against the source.

    Parameters
    ----------
    task : Task
    sequences : pandas.DataFrame
        participant, stimulus (labels), one participant's trials in order.

    Returns
    -------
    (pandas.DataFrame, pandas.DataFrame)
        See :class:`SequenceResult` (``contexts`` and ``transitions``).
    """
    m, k = task.n_symbols, len(task.contexts)
    names = [task.context_label(c) for c in task.contexts]
    stationary = stationary_shares(task)
    per: dict[str, np.ndarray] = {}
    for label, rows in sequences.groupby("participant", sort=True):
        x = task.encode(rows["stimulus"].tolist())
        ctx = task.context_indices(x)
        keep = ctx >= 0
        per[str(label)] = np.bincount(ctx[keep] * m + x[keep], minlength=k * m).reshape(k, m)
    per[ALL] = sum(per.values())
    contexts, transitions = [], []
    for label, counts in per.items():
        trials = counts.sum(axis=1)
        contexts.append(pd.DataFrame({"participant": label, "context": names, "trials": trials,
                                      "share": trials / max(trials.sum(), 1), "stationary": stationary}))
        with np.errstate(invalid="ignore", divide="ignore"):
            frequency = counts / trials[:, None]
        transitions.append(pd.DataFrame({"participant": label, "context": np.repeat(names, m),
                                         "symbol": np.tile(task.symbols, k), "count": counts.ravel(),
                                         "frequency": frequency.ravel(), "probability": task.next_probs.ravel()}))
    return pd.concat(contexts, ignore_index=True), pd.concat(transitions, ignore_index=True)


def stationary_shares(task: Task) -> np.ndarray:
    """Return each context's probability under the source's stationary distribution (NaN when not computed).

    The stationary distribution over pasts of maximal depth
    (:meth:`Task.entropy_rate`) summed over the pasts that each context
    predicts from; with several recurrent classes, their average (each is
    drawn with equal probability by :meth:`Task.sample`). NaN for a chain
    of more than :data:`MAX_STATIONARY_PASTS` pasts.
    """
    out = np.zeros(len(task.contexts))
    if task.n_symbols ** task.max_depth > MAX_STATIONARY_PASTS:
        return np.full(len(task.contexts), np.nan)
    classes = task.entropy_rate().classes
    for cls in classes:
        for past, share in zip(cls.pasts, cls.stationary):
            out[task.context_of(list(past))] += share / len(classes)
    return out


def _notes(task: Task, blocks: pd.DataFrame, burn: int | None, least: int) -> list[str]:
    """Return what a reader of the sequences must know: the start, the redraws, shares not computed."""
    start = ("the past before each participant's first trial was drawn from the source's stationary "
             "distribution" if burn is None else
             f"each participant's chain started from a uniformly drawn past and ran {plural(burn, 'symbol')} "
             "(burn-in, discarded) before the first trial")
    notes = [start]
    if least:
        redrawn = int((blocks["redraws"] > 0).sum())
        notes.append(f"{redrawn} of {plural(len(blocks), 'block')} redrawn ({plural(int(blocks['redraws'].sum()), 'redraw')} "
                     f"in all) so that every context is the context of at least {least} trials per block; the blocks "
                     "kept are selected by that check, so their context shares differ from the source's (see "
                     "contexts: share against stationary)")
    if task.n_symbols ** task.max_depth > MAX_STATIONARY_PASTS:
        notes.append(f"stationary context shares not computed: the source has more than "
                     f"{MAX_STATIONARY_PASTS:,} pasts of maximal depth")
    return notes
