"""The report's sections on the data, the learning curves, reaction times, event files and the design check."""

from __future__ import annotations

import pandas as pd

from foretell.findings import findings, permutation_count
from foretell.labels import ALL
from foretell.measure import BASELINE_MODEL
from foretell.plots.rt import binned_figure, slopes_figure
from foretell.report.layout import (SELECTION_COLUMNS, Figures, Section, Source, Table, absent, cell,
                                    diagnostics_table, lines, provisional_line, step_settings, table)
from foretell.summaries import HOLM_ALPHA, METRIC_WORDS, contrast_words
from foretell.text import number, plural


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
    called = bayes and bool(diagnostics["ok"].astype("boolean").fillna(False).any())
    paragraphs = list(provisional_line(provisional and called))  # only a called model rests on the short chains
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
    hdis = bayes and effects is not None and "diff_mean" in effects.columns and effects["diff_mean"].notna().any()
    tables = _group_tables(effects, joint, hdis, permutation_count(source))
    if hdis:
        paragraphs.append("Unadjusted, shown last: the hierarchical model's difference per block with its HDI, "
                          "one interval per block and no correction for looking at many blocks.")
        called = effects["called"].astype("boolean") if "called" in effects.columns else None
        if called is not None and called.notna().any() and not called.fillna(False).all():
            paragraphs.append("Where 'model called' says no, the hierarchical model failed its diagnostics: "
                              "its difference and interval are not called and are not shown.")
    elif bayes:
        paragraphs.append("No hierarchical group model passed its diagnostics (table below): the differences rest "
                          "on the permutation tests and their intervals.")
    models = _readable(source.table("groups/group_models"))
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


def _readable(frame: pd.DataFrame | None) -> pd.DataFrame | None:
    """Return a group-difference table with contrasts as "group − reference" and metrics in plain words."""
    if frame is None or frame.empty or not {"group", "reference"} <= set(frame.columns):
        return frame
    frame = frame.assign(contrast=[contrast_words(g, r) for g, r in zip(frame["group"], frame["reference"])])
    return frame.assign(metric=frame["metric"].map(lambda m: METRIC_WORDS.get(m, m))) if "metric" in frame else frame


def _group_tables(effects: pd.DataFrame | None, joint: pd.DataFrame | None, hdis: bool,
                  permutations: str = "") -> list[Table]:
    """Return the group-difference tables: Holm-adjusted tests per block, the joint summary, the unadjusted HDIs.

    The HDIs only when ``hdis`` (a hierarchical model gave some); ``permutations`` is said in the caption of
    the tests (" (9,999 permutations)").
    """
    tables = []
    effects, joint = _readable(effects), _readable(joint)
    if effects is not None and len(effects):
        tables.append(table(effects, {
            "contrast": "contrast", "session": "session", "block": "block", "metric": "metric", "scale": "scale",
            "n_group": "n group", "n_reference": "n reference",
            "observed_diff": "observed difference (participant values)", "perm_p": "permutation p",
            "perm_p_holm": "Holm-corrected p"},
            f"Group differences per block: permutation tests{permutations}, Holm-adjusted",
            {"perm_p": "p", "perm_p_holm": "p"}))
    if joint is not None and len(joint):
        tables.append(table(joint, {
            "contrast": "contrast", "metric": "metric", "summary": "summary", "scale": "scale",
            "estimate": "difference", "low": "interval low", "high": "interval high", "level": "level",
            "method": "method", "prob_positive": "P(difference > 0)", "perm_p_holm": "Holm-corrected p",
            "n_group": "n group", "n_reference": "n reference", "n_blocks": "blocks"},
            "Group differences over all blocks: one interval per metric, contrast and summary",
            {"level": ".2f", "perm_p_holm": "p"}))
    if hdis and effects is not None and len(effects):
        tables.append(table(effects, {
            "contrast": "contrast", "session": "session", "block": "block", "metric": "metric", "scale": "scale",
            "diff_mean": "model difference (posterior mean)", "hdi95_low": "95% HDI low",
            "hdi95_high": "95% HDI high",
            "prob_positive": "P(difference > 0)", "called": "model called"},
            "Unadjusted: the hierarchical model's group difference per block with its HDI, one interval per block "
            "and no correction for looking at many blocks (some may exclude 0 by chance); read after the "
            "adjusted tests above"))
    return tables


def rt_section(source: Source, figures: Figures, provisional: bool) -> Section:
    """Return the section on reaction times: the verdict per group, the model ranking, diagnostics.

    Parameters
    ----------
    source : Source
        The analysis (its ``rt/`` result).
    figures : Figures
        Collects the figures shown; each participant's slopes are drawn here.
    provisional : bool
        Whether the Bayesian comparisons are provisional.

    Returns
    -------
    Section
        The verdict per group is that of the random-effects selection with
        the baseline (:func:`foretell.findings.findings`, the words of
        :func:`foretell.summaries.verdict`); the hierarchical ranking by
        ELPD is called only when its models passed the diagnostics gate. The
        step's notes stay in ``rt/summary.txt``.
    """
    heading = "Reaction times"
    if not source.has("rt"):
        return absent("rt", heading, "No rt/ folder: the log has no reaction times, or the RT step was not run.")
    items = tuple(f.text for f in findings(source) if f.anchor == "rt")
    paragraphs = ["Which learner's uncertainty explains the reaction times? Per group, by random-effects "
                  "selection of per-participant BIC with the baseline (time on task only):"]
    tables = []
    selection = source.table("rt/rt_selection")
    if selection is not None and len(selection):
        tables.append(table(selection, SELECTION_COLUMNS, "Random-effects selection per group, learners and the "
                            "baseline none (whole session)"))
    compare = source.table("rt/rt_compare")
    after = []
    if compare is not None and len(compare):
        elpd = compare["criterion"].astype(str).str.startswith("elpd")
        if elpd.any() and compare["elpd_loo"].notna().any():
            after.extend(provisional_line(provisional))
            first = compare.sort_values("rank")
            after.append(f"The hierarchical models ranked by PSIS-LOO over participant × block units: "
                         f"{first['model'].iloc[0]} first"
                         + (", called." if first["called"].astype("boolean").fillna(False).iloc[0] else
                            ", not called (too close to the next model)."))
        else:
            after.append(("No hierarchical model passed its diagnostics, so no ELPD ranking is called"
                          if elpd.any() else "No hierarchical model was run") + ": the ranking below is that of "
                         "the selection for everyone, with the summed BIC beside it for reference (no call).")
        tables.append(table(compare, {
            "model": "model", "rank": "rank", "criterion": "criterion", "bic_sum": "summed BIC",
            "d_bic_sum": "BIC difference to the first", "elpd_loo": "ELPD (LOO)", "elpd_loo_se": "SE",
            "elpd_diff": "ELPD difference", "elpd_diff_se": "SE of difference", "stacking_weight": "stacking weight",
            "protected_exceedance": "protected exceedance", "omnibus_risk": "omnibus risk", "called": "called",
            "provisional": "provisional"}, "Models of the reaction times, whole session",
            {"bic_sum": ".1f", "d_bic_sum": ".1f", "elpd_loo": ".1f", "elpd_loo_se": ".1f", "elpd_diff": ".1f",
             "elpd_diff_se": ".1f"}))
    diagnostics = source.table("rt/rt_diagnostics")
    if diagnostics is not None and len(diagnostics):
        tables.append(diagnostics_table(diagnostics, "model", "Diagnostics of the hierarchical RT models"))
    after.append("Every note of the step (trials left out, parameterisation, sampler messages) is in rt/summary.txt.")
    fits, shown = source.table("rt/rt_fits"), ()
    if fits is not None and "slope_ms_per_bit" in fits.columns and fits["slope_ms_per_bit"].notna().any():
        regressor = (step_settings(source, "rt").get("regressors") or ["entropy"])[0]
        shown = ((figures.draw("rt_slopes", slopes_figure(fits, regressor=regressor)),
                  f"Each participant's slope of the reaction time on each learner's {regressor}, with its 95% "
                  "interval, by group (per-participant fits; intervals not corrected for the number of "
                  "participants)."),)
        shown += _binned(source, figures, regressor)
    return Section("rt", heading, (*after, *paragraphs), items, shown, tuple(tables))


def _binned(source: Source, figures: object, regressor: str) -> tuple[tuple[object, str], ...]:
    """Return the binned measure against the regressor of the learner called for everyone (else the leader)."""
    trials, selection = source.table("rt/regressors"), source.table("rt/rt_selection")
    if trials is None or selection is None or "used" not in trials.columns or "rt" not in trials.columns:
        return ()
    learners = selection[(selection["group"].astype(str) == ALL) & (selection["model"] != BASELINE_MODEL)]
    learners = learners.dropna(subset=["protected_exceedance"])
    if learners.empty:
        return ()
    top = learners.sort_values("protected_exceedance", ascending=False, kind="stable").iloc[0]
    called = bool(pd.Series([top["called"]]).astype("boolean").fillna(False).iloc[0])
    which = "the learner called for everyone" if called else "the leader for everyone (not called)"
    return ((figures.draw("rt_binned", binned_figure(trials, str(top["model"]), regressor=regressor)),
             f"Reaction time against the {regressor} of {top['model']}, {which}: raw geometric means in quantile "
             "bins of the trials the fits used, per group, with 95% intervals over participants (time-on-task "
             "terms not removed)."),)


def events_section(source: Source) -> Section:
    """Return the section on the event files written for the EEG analysis: how many, of which kind, and where.

    Parameters
    ----------
    source : Source
        The analysis (its ``events/`` result).

    Returns
    -------
    Section
        One paragraph: the count of files by kind and the folder; the
        files are listed in ``events/participants.csv`` (one row per
        participant and session), not here.
    """
    heading = "Event files"
    if not source.has("events"):
        return absent("events", heading, "No events/ folder: no event files were written.")
    files = [name for name in source.files if name.startswith("events/")]
    kinds = {"events.tsv": "_events.tsv", "JSON sidecar": "_events.json"}
    counts = ", ".join(plural(sum(n.endswith(end) for n in files), kind) for kind, end in kinds.items())
    return Section("events", heading, (
        f"events/ holds {plural(len(files), 'file')} for the EEG analysis ({counts}), named "
        "sub-<participant>[_ses-<session>]_task-<task>_events.tsv after BIDS; events/participants.csv maps "
        "each participant to its BIDS label.",))


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
