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
from pathlib import Path
from typing import TYPE_CHECKING

from jinja2 import Environment, PackageLoader, select_autoescape

from foretell.errors import UsageError
from foretell.folders import ResultFolder
from foretell.report.comparison import models_section, trees_section
from foretell.report.eeg import eeg_section
from foretell.report.layout import Figures, as_source
from foretell.findings import findings
from foretell.report.methods import methods, provenance, run_lines
from foretell.report.sections import curves_section, data_section, design_section, events_section, rt_section

if TYPE_CHECKING:
    from foretell.steps.whole import AnalysisResult

STEPS = ("validation", "fit", "rt", "groups", "events", "eeg", "recovery")
"""The step folders a report reads (one of them at least)."""


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
        folder ``foretell analyze`` wrote (read through its manifest). The
        page opens with the findings (:func:`foretell.findings.findings`),
        each linked to its evidence, and the run's provenance; a step that
        is absent gets a one-line section and no entry in the contents.
    provisional : bool, optional
        Whether the run drew fewer posterior samples than a full analysis
        (demo runs); default: as the analysis's settings say. Only a section
        whose result rests on those draws (a hierarchical model that passed
        its diagnostics) says it is provisional, and the top of the page
        then says so once.
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
    source = as_source(analysis)
    if not any(source.has(step) for step in STEPS):
        raise UsageError(f"{analysis}: holds none of the step folders {', '.join(STEPS)}")
    if provisional is None:
        provisional = _provisional(source.manifest)
    figures = Figures(source)
    run = provenance(source)
    sections = [  # the findings' order; the data's per-participant counts last, for reference
        models_section(source, figures),
        trees_section(source, figures),
        curves_section(source, figures, provisional),
        rt_section(source, figures, provisional),
        eeg_section(source, figures),
        events_section(source),
        design_section(source, figures),
        data_section(source),
    ]
    images = {path: "data:image/png;base64," + base64.b64encode(data).decode("ascii")
              for path, data in figures.pngs.items()}
    env = Environment(loader=PackageLoader("foretell.report", "templates"),
                      autoescape=select_autoescape(["j2", "html"]), keep_trailing_newline=True)
    html = env.get_template("report.html.j2").render(
        title=title or "foretell analysis report", sections=sections,
        provisional=any(p.startswith("Provisional") for s in sections for p in s.paragraphs),
        images=images, run=run_lines(run), demo=run["demo"], findings=findings(source),
        methods=methods(source, run))
    return Report(html, {path: figures.pngs[path] for path in figures.own})


def _provisional(manifest: Mapping[str, object]) -> bool:
    settings = manifest.get("settings")
    settings = settings if isinstance(settings, dict) else {}
    return bool(settings.get("provisional", manifest.get("provisional", False)))
