"""The HTML report of a whole analysis, in memory or read back from its folder.

Every number in the report comes from the analysis's tables. The page is
self-contained: figures are PNGs embedded as ``data:`` URIs, there are no
scripts and no external resources, and a Content-Security-Policy meta tag
forbids loading anything else.
"""

from __future__ import annotations

import base64
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd
from jinja2 import Environment, PackageLoader, select_autoescape

from foretell.errors import UsageError
from foretell.folders import ResultFolder
from foretell.results import Result
from foretell.report.comparison import models_section, trees_section
from foretell.report.eeg import eeg_section
from foretell.report.layout import Figures, Source
from foretell.report.methods import methods, run_lines
from foretell.report.sections import curves_section, data_section, design_section, events_section, rt_section

if TYPE_CHECKING:
    from foretell.steps.whole import AnalysisResult

STEPS = ("validation", "fit", "rt", "groups", "events", "eeg", "recovery")
"""The step folders a report reads, in the order of its sections."""


@dataclass(frozen=True)
class Report:
    """A built report: the page, and the figures it drew itself.

    Attributes
    ----------
    html : str
        The self-contained page (``report.html``).
    figures : mapping of str to bytes
        The report's own figures as PNG by relative path (``figures/winners.png``,
        ``figures/source_tree.png``, ...). The steps' figures are embedded from
        their results and written in the steps' folders, not here.
    """

    html: str
    figures: Mapping[str, bytes]


def build_report(analysis: "AnalysisResult | ResultFolder | str | Path", *, provisional: bool | None = None,
                 title: str | None = None) -> Report:
    """Return the report of a whole analysis.

    Parameters
    ----------
    analysis : AnalysisResult, ResultFolder, str or pathlib.Path
        The result of :func:`foretell.analyze` (read in memory), or the
        folder ``foretell analyze`` wrote (read through its manifest). A step
        that is absent gets a one-line section saying so.
    provisional : bool, optional
        Say at the top and in every Bayesian section that the Bayesian
        comparisons are provisional (demo runs with fewer posterior draws);
        default: as the analysis's settings say.
    title : str, optional
        The page's title (default "foretell analysis report").

    Returns
    -------
    Report

    Raises
    ------
    UsageError
        When ``analysis`` is not a folder, or holds none of the step folders.
    InputError
        When the folder has no foretell manifest, or a table cannot be read.

    References
    ----------
    Words such as "stands out" or "clear" are those of
    :func:`foretell.summaries.verdict` (Rigoux et al., 2014; common practice);
    a participant's own win is graded after Kass & Raftery (1995).
    """
    source = _source(analysis)
    if not any(source.has(step) for step in STEPS):
        raise UsageError(f"{analysis}: holds none of the step folders {', '.join(STEPS)}")
    if provisional is None:
        provisional = _provisional(source.manifest)
    figures = Figures(source)
    sections = [
        data_section(source),
        curves_section(source, figures, provisional),
        models_section(source, figures, provisional),
        trees_section(source, figures),
        rt_section(source, provisional),
        events_section(source),
        eeg_section(source, figures),
        design_section(source, figures),
    ]
    images = {path: "data:image/png;base64," + base64.b64encode(data).decode("ascii")
              for path, data in figures.pngs.items()}
    env = Environment(loader=PackageLoader("foretell.report", "templates"),
                      autoescape=select_autoescape(["j2", "html"]), keep_trailing_newline=True)
    html = env.get_template("report.html.j2").render(
        title=title or "foretell analysis report", provisional=provisional, sections=sections,
        images=images, run=run_lines(source.manifest), methods=methods(source))
    return Report(html, {path: figures.pngs[path] for path in figures.own})


def _source(analysis: object) -> Source:
    """Return what the report reads: the analysis in memory, or its folder."""
    from foretell.steps.whole import AnalysisResult

    if isinstance(analysis, AnalysisResult):
        return _Memory(analysis)
    if isinstance(analysis, ResultFolder):
        return analysis
    if isinstance(analysis, (str, Path)):
        if not Path(analysis).is_dir():
            raise UsageError(f"{analysis}: not a folder; give the folder an analysis wrote")
        return ResultFolder(analysis)
    raise UsageError(f"the report reads an AnalysisResult or the folder of foretell analyze, got "
                     f"{type(analysis).__name__}")


def _provisional(manifest: Mapping[str, object]) -> bool:
    settings = manifest.get("settings")
    settings = settings if isinstance(settings, dict) else {}
    return bool(settings.get("provisional", manifest.get("provisional", False)))


class _Memory:
    """An analysis in memory, read as its folder would be (see :class:`foretell.report.layout.Source`)."""

    def __init__(self, result: "AnalysisResult") -> None:
        self.result = result
        self.manifest = {"settings": dict(result.settings)}

    @cached_property
    def files(self) -> list[str]:
        return sorted(f"{folder}/{name}" for folder, step in self.result.steps.items()
                      for name in Result.files(step))

    def has(self, folder: str) -> bool:
        return folder in self.result.steps

    def table(self, name: str) -> pd.DataFrame | None:
        folder, _, stem = name.partition("/")
        return self.result.step_tables(folder).get(stem) if self.has(folder) else None

    def text(self, name: str) -> str | None:
        folder, _, rest = name.partition("/")
        return self.result.steps[folder].texts().get(rest) if self.has(folder) else None

    def bytes(self, name: str) -> bytes | None:
        return self.result.figure_pngs.get(name)
