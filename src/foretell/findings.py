"""The findings of an analysis in a few plain-words lines, each read from the tables and linked to its evidence.

The report opens with them and the console summary starts with them; every
word is that of a named criterion (:mod:`foretell.summaries`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import pandas as pd

from .labels import ALL
from .measure import BASELINE_MODEL
from .report.layout import Source, as_source, step_settings
from .summaries import HOLM_ALPHA, LINE_WIDTH, METRIC_WORDS, contrast_words, p_words, verdict, wrapped
from .text import number, plural

_MAIN_SUMMARY = "mean over blocks"
"""The group_joint summary a group-difference finding states (one interval and one test for all blocks)."""


@dataclass(frozen=True)
class Finding:
    """One finding: a plain-words line and the report section (its ``id``) that holds the evidence.

    Attributes
    ----------
    text : str
        The line, with the numbers that back it.
    anchor : str
        The ``id`` of the report section holding the tables and figures behind it.
    """

    text: str
    anchor: str


def findings(analysis: object) -> tuple[Finding, ...]:
    """Return the findings of an analysis, read from its tables: models, group differences, measure, EEG, events.

    Parameters
    ----------
    analysis : AnalysisResult, ResultFolder, str or pathlib.Path
        The result of :func:`foretell.analyze`, or the folder it wrote
        (:func:`foretell.report.layout.as_source`).

    Returns
    -------
    tuple of Finding
        In order: each group's model and family verdict
        (:func:`foretell.summaries.verdict`: Rigoux et al., 2014; common
        practice); each group difference over all blocks whose Holm-corrected
        permutation p is below :data:`foretell.summaries.HOLM_ALPHA` (Holm,
        1979), with the difference, its interval, the p and the permutation
        count, and how many blocks agree, then one line naming the metrics
        without a shown difference, and one naming the metrics whose
        hierarchical model failed its diagnostics; the measure's verdict per group (the
        random-effects selection with the baseline); the EEG verdict per
        group; where the event files are. A step that did not run gives no line.

    Raises
    ------
    UsageError
        When ``analysis`` is not an analysis or its folder.
    """
    source = as_source(analysis)
    return (*_models(source), *_groups(source), *_measure(source), *_eeg(source), *_events(source))


def findings_text(analysis: object, width: int = LINE_WIDTH) -> str:
    """Return the findings as console lines of at most ``width`` characters (continuations indented).

    Parameters
    ----------
    analysis : AnalysisResult, ResultFolder, str or pathlib.Path
    width : int, default :data:`foretell.summaries.LINE_WIDTH`

    Returns
    -------
    str
        "findings:" and one wrapped bullet per :func:`findings` line.
    """
    lines = [wrapped(f"- {finding.text}", width) for finding in findings(analysis)]
    return "\n".join(["findings:", *lines] if lines else ["findings: none the tables support (see the notes)"])


def _models(source: Source) -> list[Finding]:
    """Return one line per group: the model verdict and, when computed, the family verdict."""
    selection = source.table("fit/selection")
    if selection is None or selection.empty:
        return []
    families = source.table("fit/families")
    out = []
    for group, part in selection.groupby("group", sort=False):
        n = int(part["n_participants"].iloc[0])
        line = f"Models, {_who(group)} ({plural(n, 'participant')}): {verdict(part, 'model')[2]}"
        fam = families[families["group"] == group] if families is not None else pd.DataFrame()
        if len(fam):
            line += f"; families: {verdict(fam, 'family')[2]}"
        out.append(Finding(line + ".", "models"))
    return out


def _groups(source: Source) -> list[Finding]:
    """Return the group differences over all blocks with Holm p below the level, then the metrics without one."""
    joint = source.table("groups/group_joint")
    if joint is None or joint.empty:
        return []
    effects = source.table("groups/group_effects")
    n_perm = permutation_count(source)
    out, quiet = [], []
    for row in joint[joint["summary"] == _MAIN_SUMMARY].itertuples(index=False):
        name = METRIC_WORDS.get(row.metric, row.metric)
        p = float(row.perm_p_holm)
        if not p < HOLM_ALPHA:
            quiet.append(name)
            continue
        blocks = _blocks_agreeing(effects, row)
        out.append(Finding(
            f"Groups, {name} ({contrast_words(row.group, row.reference)}): {_difference(row)} over blocks "
            f"({int(round(float(row.level) * 100))}% interval {_difference(row, 'low', unit=False)} to "
            f"{_difference(row, 'high', unit=False)}), Holm p {p_words(p)}{n_perm}{blocks}.", "curves"))
    if quiet:
        out.append(Finding(f"Groups: no difference shown (Holm p ≥ {number(HOLM_ALPHA, '.2f')}) in "
                           f"{', '.join(dict.fromkeys(quiet))} (a difference not shown is not shown to be absent).", "curves"))
    return out + _uncalled(source.table("groups/group_diagnostics"))


def _uncalled(diagnostics: pd.DataFrame | None) -> list[Finding]:
    """Return one line naming the metrics whose hierarchical group model failed its diagnostics, and what follows."""
    if diagnostics is None or diagnostics.empty:
        return []
    failed = diagnostics[~diagnostics["ok"].astype("boolean").fillna(False)]
    if failed.empty:
        return []
    names = ", ".join(f"{METRIC_WORDS.get(m, m)} ({r})" for m, r in zip(failed["metric"], failed["reasons"]))
    return [Finding(f"Groups: the hierarchical model failed its diagnostics for {names}; those metrics have no "
                    "model intervals, and their differences rest on the permutation tests alone.", "curves")]


def permutation_count(source: Source) -> str:
    """Return " (9,999 permutations)" from the groups step's settings (empty when not recorded)."""
    n = step_settings(source, "groups").get("n_permutations")
    return f" ({int(n):,} permutations)" if n else ""


def _difference(row: object, column: str = "estimate", unit: bool = True) -> str:
    """Return a group difference on its metric's scale: rates in points, log scales as a ratio (minus signs)."""
    value = float(getattr(row, column))
    scale = str(row.scale)
    if scale.startswith("log "):
        return f"×{number(math.exp(value), '.2f')}"
    rate = scale.startswith("share of trials")
    text = number(100 * value if rate else value, "+.1f" if rate else "+.2f").replace("-", "−")
    return f"{text} {'points' if rate else scale}" if unit else text


def _blocks_agreeing(effects: pd.DataFrame | None, row: object) -> str:
    """Return "; lower in 5 of 5 blocks (Holm p < 0.05 in 5)": the per-block tests of the same difference."""
    if effects is None or effects.empty:
        return ""
    mine = effects[(effects["contrast"] == row.contrast) & (effects["metric"] == row.metric)]
    if mine.empty:
        return ""
    diff = mine["observed_diff"].astype(float)
    side, same = ("lower", int((diff < 0).sum())) if float(row.estimate) < 0 else ("higher", int((diff > 0).sum()))
    below = int((mine["perm_p_holm"].astype(float) < HOLM_ALPHA).sum())
    level = number(HOLM_ALPHA, ".2f")
    if same == below == len(mine):
        return f"; {side} in all {plural(len(mine), 'block')}, each at Holm p < {level}"
    return f"; {side} in {same} of {plural(len(mine), 'block')}, {below} at Holm p < {level}"


def _measure(source: Source) -> list[Finding]:
    """Return the measure's verdict per group: the learner the selection with the baseline calls, or none."""
    measure = str(step_settings(source, "rt").get("measure", "rt"))
    selection = source.table(f"rt/{measure}_selection")
    if selection is None or selection.empty:
        return []
    what = "Reaction times" if measure == "rt" else f"Measure {measure}"
    out = []
    for group, rows in selection.groupby("group", sort=False):
        _, leader, words = verdict(rows, "model")  # the criterion itself, not a column that records it
        if leader is None:
            said = "no learner is called"
        elif leader == BASELINE_MODEL:
            said = "no learner is called, the baseline without a learner leads"
        else:
            said = f"{leader} is called over the baseline and the other learners"
        out.append(Finding(f"{what}, {_who(group)}: {said}; {words}.", "rt"))
    return out


def _eeg(source: Source) -> list[Finding]:
    """Return the EEG verdict per group (random-effects selection of held-out likelihoods)."""
    selection = source.table("eeg/eeg_selection")
    if selection is None or selection.empty:
        return []
    return [Finding(f"EEG, {_who(group)}: {verdict(rows, 'model')[2]}.", "eeg")
            for group, rows in selection.groupby("group", sort=False)]


def _events(source: Source) -> list[Finding]:
    """Return where the event files are and how many (one per row of events/participants.csv)."""
    listed = source.table("events/participants")
    if listed is None or listed.empty:
        return []
    return [Finding(f"Event files: {plural(len(listed), 'events.tsv file')}, one per participant and session, "
                    "with their JSON sidecars in events/ (listed in events/participants.csv).", "events")]


def _who(group: object) -> str:
    """Return "everyone" for the reserved group label, else "group <label>"."""
    return "everyone" if str(group) == ALL else f"group {group}"
