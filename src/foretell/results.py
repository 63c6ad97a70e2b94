"""The Result base that every step's result extends: tables, notes, settings, lazy figures, files."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, ClassVar

import pandas as pd

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from .tasks import Task


@dataclass(frozen=True, eq=False, kw_only=True)
class Result:
    """Base of every step's result (learnt from statsmodels' model/results split).

    A result knows what it came from (``task``, ``specs``: the model specs, or
    ``()`` for steps without learner models) and how it was made
    (``settings``: the full option set, JSON-ready), and says what a reader must
    know (``notes``: plain-words lines). Subclasses add their tables as fields
    and override :meth:`tables`, and where they have them :meth:`texts`,
    :meth:`figure_makers` and :meth:`blobs`.

    Attributes
    ----------
    task : Task
        The task the step ran on.
    specs : tuple of ModelSpec
        The learner models of the step, in the order compared.
    settings : mapping
        Every option of the run (seed included).
    notes : tuple of str
        What a reader must know, one line each.
    """

    step: ClassVar[str] = ""
    task: "Task"
    specs: tuple = ()
    settings: Mapping[str, Any] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    def tables(self) -> dict[str, pd.DataFrame]:
        """Return the step's tables by file stem (``fits`` is written as ``fits.csv``)."""
        raise NotImplementedError

    def texts(self) -> dict[str, str]:
        """Return text files by name (``summary.txt``, ...)."""
        return {}

    def figure_makers(self) -> dict[str, Callable[[], "Figure"]]:
        """Return a function per figure name that draws it (nothing is drawn until called)."""
        return {}

    def figures(self) -> dict[str, "Figure"]:
        """Return every figure by name, drawn now."""
        return {name: draw() for name, draw in self.figure_makers().items()}

    def blobs(self) -> dict[str, bytes]:
        """Return other files by name as bytes (posteriors, events files, ...)."""
        return {}

    def files(self) -> list[str]:
        """Return the relative names of every file that writing this result creates (manifest aside)."""
        names = [f"{name}.csv" for name in self.tables()]
        names += list(self.texts())
        names += [f"figures/{name}.png" for name in self.figure_makers()]
        names += list(self.blobs())
        return sorted(names)

    @property
    def model_ids(self) -> list[str]:
        """Return the ids of the step's models."""
        return [spec.model_id for spec in self.specs]


def prefixed(prefix: str, mapping: Mapping[str, Any]) -> dict[str, Any]:
    """Return ``mapping`` with every key put under ``prefix/`` (for results made of step results)."""
    return {f"{prefix}/{key}": value for key, value in mapping.items()}
