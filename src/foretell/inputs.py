"""The one conversion of a step's inputs: a task (object, file or shipped name) and a log (path, frame or validated)."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import UsageError
from .logs import ValidatedLog, load_log, validate_log
from .tasks import Task, load_task

LogLike = "str | pathlib.Path | pandas.DataFrame | ValidatedLog"
TaskLike = "Task | str | pathlib.Path"


def as_task(task: object) -> Task:
    """Return ``task`` as a :class:`~foretell.tasks.Task`.

    Parameters
    ----------
    task : Task, str or pathlib.Path
        A task object, a task file (TOML) or the name of a task shipped with
        foretell (``lantern-relay``, ...).

    Returns
    -------
    Task

    Raises
    ------
    TaskError
        When the file cannot be read or does not describe a source.
    UsageError
        When ``task`` is none of the above.
    """
    if isinstance(task, Task):
        return task
    if isinstance(task, (str, Path)):
        return load_task(task)
    raise UsageError(f"task must be a Task, a task file or a shipped task's name, got {type(task).__name__}")


def same_task(a: Task, b: Task) -> bool:
    """Return True when two tasks describe the same alphabet, source and design (names may differ)."""
    return (a.symbols == b.symbols and a.contexts == b.contexts and a.response == b.response
            and np.array_equal(a.next_probs, b.next_probs))


def as_log(log: object, task: Task, *, columns: Mapping[str, str] | None = None, rt_unit: str = "s",
           measures: tuple[str, ...] | list[str] = ()) -> ValidatedLog:
    """Return ``log`` validated against ``task``.

    Parameters
    ----------
    log : str, pathlib.Path, pandas.DataFrame or ValidatedLog
        A log file (read and validated), a frame in the canonical columns
        (validated), or a log already validated, which must have been
        validated against ``task``.
    task : Task
        The task of the step.
    columns, rt_unit, measures
        Passed to :func:`foretell.logs.load_log` or
        :func:`foretell.logs.validate_log` when the log is read here.

    Returns
    -------
    ValidatedLog

    Raises
    ------
    UsageError
        When a validated log was validated against another task (its symbols
        would be read as the wrong ones), or ``log`` is of another type.
    LogError
        When the log does not pass validation.
    """
    if isinstance(log, ValidatedLog):
        if not same_task(log.task, task):
            raise UsageError(f"the log was validated against task {log.task.name!r}, not {task.name!r}: "
                             "validate it against the task of this step")
        return log
    if isinstance(log, pd.DataFrame):
        return validate_log(log, task, columns=columns, rt_unit=rt_unit, measures=measures)
    if isinstance(log, (str, Path)):
        return load_log(log, task, columns=columns, rt_unit=rt_unit, measures=measures)
    raise UsageError(f"log must be a file path, a DataFrame or a validated log, got {type(log).__name__}")
