"""The report's building blocks: what a section holds, formatted cells, and the figures it shows."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Protocol

import numpy as np
import pandas as pd

from foretell.plots.common import figure_png
from foretell.text import number

if TYPE_CHECKING:
    from matplotlib.figure import Figure


class Source(Protocol):
    """What the report reads: a result folder (:class:`foretell.folders.ResultFolder`) or an analysis in memory.

    Names are those of an ``analyze`` output: ``fit/selection`` (a table),
    ``fit/summary.txt`` (a text), ``groups/figures/curve_accuracy.png`` (a file).
    """

    manifest: Mapping[str, object]

    @property
    def files(self) -> list[str]:
        """Return the relative names of every file."""

    def has(self, folder: str) -> bool:
        """Return whether the step folder ``folder`` is present."""

    def table(self, name: str) -> pd.DataFrame | None:
        """Return a table, or None when absent."""

    def text(self, name: str) -> str | None:
        """Return a text file, or None when absent."""

    def bytes(self, name: str) -> bytes | None:
        """Return a file's bytes, or None when absent."""


@dataclass(frozen=True)
class Table:
    """A table as shown in the report: a caption, column headings and formatted cells."""

    caption: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]


@dataclass(frozen=True)
class Section:
    """One section of the report: its id, heading, paragraphs, figures (path, caption) and tables.

    ``missing`` is the one-line reason a section is absent (then nothing else is shown).
    """

    key: str
    heading: str
    paragraphs: tuple[str, ...] = ()
    items: tuple[str, ...] = ()
    figures: tuple[tuple[str, str], ...] = ()
    tables: tuple[Table, ...] = ()
    missing: str | None = None


class Figures:
    """The figures a report shows: its own, drawn once here, and the steps' own, read from the source."""

    def __init__(self, source: Source) -> None:
        self.source = source
        self.own: list[str] = []
        self.pngs: dict[str, bytes] = {}

    def draw(self, name: str, figure: "Figure") -> str:
        """Return the path ``figures/<name>.png`` of a figure the report drew (kept as PNG bytes)."""
        path = f"figures/{name}.png"
        self.own.append(path)
        self.pngs[path] = figure_png(figure)
        return path

    def step(self, path: str) -> bool:
        """Return whether the source holds the step's figure ``path`` (then it is shown)."""
        data = self.source.bytes(path)
        if data is not None:
            self.pngs[path] = data
        return data is not None


def lines(text: str | None) -> tuple[str, ...]:
    """Return the non-blank lines of ``text``."""
    return tuple(line for line in (text or "").splitlines() if line.strip())


def cell(value: object, spec: str = ".3f") -> str:
    """Return a table cell: labels as they are, numbers with ``spec``, missing values (and empty text) as "n/a".

    Empty text is missing, as in the CSV tables (an empty cell reads back as missing).
    """
    if value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value)) or (
            isinstance(value, str) and not value):
        return "n/a"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return number(float(value), spec)
    return str(value)


def table(frame: pd.DataFrame, columns: Mapping[str, str], caption: str,
          formats: Mapping[str, str] | None = None) -> Table:
    """Return the report table of ``frame``'s ``columns`` (name -> heading), cells by :func:`cell`."""
    formats = formats or {}
    present = [c for c in columns if c in frame.columns]
    rows = tuple(tuple(cell(v, formats.get(c, ".3f")) for c, v in zip(present, row))
                 for row in frame[present].itertuples(index=False))
    return Table(caption, tuple(columns[c] for c in present), rows)


def absent(key: str, heading: str, why: str) -> Section:
    """Return a section that says in one line why it is absent."""
    return Section(key, heading, missing=why)


def provisional_line(provisional: bool) -> tuple[str, ...]:
    """Return the paragraph that marks a Bayesian section provisional (none for a full run)."""
    return (("Provisional: this run drew fewer posterior samples than a full run, so its Bayesian "
             "comparisons are provisional.",) if provisional else ())


def diagnostics_table(frame: pd.DataFrame, key: str, caption: str) -> Table:
    """Return the table of a hierarchical model's diagnostics gate, one row per ``key``."""
    return table(frame, {key: key, "sampler": "sampler", "chains": "chains", "draws": "draws per chain",
                         "rhat_max": "largest R-hat", "ess_bulk_min": "smallest bulk ESS",
                         "divergences": "divergences", "pareto_k_max": "largest Pareto k",
                         "loo_refits": "exact LOO refits", "ok": "passed", "provisional": "provisional",
                         "reasons": "why not passed"},
                 caption, {"rhat_max": ".3f", "ess_bulk_min": ".0f", "pareto_k_max": ".2f"})
