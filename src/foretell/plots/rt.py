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
