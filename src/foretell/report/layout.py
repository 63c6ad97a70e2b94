"""The report's building blocks: what a section holds, formatted cells, and the figures it shows."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Protocol

import numpy as np
import pandas as pd

from foretell.errors import UsageError
from foretell.folders import ResultFolder
from foretell.plots.common import figure_png
from foretell.results import Result
from foretell.summaries import p_words
from foretell.text import number

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from foretell.steps.whole import AnalysisResult


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


def as_source(analysis: object) -> Source:
    """Return what the report and the findings read: an analysis in memory, or its folder.

    Parameters
    ----------
    analysis : AnalysisResult, ResultFolder, MemorySource, str or pathlib.Path
        The result of :func:`foretell.analyze`, or the folder ``foretell analyze`` wrote
        (a source already made is returned as it is).

    Returns
    -------
    Source

    Raises
    ------
    UsageError
        When ``analysis`` is none of those, or a path that is not a folder.
    """
    from foretell.steps.whole import AnalysisResult

    if isinstance(analysis, AnalysisResult):
        return MemorySource(analysis)
    if isinstance(analysis, (ResultFolder, MemorySource)):
        return analysis
    if isinstance(analysis, (str, Path)):
        if not Path(analysis).is_dir():
            raise UsageError(f"{analysis}: not a folder; give the folder an analysis wrote")
        return ResultFolder(analysis)
    raise UsageError(f"the report reads an AnalysisResult or the folder of foretell analyze, got "
                     f"{type(analysis).__name__}")


class MemorySource:
    """An analysis in memory, read as its folder would be (see :class:`Source`).

    Its manifest holds the run's settings; the provenance a folder's manifest
    records (version, command) is added by the caller when it is known.
    """

    def __init__(self, result: "AnalysisResult") -> None:
        self.result = result
        self.manifest: dict[str, object] = {"settings": dict(result.settings)}

    @cached_property
    def files(self) -> list[str]:
        """Return the relative names of every file the analysis writes."""
        return sorted(f"{folder}/{name}" for folder, step in self.result.steps.items()
                      for name in Result.files(step))

    def has(self, folder: str) -> bool:
        """Return whether the step folder ``folder`` is part of the analysis."""
        return folder in self.result.steps

    def table(self, name: str) -> pd.DataFrame | None:
        """Return the table ``<folder>/<stem>``, or None when absent."""
        folder, _, stem = name.partition("/")
        return self.result.step_tables(folder).get(stem) if self.has(folder) else None

    def text(self, name: str) -> str | None:
        """Return the text file ``<folder>/<name>``, or None when absent."""
        folder, _, rest = name.partition("/")
        return self.result.steps[folder].texts().get(rest) if self.has(folder) else None

    def bytes(self, name: str) -> bytes | None:
        """Return a step's figure as PNG bytes, or None when absent."""
        return self.result.figure_pngs.get(name)


def step_settings(source: Source, folder: str) -> dict:
    """Return the options the analysis recorded for the step in ``folder`` (empty when not recorded)."""
    settings = source.manifest.get("settings")
    steps = settings.get("steps") if isinstance(settings, dict) else None
    own = steps.get(folder) if isinstance(steps, dict) else None
    return own if isinstance(own, dict) else {}


@dataclass(frozen=True)
class Table:
    """A table as shown in the report: a caption, column headings, formatted cells, the columns of ids.

    Cells of the columns in ``ids`` (model ids, groups) are never broken at their hyphens.
    """

    caption: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    ids: tuple[int, ...] = ()


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


SELECTION_COLUMNS = {
    "group": "group", "model": "model", "family": "family", "n_participants": "participants",
    "expected_freq": "expected frequency", "exceedance": "exceedance", "protected_exceedance":
    "protected exceedance", "omnibus_risk": "omnibus risk", "method": "method", "note": "note"}
"""The columns of a random-effects selection table (models or families) and their headings."""

ID_COLUMNS = ("participant", "model", "best_model", "runner_up", "name", "leader", "group", "family",
              "contrast", "source_context")
"""Columns of labels and ids, shown unbroken (a model id never wraps at its hyphen)."""


def cell(value: object, spec: str = ".3f") -> str:
    """Return a table cell: labels as they are, numbers with ``spec``, missing values (and empty text) as "n/a".

    Empty text is missing, as in the CSV tables (an empty cell reads back as missing). A number
    strictly between 0 and 1 never rounds onto 0 or 1: "< 0.001", "> 0.999". The spec "p" prints a
    p-value as :func:`foretell.summaries.p_words` does ("< 0.001", "0.012").
    """
    if value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value)) or (
            isinstance(value, str) and not value):
        return "n/a"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        if spec == "p":
            return p_words(float(value)).removeprefix("= ")
        text = number(float(value), spec)
        if 0 < value < 1 and spec.endswith("f") and float(text) in (0, 1):
            digits = int(spec.strip(".f") or 0)
            return f"< {10 ** -digits:.{digits}f}" if value < 0.5 else f"> {1 - 10 ** -digits:.{digits}f}"
        return text
    return str(value)


def table(frame: pd.DataFrame, columns: Mapping[str, str], caption: str,
          formats: Mapping[str, str] | None = None) -> Table:
    """Return the report table of ``frame``'s ``columns`` (name -> heading), cells by :func:`cell`.

    A column that is "n/a" on every row is left out; a column with one
    value on every row (of several) is said once in the caption instead.
    Cells of :data:`ID_COLUMNS` are never broken at their hyphens.
    """
    formats = formats or {}
    present = [c for c in columns if c in frame.columns]
    cells = {c: [cell(v, formats.get(c, ".3f")) for v in frame[c]] for c in present}
    present = [c for c in present if any(v != "n/a" for v in cells[c])]
    if len(frame) > 1:
        same = [c for c in present if len(set(cells[c])) == 1 and c not in ID_COLUMNS[:1]]
        if same and len(same) < len(present):
            caption += "; " + ", ".join(f"{columns[c]}: {cells[c][0]}" for c in same) + " on every row"
            present = [c for c in present if c not in same]
    rows = tuple(zip(*(cells[c] for c in present)))
    return Table(caption, tuple(columns[c] for c in present), rows,
                 tuple(i for i, c in enumerate(present) if c in ID_COLUMNS))


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
