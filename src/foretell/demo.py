"""The embedded demo study: an invented lantern-relay experiment with two groups of simulated participants.

A fictional lab shows a relay tower whose red, green and blue lanterns light
one at a time (task ``lantern-relay``: the next lantern depends on the last
one to three) and asks people to guess the next lantern. Two invented groups:
``rested`` participants come to use deep contexts (tree-mixture, depth-2 and
task-structure learners), ``sleep-restricted`` participants stay shallow
(depth-1 counting, or memoryless counting with forgetting), guess less
deterministically, lapse and miss more and answer more slowly. 28
participants, 5 blocks of 120 trials. No real study or person is described.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from pathlib import Path

import pandas as pd

from foretell.compare import default_families
from foretell.labels import ALL
from foretell.simulate import ParticipantSpec, RTLaw, simulate_participants
from foretell.tasks import Task, load_task, shipped_tasks

DEMO_SEED = 20240611
DEMO_PARTICIPANTS = 28
DEMO_BLOCKS = 5
DEMO_RT_MODELS = ("count-0", "count-1", "count-2", "mix-4")
"""The learner models whose reaction-time models the demo samples (a subset, to stay within minutes)."""
_DATA = Path(__file__).parent / "data"

_RESTED_RT = RTLaw()
_RESTRICTED_RT = RTLaw(log_scale=math.log(0.32), sigma=0.3)
DEMO_GROUPS: dict[str, tuple[ParticipantSpec, ...]] = {
    "rested": tuple(ParticipantSpec(model, inv_temp=(1.5, 5.0), lapse=(0.01, 0.05), rt=_RESTED_RT,
                                    miss_rate=0.015)
                    for model in ("mix-4", "count-2", "count-task")),
    "sleep-restricted": (
        ParticipantSpec("count-1", inv_temp=(0.8, 3.0), lapse=(0.03, 0.10), rt=_RESTRICTED_RT,
                        miss_rate=0.04),
        ParticipantSpec("count-0-leak", inv_temp=(0.8, 3.0), lapse=(0.03, 0.10),
                        leak=(0.15, 0.4), rt=_RESTRICTED_RT, miss_rate=0.04),
    ),
}


def demo_task() -> Task:
    """Return the demo study's task.

    Returns
    -------
    Task
        The shipped task ``lantern-relay``.
    """
    return load_task(shipped_tasks()["lantern-relay"])


def make_demo_data(seed: int = DEMO_SEED) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Return (log, truth) of the demo study, regenerated deterministically from ``seed``.

    Parameters
    ----------
    seed : int, default DEMO_SEED
        The seed of the simulation (:func:`foretell.simulate.simulate_participants`).

    Returns
    -------
    log : pandas.DataFrame
        The response log in the canonical columns.
    truth : pandas.DataFrame
        Each participant's generating model and parameters.
    """
    return simulate_participants(demo_task(), DEMO_PARTICIPANTS, DEMO_BLOCKS,
                                 groups=DEMO_GROUPS, seed=seed)


def demo_log() -> pd.DataFrame:
    """Return the shipped demo response log.

    Returns
    -------
    pandas.DataFrame
        Canonical columns; missed guesses have an empty response.
    """
    return pd.read_csv(_DATA / "demo_log.csv", keep_default_na=False, na_values={"rt": [""]})


def demo_truth() -> pd.DataFrame:
    """Return the shipped truth table of the demo study.

    Returns
    -------
    pandas.DataFrame
        Each participant's group, generating model and parameters.
    """
    return pd.read_csv(_DATA / "demo_truth.csv")


STEP_WORDS = {"fit": "fits and comparisons of the default model set", "rt": "reaction times",
              "groups": "group curves and contrasts", "events": "EEG event files", "report": "the report"}
"""What each step of the demo's analysis does, in words (the steps of :data:`foretell.steps.whole.STEPS`)."""


def demo_plan(task: Task, skip: Iterable[str] = ()) -> str:
    """Return the demo's first line: the study, and the steps that will actually run.

    Parameters
    ----------
    task : Task
        The demo's task.
    skip : iterable of str
        The steps left out (``--skip``).

    Returns
    -------
    str
        One line, e.g. "demo study: task 'lantern-relay' (red, green, blue);
        28 simulated participants in two invented groups; running: validation,
        reaction times, the report".
    """
    left = set(skip)
    steps = ["validation"] + [words for step, words in STEP_WORDS.items() if step not in left]
    return (f"demo study: task {task.name!r} ({', '.join(task.symbols)}); {DEMO_PARTICIPANTS} simulated "
            f"participants in two invented groups; running: {', '.join(steps)}")


def recovery_text(winners: pd.DataFrame, truth: pd.DataFrame) -> str:
    """Return how often each participant's whole-session BIC winner is its generating model, in words.

    Parameters
    ----------
    winners : pandas.DataFrame
        The winners table of the fits.
    truth : pandas.DataFrame
        The truth table (:func:`demo_truth`).

    Returns
    -------
    str
        Per group, the participants whose generating model, and whose model
        family (:func:`foretell.compare.default_families`), won.
    """
    best = winners[winners["block"] == ALL][["participant", "best_model"]]
    both = truth[["participant", "group", "model"]].merge(best, on="participant")
    family = {m: f for f, ms in default_families(sorted(set(both["model"]) | set(both["best_model"])))
              .items() for m in ms}
    both["same_model"] = both["model"] == both["best_model"]
    both["same_family"] = both["model"].map(family) == both["best_model"].map(family)
    lines = ["check against the simulation's truth (whole-session BIC winner):"]
    for group, part in both.groupby("group", sort=True):
        lines.append(f"  {group}: generating model recovered for {int(part['same_model'].sum())}/"
                     f"{len(part)}, its family (shallow/deep) for {int(part['same_family'].sum())}/"
                     f"{len(part)}")
    return "\n".join(lines)
