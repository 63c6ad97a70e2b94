"""The report's sections on the data, the learning curves, reaction times, event files and the design check."""

from __future__ import annotations

import pandas as pd

from foretell.labels import ALL
from foretell.report.layout import (Figures, Section, Source, Table, absent, cell, diagnostics_table, lines,
                                    provisional_line, table)
from foretell.text import number, plural

HOLM_ALPHA = 0.05
"""Family-wise level at which a Holm-corrected permutation p is counted as a difference (common practice)."""


def data_section(source: Source) -> Section:
    """Return the section on the data: the validation summary, exclusions from the fits, warnings.

    Parameters
    ----------
    source : Source
        The analysis (its ``validation/`` and ``fit/`` results).

    Returns
    -------
    Section
    """
    heading = "Data and exclusions"
    if not source.has("validation"):
        return absent("data", heading, "No validation/ folder: the data summary is not part of this analysis.")
    summary = source.table("validation/summary")
    paragraphs, tables, items = [], [], []
    if summary is not None:
        people = summary[summary["participant"] != ALL]
        total = summary[summary["participant"] == ALL]
        line = f"The log holds {plural(len(people), 'participant')}"
        if len(total):
            t = total.iloc[0]
            line += (f", {cell(t['trials'])} trials, of which {cell(t['missed'])} missed guesses; "
                     f"{cell(t['rt_usable'])} reaction times pass the screen")
        paragraphs.append(line + ". The RT screen only flags trials for the RT analyses; it removes none.")
        tables.append(table(summary, {
            "participant": "participant", "group": "group", "sessions": "sessions", "blocks": "blocks",
            "trials": "trials", "missed": "missed guesses", "rt_missing": "RT missing",
            "rt_fast": "RT too fast", "rt_slow": "RT too slow", "rt_mad": "RT outlier (MAD)",
            "rt_usable": "RT usable", "labels_fixed": "labels fixed"},
            "Validation summary, trial counts per participant (last row: everyone)"))
    excluded = source.table("fit/excluded")
    if excluded is None:
        paragraphs.append("No fit/excluded.csv: exclusions from the model fits are not known here.")
    elif excluded.empty:
        paragraphs.append("No participant was left out of the model fits.")
    else:
        paragraphs.append(f"{plural(len(excluded), 'participant')} left out of the model fits:")
        tables.append(table(excluded, {"participant": "participant", "group": "group", "reason": "reason"},
                             "Participants left out of the model fits, and why"))
    warnings = lines(source.text("validation/warnings.txt"))
    paragraphs.append("Validation noticed:" if warnings else "Validation raised no warning.")
    items.extend(warnings)
    return Section("data", heading, tuple(paragraphs), tuple(items), tables=tuple(tables))


def curves_section(source: Source, figures: Figures, provisional: bool) -> Section:
    """Return the section on learning curves: the groups step's figures, contrasts with Holm-corrected p.

    Parameters
    ----------
    source : Source
        The analysis (its ``groups/`` result).
    figures : Figures
        Collects the figures shown (the groups step's own, not redrawn).
    provisional : bool
        Whether the Bayesian comparisons are provisional.

    Returns
    -------
    Section
        A difference is counted at Holm-corrected p below :data:`HOLM_ALPHA`
        (Holm, 1979; common practice). The adjusted tests come first: the
        Holm-corrected permutation tests per block, then the summaries over
        all blocks; the hierarchical model's per-block HDIs last, labelled
        unadjusted.
    """
    heading = "Learning curves by group"
    if not source.has("groups"):
        return absent("curves", heading, "No groups/ folder: the log has no groups to compare, "
                                          "or the group step was not run.")
    from foretell.curves import METRICS

    group_curves = source.table("groups/group_curves")
    diagnostics = source.table("groups/group_diagnostics")
    bayes = diagnostics is not None and len(diagnostics) > 0
    paragraphs = list(provisional_line(provisional and bayes))
    shown = []
    if group_curves is not None and len(group_curves):
        for metric in dict.fromkeys(group_curves["metric"]):
            path = f"groups/figures/curve_{metric}.png"
            if metric in METRICS and figures.step(path):
                shown.append((path, f"{METRICS[metric].title} ({METRICS[metric].unit}) by block and group: "
                                    f"{METRICS[metric].meaning}."))
    if figures.step("groups/figures/context_learning.png"):
        shown.append(("groups/figures/context_learning.png",
                      "Share of guesses of the most likely next symbol after each source context; the dashed "
                      "line is the source's probability of that symbol."))
    effects, joint = source.table("groups/group_effects"), source.table("groups/group_joint")
    paragraphs += _adjusted_lines(effects, joint)
    tables = _group_tables(effects, joint, bayes)
    if bayes and effects is not None and len(effects):
        paragraphs.append("Unadjusted, shown last: the hierarchical model's difference per block with its HDI, "
                          "one interval per block and no correction for looking at many blocks.")
        called = effects["called"].astype("boolean") if "called" in effects.columns else None
        if called is not None and called.notna().any() and not called.fillna(False).all():
            paragraphs.append("Where 'model called' says no, the hierarchical model failed its diagnostics: "
                              "its difference and interval are not called and are not shown.")
    models = source.table("groups/group_models")
    if models is not None and len(models):
        tables.append(table(models, {
            "contrast": "contrast", "level": "level", "name": "model or family",
            "prob_groups_differ": "P(groups differ in frequencies)", "freq_group": "frequency in group",
            "freq_reference": "frequency in reference", "n_group": "n group", "n_reference": "n reference"},
            "Do the groups use the models in different proportions? Whole-session BIC evidence "
            "(Rigoux et al., 2014)"))
    if bayes:
        tables.append(diagnostics_table(diagnostics, "metric", "Diagnostics of the hierarchical group models"))
    elif effects is not None and len(effects):
        paragraphs.append("No hierarchical group model was run: the differences rest on permutation tests and "
                          "their intervals only.")
    return Section("curves", heading, tuple(paragraphs), figures=tuple(shown), tables=tuple(tables))


def _adjusted_lines(effects: pd.DataFrame | None, joint: pd.DataFrame | None) -> list[str]:
    """Return the paragraphs on the adjusted group tests: per block (Holm) and over all blocks."""
    out = []
    if effects is not None and len(effects):
        below = int((effects["perm_p_holm"].astype(float) < HOLM_ALPHA).sum())
        out.append(f"Adjusted for the number of tests: permutation tests of the group difference per block, "
                   f"Holm-corrected across blocks and contrasts per metric: {below} of "
                   f"{plural(len(effects), 'difference')} have a corrected p below {number(HOLM_ALPHA, '.2f')} "
                   "(common practice). A difference above that is neither shown to exist nor shown to be absent.")
    if joint is not None and len(joint):
        out.append("Over all blocks at once: the group difference averaged over blocks, and the difference in the "
                   "learning slope (change per block), each with one interval per metric and contrast, so no "
                   "adjustment for the number of blocks is needed; their permutation p is Holm-corrected across the "
                   "metric's summaries and contrasts. The interval is the hierarchical model's HDI where the model "
                   "passed its diagnostics, else the shifts a permutation test over participants does not reject "
                   "(see 'method').")
    return out


def _group_tables(effects: pd.DataFrame | None, joint: pd.DataFrame | None, bayes: bool) -> list[Table]:
    """Return the group-difference tables: Holm-adjusted tests per block, the joint summary, the unadjusted HDIs."""
    tables = []
    if effects is not None and len(effects):
        tables.append(table(effects, {
            "contrast": "contrast", "session": "session", "block": "block", "metric": "metric", "scale": "scale",
            "n_group": "n group", "n_reference": "n reference",
            "observed_diff": "observed difference (participant values)", "perm_p": "permutation p",
            "perm_p_holm": "Holm-corrected p"},
            "Group differences per block (group minus reference): permutation tests, Holm-adjusted"))
    if joint is not None and len(joint):
        tables.append(table(joint, {
            "contrast": "contrast", "metric": "metric", "summary": "summary", "scale": "scale",
            "estimate": "difference", "low": "interval low", "high": "interval high", "level": "level",
            "method": "method", "prob_positive": "P(difference > 0)", "perm_p_holm": "Holm-corrected p",
            "n_group": "n group", "n_reference": "n reference", "n_blocks": "blocks"},
            "Group differences over all blocks (group minus reference): one interval per metric, contrast and "
            "summary", {"level": ".2f"}))
    if bayes and effects is not None and len(effects):
        tables.append(table(effects, {
            "contrast": "contrast", "session": "session", "block": "block", "metric": "metric", "scale": "scale",
            "diff_mean": "model difference (posterior mean)", "hdi_low": "HDI low", "hdi_high": "HDI high",
            "prob_positive": "P(difference > 0)", "called": "model called"},
            "Unadjusted: the hierarchical model's group difference per block with its HDI, one interval per block "
            "and no correction for looking at many blocks (some may exclude 0 by chance); read after the "
            "adjusted tests above"))
    return tables


def rt_section(source: Source, provisional: bool) -> Section:
    """Return the section on reaction times: the model ranking, whether it is called, diagnostics.

    Parameters
    ----------
    source : Source
        The analysis (its ``rt/`` result).
    provisional : bool
        Whether the Bayesian comparisons are provisional.

    Returns
    -------
    Section
    """
    heading = "Reaction times"
    if not source.has("rt"):
        return absent("rt", heading, "No rt/ folder: the log has no reaction times, or the RT step was not run.")
    compare = source.table("rt/rt_compare")
    paragraphs, tables = [], []
    if compare is not None and len(compare):
        called = compare["called"].astype("boolean").fillna(False)
        bayes = compare["criterion"].astype(str).str.startswith("elpd").any()
        if bayes:
            paragraphs.extend(provisional_line(provisional))
        if not called.any():
            paragraphs.append("Not called: the data do not single out one model of the reaction times "
                              "(the reasons are listed below). The ranking is shown for completeness only.")
        else:
            basis = "PSIS-LOO over participant x block units" if bayes else "summed BIC, margin of at least 10"
            paragraphs.append(f"Called on {basis}: {compare.sort_values('rank')['model'].iloc[0]} ranks first.")
        tables.append(table(compare, {
            "model": "model", "rank": "rank", "criterion": "criterion", "bic_sum": "summed BIC",
            "d_bic_sum": "BIC difference to the first", "elpd": "ELPD (LOO)", "se": "SE",
            "d_elpd": "ELPD difference", "dse": "SE of difference", "weight": "weight", "called": "called",
            "provisional": "provisional"}, "Models of the reaction times, whole session",
            {"bic_sum": ".1f", "d_bic_sum": ".1f", "elpd": ".1f", "se": ".1f", "d_elpd": ".1f", "dse": ".1f"}))
    diagnostics = source.table("rt/rt_diagnostics")
    if diagnostics is not None and len(diagnostics):
        tables.append(diagnostics_table(diagnostics, "model", "Diagnostics of the hierarchical RT models"))
    else:
        paragraphs.append("No hierarchical Bayesian RT model was run: models are ranked by summed BIC.")
    return Section("rt", heading, tuple(paragraphs), lines(source.text("rt/summary.txt")), tables=tuple(tables))


def events_section(source: Source) -> Section:
    """Return the section listing the event files written for the EEG analysis.

    Parameters
    ----------
    source : Source
        The analysis (its ``events/`` result).

    Returns
    -------
    Section
    """
    heading = "Event files"
    if not source.has("events"):
        return absent("events", heading, "No events/ folder: no event files were written.")
    files = [name.removeprefix("events/") for name in source.files if name.startswith("events/")]
    return Section("events", heading, (f"events/ holds {plural(len(files), 'file')} for the EEG analysis:",),
                   tuple(files))


def design_section(source: Source, figures: Figures) -> Section:
    """Return the section on the design check: its answers, confusion figures and the RT check's power figure.

    Parameters
    ----------
    source : Source
        The analysis (its ``recovery/`` result).
    figures : Figures
        Collects the figures shown (the design check's own, not redrawn).

    Returns
    -------
    Section
        The answer of the guess models (``answer.txt``), then that of the RT
        analysis (``rt_answer.txt``) when it was checked.
    """
    heading = "Design check"
    if not source.has("recovery"):
        return absent("design", heading, "No recovery/ folder: no design check was run.")
    shown = []
    confusion = source.table("recovery/confusion")
    trial_counts = sorted(set(confusion["trials"])) if confusion is not None else []
    for trials in trial_counts:
        path = f"recovery/figures/confusion_{trials}.png"
        if figures.step(path):
            shown.append((path, f"Share of simulated participants of each generating model best fitted by "
                                f"each model, {trials} trials per participant."))
    if figures.step("recovery/figures/rt_power.png"):
        shown.append(("recovery/figures/rt_power.png",
                      "RT design check: the share of simulated datasets in which the RT analysis calls the "
                      "generating learner (power), and calls any learner on the nulls (false positives), "
                      "with Clopper-Pearson intervals."))
    answer = lines(source.text("recovery/answer.txt")) or ("recovery/answer.txt is missing.",)
    return Section("design", heading, answer + lines(source.text("recovery/rt_answer.txt")), figures=tuple(shown))
