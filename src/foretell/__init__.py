"""foretell: analyse guess-the-next-symbol experiments against learner models of the past.

Research software: not a clinical or diagnostic instrument. Response logs are
personal data: pseudonymise participants and never share identifying columns.
"""

from .errors import ForetellError, InputError, LogError, TaskError
from .tasks import Task, load_task

__version__ = "0.1.0"


def load_log(*args, **kwargs):
    """Return a validated response log; see :func:`foretell.logs.load_log`."""
    from .logs import load_log as _load_log

    return _load_log(*args, **kwargs)


def analyze(*args, **kwargs):
    """Return (and write) the whole analysis of a study; see :func:`foretell.steps.whole.analyze`."""
    from .steps.whole import analyze as _analyze

    return _analyze(*args, **kwargs)


def fit(*args, **kwargs):
    """Return the fits and comparisons of a response log; see :func:`foretell.steps.guesses.fit`."""
    from .steps.guesses import fit as _fit

    return _fit(*args, **kwargs)


__all__ = ["ForetellError", "InputError", "LogError", "Task", "TaskError", "analyze", "fit", "load_log",
           "load_task", "__version__"]
