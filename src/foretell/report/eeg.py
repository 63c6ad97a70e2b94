"""The report's EEG section: which learner explains the single-trial EEG, and the clusters of its beta maps."""

from __future__ import annotations

import pandas as pd

from foretell.report.layout import Figures, Section, Source, absent, table
from foretell.summaries import verdict
from foretell.text import plural

CLUSTER_ALPHA = 0.05
"""Clusters listed in the report: p below this (every cluster is in eeg/eeg_clusters.csv)."""


def eeg_section(source: Source, figures: Figures) -> Section:
    """Return the section of the eeg step: the model verdict per group, clusters and their figures.

    Parameters
    ----------
    source : Source
        The analysis (its ``eeg/`` result).
    figures : Figures
        The report's figures (the step's own are embedded from ``eeg/figures/``).

    Returns
    -------
    Section
        Absent (one line) when the analysis ran no eeg step.

    References
    ----------
    Maris, E. & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and
    MEG-data. J. Neurosci. Methods 164, 177-190 (cluster permutation tests).
    Rigoux, L. et al. (2014). Bayesian model selection for group studies - revisited.
    NeuroImage 84, 971-985 (the words of each verdict, via :func:`foretell.summaries.verdict`).
    """
    heading = "EEG: which learner explains the single-trial response"
    selection = source.table("eeg/eeg_selection")
    if not source.has("eeg") or selection is None:
        return absent("eeg", heading, "No eeg/ folder: no EEG epochs were given (foretell eeg, or analyze --epochs).")
    paragraphs = ["Each learner's regressors (and the baseline none, nuisance terms only) are scored by "
                  "the leave-one-block-out log-likelihood of each epoch's mean over the scored window "
                  "and channels, then compared by random-effects selection across participants."]
    for group, rows in selection.groupby("group", sort=False):
        paragraphs.append(f"Group {group}: {verdict(rows, 'model')[2]}.")
    clusters = source.table("eeg/eeg_clusters")
    tables = []
    if clusters is not None and len(clusters):
        shown = clusters[pd.to_numeric(clusters["p"], errors="coerce") < CLUSTER_ALPHA]
        n_perm = sorted(set(clusters["n_permutations"].dropna().astype(int)))
        paragraphs.append(f"Cluster permutation tests ({', '.join(map(str, n_perm))} permutations): "
                          f"{plural(len(shown), 'cluster')} with p < {CLUSTER_ALPHA:g} of "
                          f"{len(clusters)} (all in eeg/eeg_clusters.csv).")
        if len(shown):
            tables.append(table(shown, {"model": "model", "regressor": "regressor", "contrast": "contrast",
                                        "channels": "channels", "tmin": "from (s)", "tmax": "to (s)",
                                        "stat": "summed statistic", "p": "p"},
                                "Clusters with p < 0.05 (each model's beta maps, one-sample against 0, or "
                                "between groups)", formats={"tmin": ".3f", "tmax": ".3f", "stat": ".1f"}))
    shown_figures = [(path, caption) for path, caption in
                     [("eeg/figures/eeg_compare.png", "Each learner's held-out log-likelihood gain over the "
                                                      "baseline none, per participant.")]
                     + [(f"eeg/figures/{name.rsplit('/', 1)[-1]}", "Beta time course at the channels of the "
                         "model's strongest cluster (span shaded) and its topography over the span.")
                        for name in source.files if name.startswith("eeg/figures/eeg_")
                        and not name.endswith("eeg_compare.png")]
                     if figures.step(path)]
    return Section("eeg", heading, tuple(paragraphs), figures=tuple(shown_figures), tables=tuple(tables))
