"""Figures of the groups step: learning curves by group, and guesses against the source by context."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from foretell.plots.common import colour, new_figure
from foretell.stats.intervals import HDI_PROB


class CurveMetric(Protocol):
    """What a curve figure needs to know of a metric (:class:`foretell.curves.Metric` has it).

    Attributes
    ----------
    name, title, unit : str
        The metric's name in the table, its title and its unit.
    log : bool
        Drawn on a log axis.
    """

    name: str
    title: str
    unit: str
    log: bool


def _unit_order(table: pd.DataFrame) -> list[tuple[str, str]]:
    """Return the table's (session, block) labels in run order (numbers by value, other labels last)."""
    units = table[["session", "block"]].drop_duplicates()
    units = units.assign(**{f"_{c}": pd.to_numeric(units[c], errors="coerce").fillna(np.inf)
                            for c in ("session", "block")}).sort_values(["_session", "_block"], kind="stable")
    return [tuple(u) for u in units[["session", "block"]].itertuples(index=False)]


def _unit_ticks(ax, units: Sequence[tuple[str, str]]) -> None:
    sessions = {s for s, _ in units}
    labels = [b if len(sessions) == 1 else f"{s}:{b}" for s, b in units]
    ax.set_xticks(range(len(units)), labels)
    ax.set_xlabel("block" if len(sessions) == 1 else "session:block")


def curve_figure(group_curves: pd.DataFrame, metric: CurveMetric) -> Figure:
    """Return the learning curve of one metric by group: participants' mean, and the model's HDI band.

    Dots joined by a thin line: the mean over the group's participants;
    thick line and band: the hierarchical model's posterior mean and
    :data:`foretell.stats.intervals.HDI_PROB` HDI of a typical participant,
    where a model was fitted and passed the diagnostics: one interval per
    block, not adjusted for looking at many blocks (the legend says so).

    Parameters
    ----------
    group_curves : pandas.DataFrame
        The groups step's ``group_curves`` table.
    metric : CurveMetric
        The metric drawn (its name, title, unit and whether it is on a log scale).

    Returns
    -------
    matplotlib.figure.Figure
    """
    rows = group_curves[group_curves["metric"] == metric.name]
    units = _unit_order(rows)
    index = {u: i for i, u in enumerate(units)}
    fig, (ax,) = new_figure(width=max(4.8, 0.45 * len(units) + 3.0))
    for i, (group, part) in enumerate(rows.groupby("group", sort=True)):
        x = np.array([index[(s, b)] for s, b in zip(part["session"], part["block"])])
        order = np.argsort(x)
        x, part = x[order], part.iloc[order]
        ax.plot(x, part["participant_mean"], marker="o", linewidth=0.8, color=colour(i),
                label=f"{group}: mean of participants")
        fitted = part["mean"].notna().to_numpy()
        if fitted.any():
            ax.plot(x[fitted], part["mean"][fitted], linewidth=2.0, color=colour(i),
                    label=f"{group}: model, {HDI_PROB:.0%} HDI per block (unadjusted)")
            ax.fill_between(x[fitted], part["hdi_low"][fitted], part["hdi_high"][fitted], color=colour(i),
                            alpha=0.25, linewidth=0)
    _unit_ticks(ax, units)
    if metric.log:
        ax.set_yscale("log")
    ax.set_ylabel(f"{metric.name} ({metric.unit})")
    ax.set_title(f"{metric.title} by block")
    ax.legend(fontsize="small")
    return fig


def context_figure(table: pd.DataFrame) -> Figure:
    """Return one panel per source context: share of guesses of its most likely next symbol, by group and block.

    The dashed line is the source's probability of that symbol (where
    probability matching would put the share); 1 is always guessing it.
    Where two symbols tie as most likely, the first in the alphabet is shown.
    Up to four panels per row.

    Parameters
    ----------
    table : pandas.DataFrame
        The groups step's ``context_learning`` table (not empty).

    Returns
    -------
    matplotlib.figure.Figure
    """
    best = table[table["source_prob"] >= table.groupby("context")["source_prob"].transform("max") - 1e-12]
    best = best.drop_duplicates(["group", "session", "block", "context"])
    contexts = list(dict.fromkeys(best["context"]))
    units = _unit_order(best)
    index = {u: i for i, u in enumerate(units)}
    columns = min(len(contexts), 4)
    rows = -(-len(contexts) // columns)
    fig = Figure(figsize=(columns * max(3.6, 0.3 * len(units) + 2.4), rows * 3.2), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, columns, squeeze=False).ravel()
    for ax in axes[len(contexts):]:
        ax.set_visible(False)
    for ax, context in zip(axes, contexts):
        part = best[best["context"] == context]
        for i, (group, rows) in enumerate(part.groupby("group", sort=True)):
            x = np.array([index[(s, b)] for s, b in zip(rows["session"], rows["block"])])
            order = np.argsort(x)
            ax.plot(x[order], rows["guess_share"].to_numpy()[order], marker="o", color=colour(i), label=group)
        ax.axhline(part["source_prob"].iat[0], color="0.4", linestyle="--", linewidth=1,
                   label="source probability")
        ax.set_ylim(-0.02, 1.02)
        _unit_ticks(ax, units)
        ax.set_ylabel(f"share of guesses of '{part['symbol'].iat[0]}'")
        ax.set_title(f"after {context}")
    if contexts:
        axes[0].legend(fontsize="small")
    fig.suptitle("Guesses of the most likely next symbol, by context")
    return fig
