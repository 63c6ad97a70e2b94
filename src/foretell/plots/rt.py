"""Figures of the measure's analysis: each participant's slope on the learner's regressor, with its interval."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from foretell.plots.common import colour, new_figure


def slopes_figure(fits: pd.DataFrame, *, regressor: str = "entropy", unit: str = "ms") -> Figure:
    """Return each participant's slope of the measure on each learner's regressor, by group, with its interval.

    Parameters
    ----------
    fits : pandas.DataFrame
        The rt step's fits table (participant, group, model,
        ``slope_ms_per_bit``, ``slope_low``, ``slope_high``); the baseline
        ``none`` (no slope) is left out.
    regressor : str, default "entropy"
        The regressor the slope is on (the axis label).
    unit : str, default "ms"
        The measure's unit per bit.

    Returns
    -------
    matplotlib.figure.Figure
        One row per learner model, each on its own scale (a slope that
        barely moves the regressor can be large), its id on the left; in it
        one dot per participant with the 95% interval of its slope (the rt
        step's interval: HAC or the bootstrap), groups in their colours
        (legend), and the zero line. An interval that excludes 0 is not
        corrected for the number of participants.
    """
    from matplotlib.lines import Line2D

    rows = fits.dropna(subset=["slope_ms_per_bit"])
    models = list(dict.fromkeys(rows["model"]))
    groups = sorted(rows["group"].astype(str).unique())
    per_row = max(0.6, 0.09 * rows.groupby("model")["participant"].nunique().max()) if len(rows) else 0.6
    fig, _ = new_figure(width=7.4, height=per_row * max(len(models), 1) + 1.2)
    fig.clear()
    axes = fig.subplots(max(len(models), 1), 1, squeeze=False)[:, 0]
    for ax, model in zip(axes, models):
        part = rows[rows["model"] == model].sort_values(["group", "slope_ms_per_bit"], kind="stable")
        y = np.arange(len(part))
        slope = part["slope_ms_per_bit"].to_numpy(dtype=float)
        colours = [colour(groups.index(str(g))) for g in part["group"]]
        ax.hlines(y, part["slope_low"].to_numpy(dtype=float), part["slope_high"].to_numpy(dtype=float),
                  colors=colours, linewidth=0.8)
        ax.scatter(slope, y, s=9, c=colours, zorder=3)
        ax.axvline(0, color="0.35", linewidth=1)
        ax.set_yticks([])
        ax.set_ylabel(model, rotation=0, ha="right", va="center", fontsize=9)
        ax.tick_params(axis="x", labelsize=9)
    axes[-1].set_xlabel(f"slope on {regressor} ({unit} per bit); one line per participant, 95% interval")
    if len(groups) > 1:
        fig.legend([Line2D([], [], color=colour(i), marker="o", linewidth=0.8) for i in range(len(groups))],
                   groups, loc="outside upper right", fontsize=9, ncols=len(groups), frameon=False)
    fig.suptitle("Each participant's slope per learner model", fontsize=10)
    return fig


BINS = 6
"""Quantile bins of the regressor in :func:`binned_figure`."""


def binned_figure(regressors: pd.DataFrame, model: str, *, measure: str = "rt", regressor: str = "entropy",
                  log_scale: bool = True) -> Figure:
    """Return the measure against one model's regressor, in quantile bins, by group, with 95% intervals.

    The trials the fits used (``used``) are cut into :data:`BINS` bins at
    the quantiles of the model's regressor over all participants; per
    participant and bin the mean of the measure (of its log with
    ``log_scale``: a geometric mean, shown in ms for RTs); per group and bin
    the mean over participants, with Student's t 95% interval over
    participants (common practice). Raw data, no time-on-task terms removed.

    Parameters
    ----------
    regressors : pandas.DataFrame
        The rt step's regressors table (participant, group, model, the
        regressor, the measure, ``used``).
    model : str
        The learner model whose regressor is on the x axis.
    measure, regressor : str
        Columns of ``regressors``.
    log_scale : bool, default True
        Average the log of the measure (reaction times).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from scipy.stats import t as student

    rows = regressors[(regressors["model"] == model) & regressors["used"].astype(bool)
                      & regressors[regressor].notna() & regressors[measure].notna()]
    fig, (ax,) = new_figure(width=6.4, height=3.8)
    if rows.empty:
        return fig
    edges = np.unique(np.quantile(rows[regressor], np.linspace(0, 1, BINS + 1)))
    cut = np.clip(np.searchsorted(edges, rows[regressor], side="right") - 1, 0, len(edges) - 2)
    value = np.log(rows[measure].to_numpy(float)) if log_scale else rows[measure].to_numpy(float)
    cells = pd.DataFrame({"group": rows["group"].astype(str).to_numpy(), "participant": rows["participant"].to_numpy(),
                          "bin": cut, "x": rows[regressor].to_numpy(float), "y": value})
    per = cells.groupby(["group", "participant", "bin"]).agg(x=("x", "mean"), y=("y", "mean")).reset_index()
    scale = 1000.0 if measure == "rt" else 1.0
    for i, (group, part) in enumerate(per.groupby("group", sort=True)):
        summary = part.groupby("bin").agg(x=("x", "mean"), mean=("y", "mean"), sd=("y", "std"), n=("y", "size"))
        half = student.ppf(0.975, np.maximum(summary["n"] - 1, 1)) * summary["sd"].fillna(0) / np.sqrt(summary["n"])
        low, mid, high = summary["mean"] - half, summary["mean"], summary["mean"] + half
        if log_scale:
            low, mid, high = np.exp(low), np.exp(mid), np.exp(high)
        ax.errorbar(summary["x"], mid * scale, yerr=[(mid - low) * scale, (high - mid) * scale], fmt="o-",
                    color=colour(i), capsize=3, linewidth=1.2, markersize=4, label=f"{group} (mean over participants)")
    unit = "ms" if measure == "rt" else measure
    ax.set_xlabel(f"{model}'s {regressor} (bits), {len(edges) - 1} quantile bins")
    ax.set_ylabel(("geometric mean " if log_scale else "mean ") + ("RT (ms)" if measure == "rt" else unit))
    ax.legend(fontsize=9, frameon=False)
    ax.set_title(f"{'Reaction time' if measure == 'rt' else measure} against {model}'s {regressor}", fontsize=10)
    return fig
