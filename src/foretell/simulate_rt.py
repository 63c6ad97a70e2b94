"""Reaction times for the RT design check: driven by a learner's uncertainty, by practice alone, or by drift alone.

Stimuli and guesses come from :func:`foretell.simulate.simulate_participant`;
the reaction times are replaced by those of :class:`RTSimulation`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from foretell.entropy import entropy_bits
from foretell.errors import UsageError
from foretell.learners.base import check_hyper
from foretell.simulate import SpecDrawer, simulate_participant
from foretell.tasks import Task
from foretell.validation import child_rng

EFFECT = 0.040
"""Default rise of RT per bit of the generating learner's entropy, seconds at the baseline RT (Hick, 1952, and
Hyman, 1953, found 0.1-0.2 s per bit for choice RTs; learned sequences give less: chosen here, not measured)."""
NULLS = ("practice-only", "drift-only")
"""The generating processes whose RTs no learner drives."""


@dataclass(frozen=True)
class RTSimulation:
    """How the check writes a simulated participant's reaction times.

    log RT_t = ln(baseline) + (effect / baseline) H_t + ln(1 + practice t^-practice_exponent) + e_t,
    with H_t the entropy in bits of the generating learner's prediction on
    trial t (t = 1, 2, ... through the session) and e_t stationary AR(1)
    noise, e_t = phi e_(t-1) + sqrt(1 - phi^2) noise_sd z_t, z_t ~ N(0, 1).
    effect / baseline is the slope of log RT per bit, so near the baseline RT
    rises by about ``effect`` seconds per bit. The practice term is the power
    law of practice (Newell & Rosenbloom, 1981), RT falling from
    (1 + practice) x baseline on the first trial towards the baseline.
    "practice-only" drops the learner term; "drift-only" keeps only the
    baseline and AR(1) noise of ``drift_phi`` (a slow wander of RT).

    Attributes
    ----------
    baseline : float, default 0.5
        Seconds (a typical choice RT; common practice).
    noise_sd : float, default 0.25
        Stationary sd of the log-RT noise (:class:`foretell.simulate.RTLaw`'s spread).
    phi : float, default 0.5
        Lag-1 autocorrelation of the noise of the learner and practice-only processes.
    practice : float, default 0.5
        The first trial's RT excess over the baseline, as a share of it.
    practice_exponent : float, default 0.4
        How fast practice fades (t^-0.4: a 20% excess after 10 trials, 4% after 600).
    drift_phi : float, default 0.9
        Lag-1 autocorrelation of the drift-only noise.

    Raises
    ------
    UsageError
        For values outside their ranges.

    References
    ----------
    Newell, A., & Rosenbloom, P. S. (1981). Mechanisms of skill acquisition
    and the law of practice. In J. R. Anderson (Ed.), Cognitive Skills and
    Their Acquisition, 1-55.
    """

    baseline: float = 0.5
    noise_sd: float = 0.25
    phi: float = 0.5
    practice: float = 0.5
    practice_exponent: float = 0.4
    drift_phi: float = 0.9

    def __post_init__(self) -> None:
        check_hyper("baseline", self.baseline, 0.0, 10.0, low_open=True)
        check_hyper("noise_sd", self.noise_sd, 0.0, 3.0)
        check_hyper("phi", self.phi, 0.0, 1.0, high_open=True)
        check_hyper("practice", self.practice, 0.0, 10.0)
        check_hyper("practice_exponent", self.practice_exponent, 0.0, 5.0)
        check_hyper("drift_phi", self.drift_phi, 0.0, 1.0, high_open=True)

    def log_rt(self, process: str, entropy: np.ndarray, effect: float, rng: np.random.Generator) -> np.ndarray:
        """Return one session's log RTs (seconds) for ``process``: a learner id or one of :data:`NULLS`.

        Parameters
        ----------
        process : str
        entropy : numpy.ndarray
            Bits, per trial, of the generating learner's prediction (ignored by the nulls).
        effect : float
            Seconds per bit at the baseline.
        rng : numpy.random.Generator

        Returns
        -------
        numpy.ndarray
        """
        n = len(entropy)
        if process == "drift-only":
            return math.log(self.baseline) + ar1_noise(n, self.drift_phi, self.noise_sd, rng)
        t = np.arange(1, n + 1, dtype=float)
        learner = 0.0 if process == "practice-only" else effect / self.baseline * np.asarray(entropy, float)
        return (math.log(self.baseline) + learner + np.log1p(self.practice * t ** -self.practice_exponent)
                + ar1_noise(n, self.phi, self.noise_sd, rng))

    def words(self, effect: float) -> str:
        """Return the law in words, with its numbers, for the answer."""
        return (f"log RT = ln({self.baseline:g} s) + {effect / self.baseline:.3g} x the generating learner's "
                f"entropy in bits (about {1000 * effect:.0f} ms per bit) + a power-law practice term "
                f"ln(1 + {self.practice:g} t^-{self.practice_exponent:g}) + AR(1) noise (phi {self.phi:g}, "
                f"sd {self.noise_sd:g}); practice-only drops the learner term; drift-only is AR(1) noise alone "
                f"(phi {self.drift_phi:g})")


def ar1_noise(n: int, phi: float, sd: float, rng: np.random.Generator) -> np.ndarray:
    """Return n values of a stationary Gaussian AR(1) process with lag-1 correlation ``phi`` and sd ``sd``.

    e_1 = sd z_1, e_t = phi e_(t-1) + sqrt(1 - phi^2) sd z_t, z_t ~ N(0, 1)
    i.i.d., so that every e_t has variance sd^2 and corr(e_t, e_(t+k)) = phi^k
    (common practice; Box & Jenkins, 1970).

    Parameters
    ----------
    n : int
    phi : float
        In [0, 1).
    sd : float
    rng : numpy.random.Generator

    Returns
    -------
    numpy.ndarray
    """
    z = rng.standard_normal(n)
    if n == 0:
        return z
    first = sd * z[0]
    rest, _ = lfilter([math.sqrt(1.0 - phi ** 2) * sd], [1.0, -phi], z[1:], zi=[phi * first])
    return np.r_[first, rest]


def simulate_dataset(task: Task, drawers: Mapping[str, SpecDrawer], process: str, n_participants: int,
                     n_trials: int, dataset: int, seed: int, effect: float,
                     simulation: RTSimulation) -> pd.DataFrame:
    """Return one simulated dataset as a canonical log: guesses and RTs of ``n_participants`` participants.

    Parameters
    ----------
    task : Task
    drawers : mapping of str to SpecDrawer
        The parameter drawer of each learner, in the order the nulls cycle through them.
    process : str
        A learner id (it drives the guesses and the RTs) or one of :data:`NULLS`
        (participant k guesses by the k-th learner in turn; no learner drives the RTs).
    n_participants, n_trials, dataset : int
    seed : int
        Participant p draws from ``child_rng(seed, "rt", n_trials, process, dataset, p)``.
    effect : float
    simulation : RTSimulation

    Returns
    -------
    pandas.DataFrame
        participant, session, block, trial, stimulus, response, and ``rt``
        from ``simulation`` (NaN where the guess was missed); the guess
        simulator's onsets are left out, since they follow its own RTs.

    Raises
    ------
    UsageError
        For a process that is neither a learner of ``drawers`` nor a null.
    """
    if process not in drawers and process not in NULLS:
        raise UsageError(f"unknown process {process!r}: give one of {', '.join([*drawers, *NULLS])}")
    labels = list(drawers)
    width = max(2, len(str(n_participants)))
    index = {s: i for i, s in enumerate(task.symbols)}
    sessions = []
    for k in range(n_participants):
        pid = f"p{k + 1:0{width}d}"
        rng = child_rng(seed, "rt", n_trials, process, dataset, pid)
        spec = drawers[process if process in drawers else labels[k % len(labels)]].draw(rng)
        learner, values = spec.draw(task, rng)
        session = simulate_participant(task, learner, values["inv_temp"], values["lapse"], n_trials, rng,
                                       rt=spec.rt, miss_rate=spec.miss_rate, block_length=task.block_length)
        x = session["stimulus"].map(index).to_numpy(np.int64)
        log_rt = simulation.log_rt(process, entropy_bits(learner.next_proba(x, task.n_symbols)), effect, rng)
        session = session.drop(columns=["onset", "reveal_onset"]).assign(
            rt=np.where(session["response"] == "", np.nan, np.round(np.exp(log_rt), 3)))
        session.insert(0, "participant", pid)
        sessions.append(session)
    return pd.concat(sessions, ignore_index=True)
