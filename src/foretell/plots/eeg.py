"""Figures of the eeg step: a model's beta time course and map over its strongest cluster; the learner comparison."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from foretell.labels import ALL
from foretell.plots.common import OKABE_ITO, new_figure


def cluster_figure(evoked, cluster: pd.Series) -> Figure:
    """Return the beta time course at a cluster's channels (span shaded) and its topographic map over the span.

    Parameters
    ----------
    evoked : mne.Evoked
        The group-mean beta map (V per SD).
    cluster : pandas.Series
        One row of the eeg_clusters table (model, regressor, channels, tmin, tmax, p).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from mne.viz import plot_topomap

    fig, (course, topo) = new_figure(2, width=4.2)
    names = str(cluster["channels"]).split(";")
    picks = [evoked.ch_names.index(c) for c in names]
    times = evoked.times
    beta = evoked.data * 1e6
    course.plot(times, beta[picks].mean(axis=0), color=OKABE_ITO[4])
    course.axvspan(cluster["tmin"], cluster["tmax"], color=OKABE_ITO[1], alpha=0.3, lw=0)
    course.axhline(0.0, color="grey", lw=0.5)
    course.set_xlabel("time (s)")
    course.set_ylabel(f"beta of {cluster['regressor']} (µV per SD)")
    course.set_title(f"{cluster['model']}: {len(names)} channels, p = {cluster['p']:.3g}", fontsize=9)
    span = (times >= cluster["tmin"]) & (times <= cluster["tmax"])
    mask = np.isin(evoked.ch_names, names)
    plot_topomap(beta[:, span].mean(axis=1), evoked.info, axes=topo, show=False, mask=mask, cmap="RdBu_r")
    topo.set_title(f"{cluster['tmin']:.2f} to {cluster['tmax']:.2f} s", fontsize=9)
    return fig


def compare_figure(compare: pd.DataFrame) -> Figure:
    """Return each learner's held-out log-likelihood gain over the baseline: participants and their mean.

    Parameters
    ----------
    compare : pandas.DataFrame
        The eeg_compare table.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, (ax,) = new_figure(1, width=5.0)
    whole = compare[(compare["block"] == ALL) & (compare["model"] != "none")]
    models = list(pd.unique(whole["model"]))
    for i, m in enumerate(models):
        delta = whole.loc[whole["model"] == m, "delta_cv_loglik"].to_numpy(float)
        ax.scatter(np.full(len(delta), i), delta, s=10, color=OKABE_ITO[1], alpha=0.7)
        ax.plot([i - 0.25, i + 0.25], [np.nanmean(delta)] * 2, color=OKABE_ITO[5], lw=2)
    ax.axhline(0.0, color="grey", lw=0.5)
    ax.set_xticks(range(len(models)), models, rotation=45, ha="right")
    ax.set_ylabel("held-out log-likelihood - none (nats)")
    ax.set_title("EEG: learners against nuisance terms only", fontsize=9)
    return fig
