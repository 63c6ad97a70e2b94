"""Learners that know the task: the oracle source and counting on the task's own contexts."""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from foretell.errors import UsageError
from foretell.params import PARAMS
from foretell.tasks import Task

from .base import Grouping, Learner
from .counting import counting_predict


def _check_task(task: Task, who: str) -> None:
    if not isinstance(task, Task):
        raise UsageError(f"{who} needs a foretell Task, got {type(task).__name__}")


def _check_alphabet(task: Task, n_symbols: int, who: str) -> None:
    if n_symbols != task.n_symbols:
        raise UsageError(f"{who}: task {task.name!r} has {task.n_symbols} symbols, "
                         f"but n_symbols = {n_symbols}")


def _task_nodes(task: Task, x: np.ndarray) -> np.ndarray:
    """Return the task context index of each trial, -1 before ``max_depth`` or where undetermined."""
    nodes = task.context_indices(x)
    nodes[: task.max_depth] = -1
    return nodes


@dataclass(frozen=True, eq=False)
class Source(Learner):
    """The task's true next-symbol probabilities: the oracle no learner beats on average.

    Rows t < task.max_depth are uniform (like every learner's warm-up rows),
    even where a shallow context of the task is already determined.
    """

    task: Task

    def __post_init__(self) -> None:
        _check_task(self.task, "Source")

    @property
    def depth(self) -> int:
        """Return the task's maximal context depth."""
        return self.task.max_depth

    def _predict(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        _check_alphabet(self.task, n_symbols, "Source")
        nodes = _task_nodes(self.task, x)
        out = np.full((len(x), n_symbols), 1.0 / n_symbols)
        known = nodes >= 0
        out[known] = self.task.next_probs[nodes[known]]
        return out


@lru_cache(maxsize=16)
def _task_grouping(task: Task, x_bytes: bytes) -> Grouping:
    """Return the grouping of a session's trials by task context (cached per task and session)."""
    x = np.frombuffer(x_bytes, dtype=np.int64)
    return Grouping.build(_task_nodes(task, x), x, task.n_symbols)


@dataclass(frozen=True, eq=False)
class TaskCounting(Learner):
    """Dirichlet counting on the task's own contexts: knows the tree, learns the probabilities.

    Same estimator as :class:`~foretell.learners.Counting` (Dirichlet(alpha)
    posterior predictive, optional leak), with the task's contexts as nodes;
    trials t < task.max_depth are warm-up (uniform, not counted).
    """

    task: Task
    alpha: float = 0.5
    leak: float = 0.0

    def __post_init__(self) -> None:
        _check_task(self.task, "TaskCounting")
        PARAMS["alpha"].check(self.alpha, "TaskCounting")
        PARAMS["leak"].check(self.leak, "TaskCounting")

    @property
    def depth(self) -> int:
        """Return the task's maximal context depth."""
        return self.task.max_depth

    def _predict(self, x: np.ndarray, n_symbols: int) -> np.ndarray:
        _check_alphabet(self.task, n_symbols, "TaskCounting")
        return counting_predict(_task_grouping(self.task, x.tobytes()), self.alpha, self.leak)
