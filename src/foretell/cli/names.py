"""Task names and model ids given on the command line, checked with a "did you mean" for near misses."""

from __future__ import annotations

from difflib import get_close_matches
from pathlib import Path
from typing import TYPE_CHECKING

from ..errors import TaskError, UsageError

if TYPE_CHECKING:
    from ..tasks import Task


def did_you_mean(word: str, options: list[str]) -> str:
    """Return `` (did you mean 'x'?)`` for the option closest to ``word``, or "" when none is close.

    Parameters
    ----------
    word : str
        What was given.
    options : list of str
        What could have been meant.

    Returns
    -------
    str
        Closeness is difflib's ratio of matching characters, at least 0.6
        (:func:`difflib.get_close_matches`); ``word`` itself is never suggested.

    Examples
    --------
    >>> did_you_mean("lantern-rely", ["lantern-relay", "tide-gauge"])
    " (did you mean 'lantern-relay'?)"
    """
    close = get_close_matches(word, [o for o in options if o != word], n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def named_task(name: str) -> "Task":
    """Return the task a ``--task`` option names: a task file, or the name of a shipped task.

    Parameters
    ----------
    name : str

    Returns
    -------
    Task

    Raises
    ------
    TaskError
        For a bare name that is neither a file here nor a shipped task but
        close to one (naming it); otherwise as :func:`foretell.tasks.load_task`.
    """
    from ..tasks import load_task, shipped_tasks

    given, shipped = Path(name), sorted(shipped_tasks())
    if given.parent == Path(".") and not given.exists() and given.stem not in shipped:
        hint = did_you_mean(given.stem, shipped)
        if hint:
            raise TaskError(f"no such task file, nor a task shipped with foretell{hint}", path=name)
    return load_task(name)


def model_ids(text: str | None, task: "Task") -> list[str] | None:
    """Return the ids of a comma-separated ``--models`` option after checking each against ``task``.

    Parameters
    ----------
    text : str or None
        The option as given (None: not given).
    task : Task

    Returns
    -------
    list of str or None
        The ids as given (None when the option was not given).

    Raises
    ------
    UsageError
        For an id :func:`foretell.models.parse_model` refuses, with the
        closest of the task's default models and ``count-task``/``source``.
    """
    from ..models import default_models, parse_model

    if text is None:
        return None
    ids = [t.strip() for t in text.split(",") if t.strip()]
    for model_id in ids:
        try:
            parse_model(model_id, task)
        except UsageError as err:
            hint = did_you_mean(model_id.lower(), [*default_models(task), "count-task", "source"])
            raise UsageError(f"{err}{hint}") from None
    return ids
