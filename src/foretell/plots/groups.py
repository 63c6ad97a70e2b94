"""Figures of the groups step: learning curves by group, and guesses against the source by context."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from foretell.plots.common import colour, new_figure, plain_log_ticks
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


BOOTSTRAP_REPLICATES = 2000
"""Resamples of participants behind a curve's interval when no hierarchical model is called (common practice)."""


def curve_figure(group_curves: pd.DataFrame, metric: CurveMetric, *, curves: pd.DataFrame | None = None,
                 seed: int = 0, chance: float | None = None, ceiling: float | None = None) -> Figure:
    """Return the learning curve of one metric by group: each participant, the group mean and its interval.

    Thin lines: each participant (with ``curves``). Dots and thick line: the
    mean over the group's participants, with a band: the hierarchical
    model's :data:`foretell.stats.intervals.HDI_PROB` HDI of a typical
    participant where a model was fitted and passed the diagnostics (one
    interval per block, not adjusted for looking at many blocks), else a
    95% percentile bootstrap over participants (:data:`BOOTSTRAP_REPLICATES`
    resamples; Efron & Tibshirani, 1993); the legend says which. Rates run
    from 0 to 1 (no cut axis), reaction times are in ms, log scales have
    plain ticks.

    Parameters
    ----------
    group_curves : pandas.DataFrame
        The groups step's ``group_curves`` table.
    metric : CurveMetric
        The metric drawn (its name, title, unit and whether it is on a log scale).
    curves : pandas.DataFrame, optional
        The groups step's ``curves`` table (participant values); without it,
        no participant lines and no bootstrap band.
    seed : int, default 0
        The bootstrap's stream: ``child_rng(seed, "curve", metric, group)``.
    chance, ceiling : float, optional
        Dashed reference lines in the metric's unit: chance guessing, and the
        best the source allows.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from foretell.summaries import METRIC_WORDS
    from foretell.validation import child_rng

    scale = 1000.0 if metric.unit == "seconds" else 1.0
    rows = group_curves[group_curves["metric"] == metric.name]
    units = _unit_order(rows)
    index = {u: i for i, u in enumerate(units)}
    fig, (ax,) = new_figure(width=max(6.4, 0.45 * len(units) + 3.0), height=5.0)
    mine = None if curves is None else curves[curves["metric"] == metric.name]
    for i, (group, part) in enumerate(rows.groupby("group", sort=True)):
        x = np.array([index[(s, b)] for s, b in zip(part["session"], part["block"])])
        order = np.argsort(x)
        x, part = x[order], part.iloc[order]
        values = None if mine is None else _participant_grid(mine[mine["group"] == group], units)
        if values is not None:
            ax.plot(np.arange(len(units)), values.T * scale, color=colour(i), linewidth=0.5, alpha=0.35)
        fitted = part["mean"].notna().to_numpy()
        ax.plot(x, part["participant_mean"] * scale, marker="o", linewidth=2.0, color=colour(i),
                label=f"{group}: mean of participants")
        if fitted.any():
            ax.fill_between(x[fitted], part["hdi95_low"][fitted] * scale, part["hdi95_high"][fitted] * scale,
                            color=colour(i), alpha=0.25, linewidth=0,
                            label=f"{group}: model, {HDI_PROB:.0%} HDI per block (unadjusted)")
        elif values is not None and len(values) > 1:
            low, high = _bootstrap_band(values, child_rng(seed, "curve", metric.name, str(group)))
            ax.fill_between(np.arange(len(units)), low * scale, high * scale, color=colour(i), alpha=0.25,
                            linewidth=0, label=f"{group}: 95% bootstrap interval over participants")
    for value, words in ((chance, "chance"), (ceiling, "source's ceiling")):
        if value is not None and np.isfinite(value):
            ax.axhline(value * scale, color="0.35", linestyle="--", linewidth=1)
            ax.annotate(words, (1.0, value * scale), xycoords=("axes fraction", "data"), ha="right",
                        va="top" if value == ceiling else "bottom", fontsize=9, color="0.35")
    _unit_ticks(ax, units)
    unit = "ms" if scale != 1.0 else metric.unit
    if metric.unit.startswith("share of"):
        ax.set_ylim(0, 1.02)
    if metric.log:
        ax.set_yscale("log")
        plain_log_ticks(ax.yaxis, *ax.get_ylim())
    ax.set_ylabel(f"{METRIC_WORDS.get(metric.name, metric.title)} ({unit})")
    ax.set_title(f"{metric.title} by block")
    fig.legend(*ax.get_legend_handles_labels(), fontsize=8, loc="outside lower center", ncols=1, frameon=False)
    return fig


def _participant_grid(values: pd.DataFrame, units: Sequence[tuple[str, str]]) -> np.ndarray | None:
    """Return participants x units of the metric's values (NaN where a participant has none), or None."""
    if values.empty:
        return None
    grid = values.pivot_table(index="participant", columns=["session", "block"], values="value", aggfunc="first")
    return grid.reindex(columns=pd.MultiIndex.from_tuples(list(units))).to_numpy(dtype=float)


def _bootstrap_band(values: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Return the 95% percentile bootstrap interval of the mean over participants (rows), per unit (column)."""
    draws = rng.integers(0, len(values), size=(BOOTSTRAP_REPLICATES, len(values)))
    with np.errstate(all="ignore"):
        means = np.nanmean(values[draws], axis=1)
    return np.nanpercentile(means, 2.5, axis=0), np.nanpercentile(means, 97.5, axis=0)


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
