"""Simulated participants: a learner model, the choice rule and a reaction-time law.

A simulated participant watches a stimulus stream drawn from the task; before
each reveal it guesses from its learner's prediction through the choice rule
(:mod:`foretell.choice`) and answers after a reaction time drawn from
:class:`RTLaw`; a small share of guesses is missed. The results are a
response log in the canonical format and a truth table of generating models
and parameters, for demos and for parameter and model recovery.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from foretell.choice import choice_proba, sample_choices
from foretell.errors import UsageError
from foretell.params import PARAMS
from foretell.learners.base import Learner, check_hyper
from foretell.models import normalise_model_id, parse_model
from foretell.tasks import Task


@dataclass(frozen=True)
class RTLaw:
    """A shifted log-normal reaction-time law driven by the learner's uncertainty.

    rt = shift + exp(mu + sigma z), z ~ N(0, 1), with
    mu = log_scale + per_bit * H_t - per_block * (block - 1), H_t the entropy
    in bits of the learner's prediction on trial t. Defaults (from memory,
    facts of the trade): choice RTs of a few hundred ms; RT rising roughly
    linearly with information at 0.1-0.2 s per bit (Hick, 1952; Hyman, 1953) --
    here the median rises from 0.45 s at 0 bits by about 0.15 s per bit near
    1 bit (0.67 s at log2(3) bits); a slow practice speed-up over blocks
    (about 3% of the variable part per block); log-RT spread 0.25.
    """

    shift: float = 0.2
    log_scale: float = math.log(0.25)
    per_bit: float = 0.4
    per_block: float = 0.03
    sigma: float = 0.25

    def __post_init__(self) -> None:
        check_hyper("RTLaw shift", self.shift, 0.0, 10.0)
        check_hyper("RTLaw log_scale", self.log_scale, -10.0, 5.0)
        check_hyper("RTLaw per_bit", self.per_bit, 0.0, 5.0)
        check_hyper("RTLaw per_block", self.per_block, 0.0, 1.0)
        check_hyper("RTLaw sigma", self.sigma, 0.0, 3.0, low_open=True)

    def log_location(self, entropy_bits: np.ndarray, block: np.ndarray) -> np.ndarray:
        """Return mu, the mean of log(rt - shift), for each trial."""
        return self.log_scale + self.per_bit * np.asarray(entropy_bits) \
            - self.per_block * (np.asarray(block) - 1)

    def sample(self, entropy_bits: np.ndarray, block: np.ndarray,
               rng: np.random.Generator) -> np.ndarray:
        """Return one reaction time (s) per trial."""
        mu = self.log_location(entropy_bits, block)
        return self.shift + np.exp(mu + self.sigma * rng.standard_normal(mu.shape))

    def params(self) -> dict[str, float]:
        """Return the law's parameters as truth-table columns (prefixed ``rt_``)."""
        return {f"rt_{k}": v for k, v in asdict(self).items()}


DEFAULT_LEAK_RANGE = (0.05, 0.4)
"""Leak drawn for count-K-leak participants unless a range is given (forgetting 5-40% per trial)."""


@dataclass(frozen=True)
class ParticipantSpec:
    """How to draw a simulated participant: a model identifier and its parameter ranges.

    ``model`` is one of the fitter's identifiers (count-K, count-K-leak,
    count-task, mix-D, source; see :func:`foretell.models.parse_model`).
    inv_temp, lapse and leak are drawn uniformly from their (low, high)
    ranges for each participant (give (v, v) to fix a value); alpha is fixed.
    leak applies to count-K-leak models only: ``None`` means
    :data:`DEFAULT_LEAK_RANGE` for them, and a leaky model needs a range
    above 0 (with leak 0 it would be the model without leak, not the one the
    truth table names).
    """

    model: str
    inv_temp: tuple[float, float] = (0.5, 4.0)
    lapse: tuple[float, float] = (0.01, 0.06)
    leak: tuple[float, float] | None = None
    alpha: float = 0.5
    rt: RTLaw = field(default_factory=RTLaw)
    miss_rate: float = 0.02

    def __post_init__(self) -> None:
        leaky = normalise_model_id(self.model).endswith("-leak")
        if self.leak is None:
            object.__setattr__(self, "leak", DEFAULT_LEAK_RANGE if leaky else (0.0, 0.0))
        for name, (low, high), top in (("inv_temp", self.inv_temp, 1e3), ("lapse", self.lapse, 1.0),
                                       ("leak", self.leak, 1.0)):
            check_hyper(f"ParticipantSpec {name} low", low, 0.0, top)
            check_hyper(f"ParticipantSpec {name} high", high, low, top)
        if self.leak[1] >= 1.0:
            raise UsageError(f"ParticipantSpec leak must stay below 1, got range {self.leak}")
        if self.leak[1] > 0 and not leaky:
            raise UsageError(f"ParticipantSpec {self.model!r}: a leak range {self.leak} needs a "
                             "count-K-leak model")
        if leaky and self.leak[0] <= 0:
            raise UsageError(f"ParticipantSpec {self.model!r}: a leaky model needs a leak range "
                             f"above 0 (with leak 0 it is the model without leak), got {self.leak}")
        PARAMS["alpha"].check(self.alpha, "ParticipantSpec")
        check_hyper("ParticipantSpec miss_rate", self.miss_rate, 0.0, 1.0, high_open=True)

    def draw(self, task: Task, rng: np.random.Generator) -> tuple[Learner, dict[str, float]]:
        """Return a learner and the drawn parameters (truth-table columns) for one participant."""
        spec = parse_model(self.model, task)
        values = {"inv_temp": rng.uniform(*self.inv_temp), "lapse": rng.uniform(*self.lapse)}
        leak = float(rng.uniform(*self.leak)) if "leak" in spec.tunable else math.nan
        alpha = self.alpha if "alpha" in spec.tunable else math.nan
        learner = spec.learner(**{k: v for k, v in (("alpha", alpha), ("leak", leak))
                                  if k in spec.tunable})
        return learner, {**values, "alpha": alpha, "leak": leak, **self.rt.params(),
                         "miss_rate": self.miss_rate}


def simulate_participant(task: Task, learner: Learner, inv_temp: float, lapse: float,
                         n_trials: int, rng: np.random.Generator, rt: RTLaw = RTLaw(),
                         miss_rate: float = 0.02, *, block_length: int | None = None,
                         deadline: float = 2.0, reveal_duration: float = 0.8,
                         block_break: float = 20.0) -> pd.DataFrame:
    """Return one simulated session as a canonical log without the participant and group columns.

    Columns session (1), block, trial (1-based), stimulus, response ('' when
    missed), rt (s, NaN when missed), onset (guess prompt, s) and reveal_onset
    (s). The stimulus is drawn from ``task``; the guess from
    P(guess = a) = (1 - lapse) softmax(inv_temp log p)_a + lapse / m with p
    the learner's prediction; the RT from ``rt`` with the prediction's
    entropy. A guess is missed with probability ``miss_rate`` and whenever
    the drawn RT exceeds ``deadline``; the reveal comes at the response (or at
    the deadline), the next prompt ``reveal_duration`` later, plus
    ``block_break`` between blocks. Times are rounded to 1 ms.
    """
    if isinstance(n_trials, bool) or not isinstance(n_trials, (int, np.integer)) or n_trials < 1:
        raise UsageError(f"n_trials must be a positive whole number, got {n_trials!r}")
    PARAMS["inv_temp"].check(inv_temp)
    PARAMS["lapse"].check(lapse)
    check_hyper("miss_rate", miss_rate, 0.0, 1.0, high_open=True)
    block_length = _block_length(task, block_length, n_trials)
    m = task.n_symbols
    x = task.sample(int(n_trials), seed=rng)
    pred = learner.next_proba(x, m)
    guess_p = choice_proba(pred, inv_temp, lapse)
    response = sample_choices(guess_p, rng.random(n_trials))
    with np.errstate(divide="ignore", invalid="ignore"):
        entropy = -np.where(pred > 0, pred * np.log2(pred), 0.0).sum(axis=1)
    block = np.arange(n_trials) // block_length + 1
    rt_s = rt.sample(entropy, block, rng)
    missed = (rng.random(n_trials) < miss_rate) | (rt_s > deadline)
    rt_s = np.where(missed, np.nan, np.round(rt_s, 3))
    wait = np.where(missed, deadline, rt_s)
    new_block = np.r_[False, block[1:] != block[:-1]]
    gap = reveal_duration + block_break * new_block
    onset = np.round(np.cumsum(np.r_[0.0, wait[:-1]]) + np.cumsum(gap) - gap[0], 3)
    labels = np.asarray(task.symbols, dtype=object)
    return pd.DataFrame({
        "session": 1,
        "block": block,
        "trial": np.arange(1, n_trials + 1),
        "stimulus": labels[x],
        "response": np.where(missed, "", labels[response]),
        "rt": rt_s,
        "onset": onset,
        "reveal_onset": np.round(onset + wait, 3),
    })


def simulate_participants(task: Task, n_participants: int, n_blocks: int,
                          groups: Mapping[str, Sequence[ParticipantSpec | str]] | None = None,
                          models: Sequence[ParticipantSpec | str] | None = None,
                          seed: int = 0, block_length: int | None = None
                          ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return (log, truth): simulated participants in the canonical log format and their generators.

    ``groups`` maps a group name to the specs its participants cycle through
    (participants are dealt to groups in turn, so group sizes differ by at
    most one); or ``models`` gives the specs of a single group named "sim"
    (default: count-0, count-1, count-2 with the :class:`ParticipantSpec`
    ranges). A plain model identifier stands for ``ParticipantSpec(model)``.
    Participant ids are "p01", "p02", ... Each participant gets an
    independent random stream spawned from ``seed``: the same seed gives the
    same frames. The truth table has participant, group, model, inv_temp,
    lapse, alpha, leak (NaN where the model has none), the RT-law parameters
    (rt_*) and miss_rate.
    """
    if groups is not None and models is not None:
        raise UsageError("give either groups= or models=, not both")
    if isinstance(n_participants, bool) or not isinstance(n_participants, (int, np.integer)) \
            or n_participants < 1:
        raise UsageError(f"n_participants must be a positive whole number, got {n_participants!r}")
    if isinstance(n_blocks, bool) or not isinstance(n_blocks, (int, np.integer)) or n_blocks < 1:
        raise UsageError(f"n_blocks must be a positive whole number, got {n_blocks!r}")
    if groups is None:
        groups = {"sim": models if models is not None else ("count-0", "count-1", "count-2")}
    plan = {name: [s if isinstance(s, ParticipantSpec) else ParticipantSpec(s) for s in specs]
            for name, specs in groups.items()}
    empty = [name for name, specs in plan.items() if not specs]
    if not plan or empty:
        raise UsageError(f"every group needs at least one ParticipantSpec; empty: {empty or 'all'}")
    block_length = _block_length(task, block_length, None)
    names = list(plan)
    width = max(2, len(str(n_participants)))
    streams = np.random.SeedSequence(seed).spawn(n_participants)
    logs, truth = [], []
    for i, stream in enumerate(streams):
        group = names[i % len(names)]
        specs = plan[group]
        spec = specs[(i // len(names)) % len(specs)]
        rng = np.random.default_rng(stream)
        learner, params = spec.draw(task, rng)
        pid = f"p{i + 1:0{width}d}"
        session = simulate_participant(task, learner, params["inv_temp"], params["lapse"],
                                       n_blocks * block_length, rng, rt=spec.rt,
                                       miss_rate=spec.miss_rate, block_length=block_length)
        session.insert(0, "group", group)
        session.insert(0, "participant", pid)
        logs.append(session)
        truth.append({"participant": pid, "group": group, "model": spec.model, **params})
    return pd.concat(logs, ignore_index=True), pd.DataFrame(truth)


def _block_length(task: Task, block_length: int | None, n_trials: int | None) -> int:
    """Return the block length to use: the argument, else the task's, else all trials (or 100)."""
    value = block_length if block_length is not None else task.block_length
    if value is None:
        value = n_trials if n_trials is not None else 100
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise UsageError(f"block_length must be a positive whole number, got {value!r}")
    return int(value)
