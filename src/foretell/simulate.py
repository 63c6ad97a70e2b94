"""Simulated participants: a learner model, the choice rule and a reaction-time law, with their parameter draws.

The results are response logs in the canonical format and truth tables of
generating models and parameters, for demos and for the design check.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from foretell.choice import choice_proba, sample_choices
from foretell.errors import InputError, Problem, UsageError
from foretell.params import PARAMS
from foretell.learners.base import Learner, check_hyper
from foretell.models import ModelSpec, normalise_model_id, parse_model
from foretell.tasks import Task
from foretell.validation import check_count, check_seed, child_rng


@dataclass(frozen=True)
class RTLaw:
    """A shifted log-normal reaction-time law driven by the learner's uncertainty.

    rt = shift + exp(mu + sigma z), z ~ N(0, 1), with
    mu = log_scale + per_bit * H_t - per_block * (block - 1), H_t the entropy
    in bits of the learner's prediction on trial t.

    Attributes
    ----------
    shift : float, default 0.2
        Seconds no response is faster than.
    log_scale : float, default log(0.25)
        mu at 0 bits in the first block.
    per_bit : float, default 0.4
        Rise of mu per bit of entropy.
    per_block : float, default 0.03
        Fall of mu per block (practice).
    sigma : float, default 0.25
        Spread of log(rt - shift).

    Notes
    -----
    Defaults (from memory, facts of the trade): choice RTs of a few hundred
    ms; RT rising roughly linearly with information at 0.1-0.2 s per bit
    (Hick, 1952; Hyman, 1953) -- here the median rises from 0.45 s at 0 bits
    by about 0.15 s per bit near 1 bit (0.67 s at log2(3) bits); a slow
    practice speed-up over blocks (about 3% of the variable part per block).
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


DEFAULT_RANGES: dict[str, tuple[float, float]] = {
    "inv_temp": (0.5, 4.0),
    "lapse": (0.01, 0.06),
    "leak": (0.05, 0.4),
}
"""Uniform ranges simulated participants' parameters are drawn from (leak: leaky models only).

inv_temp from near-random (0.5) to sharply maximising (4) guessing, 1-6% of
guesses at random, 5-40% of every count forgotten per trial. Every range lies
within the fitter's bounds (:data:`foretell.params.PARAMS`), so the truth is
reachable; :func:`check_ranges` keeps replacements so.
"""


@dataclass(frozen=True)
class ParticipantSpec:
    """How to draw a simulated participant: a model identifier and its parameter ranges.

    Attributes
    ----------
    model : str
        One of the fitter's identifiers (count-K, count-K-leak, count-task,
        mix-D, source; :func:`foretell.models.parse_model`).
    inv_temp, lapse : (float, float)
        Uniform ranges, drawn for each participant (give (v, v) to fix a value).
    leak : (float, float) or None
        For count-K-leak models only; None means :data:`DEFAULT_RANGES` for
        them. A leaky model needs a range above 0 (with leak 0 it would be the
        model without leak, not the one the truth table names).
    alpha : float, default 0.5
        The counting prior, fixed.
    rt : RTLaw
    miss_rate : float, default 0.02
        Share of guesses missed at random.

    Raises
    ------
    UsageError
        For ranges outside their domains, or a leak range that does not fit the model.
    """

    model: str
    inv_temp: tuple[float, float] = DEFAULT_RANGES["inv_temp"]
    lapse: tuple[float, float] = DEFAULT_RANGES["lapse"]
    leak: tuple[float, float] | None = None
    alpha: float = 0.5
    rt: RTLaw = field(default_factory=RTLaw)
    miss_rate: float = 0.02

    def __post_init__(self) -> None:
        leaky = normalise_model_id(self.model).endswith("-leak")
        if self.leak is None:
            object.__setattr__(self, "leak", DEFAULT_RANGES["leak"] if leaky else (0.0, 0.0))
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

    Parameters
    ----------
    task : Task
        The stimuli are drawn from its source.
    learner : Learner
    inv_temp, lapse : float
        The choice rule: P(guess = a) = (1 - lapse) softmax(inv_temp log p)_a
        + lapse / m, p the learner's prediction.
    n_trials : int
    rng : numpy.random.Generator
    rt : RTLaw
        Reaction times from the prediction's entropy.
    miss_rate : float, default 0.02
        A guess is missed with this probability, and whenever the drawn RT
        exceeds ``deadline``.
    block_length : int, optional
        Default the task's (else every trial in one block).
    deadline, reveal_duration, block_break : float
        Seconds: the reveal comes at the response (or at the deadline), the
        next prompt ``reveal_duration`` later, plus ``block_break`` between blocks.

    Returns
    -------
    pandas.DataFrame
        session (1), block, trial (1-based), stimulus, response ('' when
        missed), rt (s, NaN when missed), onset (guess prompt, s) and
        reveal_onset (s); times rounded to 1 ms.
    """
    n_trials = check_count("n_trials", n_trials)
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

    Parameters
    ----------
    task : Task
    n_participants, n_blocks : int
    groups : mapping of str to sequence of ParticipantSpec or str, optional
        The specs each group's participants cycle through (participants are
        dealt to groups in turn, so group sizes differ by at most one). A
        plain model id stands for ``ParticipantSpec(model)``.
    models : sequence of ParticipantSpec or str, optional
        The specs of a single group named "sim" (default: count-0, count-1,
        count-2 with the :class:`ParticipantSpec` ranges).
    seed : int or numpy.random.Generator, default 0
        Participant number i (id ``p{i + 1}``) draws from ``child_rng(seed, i)``:
        the same seed gives the same frames, and a participant's draws do not
        depend on how many others are simulated.
    block_length : int, optional
        Default the task's.

    Returns
    -------
    log : pandas.DataFrame
        Participant ids "p01", "p02", ..., group, then the columns of
        :func:`simulate_participant`.
    truth : pandas.DataFrame
        participant, group, model, inv_temp, lapse, alpha, leak (NaN where the
        model has none), the RT-law parameters (rt_*) and miss_rate.

    Raises
    ------
    UsageError
        For both groups and models, bad counts, or an empty group.
    """
    if groups is not None and models is not None:
        raise UsageError("give either groups= or models=, not both")
    n_participants = check_count("n_participants", n_participants)
    n_blocks = check_count("n_blocks", n_blocks)
    seed = check_seed(seed)
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
    logs, truth = [], []
    for i in range(n_participants):
        group = names[i % len(names)]
        specs = plan[group]
        spec = specs[(i // len(names)) % len(specs)]
        pid = f"p{i + 1:0{width}d}"
        rng = child_rng(seed, i)  # keyed by the participant's number, the label its id is written from
        learner, params = spec.draw(task, rng)
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
    return check_count("block_length", value)


def check_ranges(ranges: Mapping[str, tuple[float, float]] | None) -> dict[str, tuple[float, float]]:
    """Return :data:`DEFAULT_RANGES` updated with ``ranges``, each checked against the fit bounds.

    Parameters
    ----------
    ranges : mapping of str to (low, high), optional
        Replacement ranges of inv_temp, lapse or leak.

    Returns
    -------
    dict

    Raises
    ------
    UsageError
        For another parameter, a range that is not two numbers, low > high, a
        range outside the fitter's bounds (:data:`foretell.params.PARAMS`), or
        a leak range reaching 0 (a leaky model at leak 0 is the model without leak).
    """
    out = dict(DEFAULT_RANGES)
    for name, pair in (ranges or {}).items():
        if name not in DEFAULT_RANGES:
            raise UsageError(f"cannot set a range for {name!r}: ranges exist for "
                             f"{', '.join(DEFAULT_RANGES)}")
        try:
            low, high = (float(v) for v in pair)
        except (TypeError, ValueError):
            raise UsageError(f"the range of {name} must be two numbers (low, high), got {pair!r}") from None
        p = PARAMS[name]
        if not (p.low <= low <= high <= p.high) or (name == "leak" and low <= 0):
            floor = "above 0" if name == "leak" else f"from {p.low:g}"
            raise UsageError(f"the range of {name} must be low <= high within the fitter's bounds "
                             f"({floor} to {p.high:g}), got ({low:g}, {high:g})")
        out[name] = (low, high)
    return out


@dataclass(frozen=True)
class SpecDrawer:
    """Draws the :class:`ParticipantSpec` of each simulated participant of one generating model.

    Attributes
    ----------
    model : str
        The generating model's id.
    leaky : bool
        Whether the model's leak is fitted (and so drawn).
    bounds : mapping of str to (low, high)
        Uniform ranges (:func:`check_ranges`).
    rows : pandas.DataFrame or None
        Converged fits to resample (inv_temp, lapse, leak), or None: uniform ranges.
    """

    model: str
    leaky: bool
    bounds: Mapping[str, tuple[float, float]]
    rows: pd.DataFrame | None

    def draw(self, rng: np.random.Generator) -> ParticipantSpec:
        """Return a spec whose draw gives this participant's parameters (one fit drawn at random, or the ranges)."""
        if self.rows is None:
            values = self.bounds
        else:
            row = self.rows.iloc[int(rng.integers(len(self.rows)))]
            values = {name: (float(row[name]),) * 2 for name in self.bounds
                      if name != "leak" or self.leaky}
        leak = values["leak"] if self.leaky else (0.0, 0.0)
        return ParticipantSpec(self.model, inv_temp=values["inv_temp"], lapse=values["lapse"], leak=leak)


LEAK_FLOOR = 1e-6
"""Leak of a simulated leaky participant whose fit ended at leak 0 (a leaky spec needs a leak above 0)."""


def spec_drawer(spec: ModelSpec, bounds: Mapping[str, tuple[float, float]], fits: pd.DataFrame | None = None,
                source: str | None = None) -> tuple[SpecDrawer, list[str]]:
    """Return the drawer of generating model ``spec`` (from its converged fits when given, else ranges) and notes.

    Parameters
    ----------
    spec : ModelSpec
    bounds : mapping of str to (low, high)
        Uniform ranges, used without fits or when the model has no converged fit.
    fits : pandas.DataFrame, optional
        A fits table: participant, model, inv_temp, lapse, converged, and leak for leaky models.
    source : str, optional
        The file the fits were read from, named in messages.

    Returns
    -------
    (SpecDrawer, list of str)
        The notes say where the parameters come from, and what was adjusted.

    Raises
    ------
    InputError
        For a missing column or a converged fit's value outside its domain
        (naming ``source``, the line and the column).
    """
    leaky = "leak" in spec.free
    if fits is None:
        return SpecDrawer(spec.model_id, leaky, bounds, None), []
    table = _checked_fits(fits, leaky, source)
    rows = table[(table["model"] == spec.model_id) & table["converged"]]
    if rows.empty:
        return SpecDrawer(spec.model_id, leaky, bounds, None), [
            f"no converged fits of {spec.model_id} in the fits table: its participants are drawn "
            "uniformly from the ranges"]
    rows = rows.reset_index(drop=True)
    notes = []
    if leaky:
        at_zero = int((rows["leak"] < LEAK_FLOOR).sum())
        if at_zero:
            notes.append(f"{at_zero} fits of {spec.model_id} have leak 0 (the model without "
                         f"leak): simulated with leak {LEAK_FLOOR:g}")
            rows["leak"] = rows["leak"].clip(lower=LEAK_FLOOR)
    if "alpha" in rows.columns and (rows["alpha"].dropna() != PARAMS["alpha"].start).any():
        notes.append(f"the fits of {spec.model_id} have alpha other than {PARAMS['alpha'].start:g}: "
                     f"they are simulated and fitted with alpha {PARAMS['alpha'].start:g}")
    notes.append(f"{spec.model_id}: parameters resampled from {len(rows)} converged fits")
    return SpecDrawer(spec.model_id, leaky, bounds, rows), notes


def _checked_fits(fits: pd.DataFrame, leaky: bool, source: str | None) -> pd.DataFrame:
    """Return the fits table with normalised model ids and a boolean converged column (InputError otherwise)."""
    need = ["participant", "model", "inv_temp", "lapse", "converged"] + (["leak"] if leaky else [])
    missing = [c for c in need if c not in fits.columns]
    if missing:
        raise InputError([Problem(f"the fits table lacks the column {c!r}", path=source, column=c)
                          for c in missing])
    out = fits.copy()
    out["model"] = out["model"].map(normalise_model_id)
    text = out["converged"].astype("string").str.strip().str.lower()
    out["converged"] = text.isin(["true", "1", "yes"])
    problems = []
    for name in ["inv_temp", "lapse"] + (["leak"] if leaky else []):
        values = pd.to_numeric(out[name], errors="coerce")
        bad = out["converged"] & ~values.map(lambda v: PARAMS[name].contains(float(v)))
        problems += [Problem(f"{name} must be a number in {PARAMS[name].interval()}, got {out[name].iloc[i]!r}",
                             path=source, line=int(i) + 2, column=name) for i in np.flatnonzero(bad.to_numpy())]
        out[name] = values
    if problems:
        raise InputError(problems)
    return out
