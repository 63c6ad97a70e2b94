"""foretell: analyse guess-the-next-symbol experiments against learner models of the past.

Research software: not a clinical or diagnostic instrument. Response logs are
personal data: pseudonymise participants and never share identifying columns.

The steps (:func:`fit`, :func:`analyze_rt`, :func:`compare_groups`,
:func:`export_events`, :func:`analyze_eeg`, :func:`recover`, :func:`analyze`) and the readers are
imported on first use (PEP 562), so ``import foretell`` stays light while
``help(foretell.fit)`` shows the real signature.
"""

from __future__ import annotations

import importlib

from .errors import ForetellError, InputError, LogError, TaskError, UsageError
from .tasks import Task, load_task

__version__ = "0.1.0"

_LAZY = {
    "load_log": "foretell.logs",
    "ValidatedLog": "foretell.logs",
    "fit": "foretell.steps.guesses",
    "FitResult": "foretell.steps.guesses",
    "analyze_rt": "foretell.steps.measures",
    "compare_groups": "foretell.steps.groups",
    "export_events": "foretell.steps.events",
    "analyze_eeg": "foretell.steps.eeg",
    "recover": "foretell.steps.design",
    "recover_rt": "foretell.steps.design_rt",
    "analyze": "foretell.steps.whole",
    "make_sequences": "foretell.steps.sequence",
    "load_profile": "foretell.profiles",
    "write_bids_derivatives": "foretell.bids",
    "ResultFolder": "foretell.folders",
    "write": "foretell.outputs",
}
"""Public names imported on first use, and the module that holds each."""

STEPS = ("fit", "analyze_rt", "compare_groups", "export_events", "analyze_eeg", "recover", "analyze")
"""The analysis steps: each takes the same argument names for the same things and returns a Result."""


def __getattr__(name: str) -> object:
    """Return a lazily imported public name (PEP 562)."""
    if name in _LAZY:
        value = getattr(importlib.import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'foretell' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))


__all__ = ["ForetellError", "InputError", "LogError", "Task", "TaskError", "UsageError", "load_task",
           "__version__", *_LAZY]
