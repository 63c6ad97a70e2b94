"""The figures the report draws from the fit tables: per-block winners and context trees."""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from matplotlib import colormaps
from matplotlib.cm import ScalarMappable
from matplotlib.colors import ListedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from foretell.labels import ALL, ROOT
from foretell.plots.common import HEATMAP, colour, new_figure, plain_log_ticks, text_colour
from foretell.text import number

STRENGTH_SHORT = {"bare-mention": "bare", "positive": "pos.", "strong": "strong", "very-strong": "v. strong"}
"""Cell text of each Kass-Raftery strength grade in the winners heatmap."""

PAGE_WIDTH = 7.4
"""Inches of the widest report figure: at 150 dpi it is shown at its natural size in the report's column."""

GRADED = ("positive", "strong", "very-strong")
"""Strength grades that name a winner (Kass & Raftery, 1995: more than a bare mention)."""


def winners_heatmap(winners: pd.DataFrame) -> Figure:
    """Return the participant x block heatmap of best models (colour) annotated with the Kass-Raftery strength.

    Parameters
    ----------
    winners : pandas.DataFrame
        The winners table of the fits (participant, group, session, block,
        best_model, strength; block ``all`` is the whole session, drawn last).

    Returns
    -------
    matplotlib.figure.Figure
        One row per participant, grouped by group (a line and the group's
        name between groups), one column per block, the whole session set
        apart by a gap. A cell is coloured by its best model only when the
        lead is at least positive (:data:`GRADED`, Kass & Raftery, 1995);
        a bare lead or no winner is grey. Grades shortened by :data:`STRENGTH_SHORT`.
    """
    table = winners.assign(unit=_unit_labels(winners))
    units = list(dict.fromkeys(u for u in table["unit"] if u != "whole session")) + ["whole session"]
    groups = table["group"].astype(str) if "group" in table.columns else pd.Series("", index=table.index)
    order = table.assign(_group=groups).drop_duplicates("participant")[["participant", "_group"]]
    order = order.sort_values("_group", kind="stable")
    people, member = list(order["participant"]), list(order["_group"])
    named = table[table["strength"].isin(GRADED)]
    models = sorted(named["best_model"].dropna().unique())
    code = {m: i for i, m in enumerate(models)}
    grid = np.full((len(people), len(units)), np.nan)
    text = np.full(grid.shape, "n/a", dtype=object)
    for row in table.itertuples(index=False):
        i, j = people.index(row.participant), units.index(row.unit)
        if isinstance(row.best_model, str):
            text[i, j] = STRENGTH_SHORT.get(str(row.strength), str(row.strength))
            if row.strength in GRADED:
                grid[i, j] = code[row.best_model]
    fig, (ax,) = new_figure(width=min(PAGE_WIDTH, max(4.5, 0.8 * len(units) + 3.2)),
                            height=max(2.8, 0.3 * len(people) + 1.8))
    palette = ListedColormap([colour(i) for i in range(max(len(models), 1))]).with_extremes(bad="0.85")
    ax.imshow(np.ma.masked_invalid(grid), cmap=palette, vmin=-0.5, vmax=max(len(models), 1) - 0.5,
              aspect="auto", interpolation="nearest")
    for (i, j), label in np.ndenumerate(text):
        shade = colour(int(grid[i, j])) if np.isfinite(grid[i, j]) else "#D9D9D9"
        ax.text(j, i, label, ha="center", va="center", fontsize=7.5, color=text_colour(shade))
    ax.axvline(len(units) - 1.5, color="white", linewidth=6)
    for i in range(1, len(people)):
        if member[i] != member[i - 1]:
            ax.axhline(i - 0.5, color="black", linewidth=1.5)
    for name in dict.fromkeys(member):
        rows = [i for i, g in enumerate(member) if g == name]
        if name:
            ax.text(len(units) - 0.4, float(np.mean(rows)), name, rotation=-90, ha="left", va="center", fontsize=9)
    ax.set_xticks(range(len(units)), units, rotation=30, ha="right")
    ax.set_yticks(range(len(people)), people)
    ax.set_xlabel("block")
    ax.set_ylabel("participant")
    ax.set_title("Best model per participant and block")
    ax.legend(handles=[Patch(color=colour(code[m]), label=m) for m in models]
              + [Patch(color="#D9D9D9", label="no winner")], title="best model",
              fontsize=8, title_fontsize=9, loc="upper left", bbox_to_anchor=(1.08, 1.0))
    return fig


def _unit_labels(table: pd.DataFrame) -> list[str]:
    """Return each row's block label: "whole session" for block all, "session:block" when sessions differ."""
    sessions = set(table.loc[table["block"] != ALL, "session"])
    return ["whole session" if b == ALL else (str(b) if len(sessions) <= 1 else f"{s}:{b}")
            for s, b in zip(table["session"], table["block"])]


def tree_figure(contexts: Sequence[str], shares: Mapping[str, object], *, title: str,
                probs: Mapping[str, str] | None = None) -> Figure:
    """Return a node-link drawing of the context tree whose leaves are ``contexts``, sized for the page.

    Parameters
    ----------
    contexts : sequence of str
        The leaves, labels oldest first joined by '-'; the root is '*'.
    shares : mapping of str to row
        Per leaf, a row with ``distinguished``, ``merged``, ``split_deeper``
        and optionally ``model_*`` shares; empty to draw the bare tree.
    title : str
        The figure's title.
    probs : mapping of str to str, optional
        Per leaf, its next-symbol probabilities in words, written under it.

    Returns
    -------
    matplotlib.figure.Figure
        Root '*' at the top; a child prepends an older symbol. Each node is
        labelled beside it, one symbol per line (oldest first), on a white
        ground that no edge crosses. A leaf with shares is coloured by the
        share of participants that distinguish it (cividis) and annotated
        "D / M / S" (the winning models' shares are in the report's table). At most
        :data:`PAGE_WIDTH` inches wide.
    """
    leaves = [tuple(c.split("-")) if c != ROOT else () for c in contexts]
    nodes = {leaf[i:] for leaf in leaves for i in range(len(leaf) + 1)}
    children: dict[tuple[str, ...], list[tuple[str, ...]]] = {}
    for node in sorted(nodes, key=lambda n: (len(n), n)):
        if node:
            children.setdefault(node[1:], []).append(node)
    position: dict[tuple[str, ...], float] = {}

    def place(node: tuple[str, ...], start: float) -> float:
        kids = children.get(node, [])
        if not kids:
            position[node] = start
            return start + 1.0
        for kid in kids:
            start = place(kid, start)
        position[node] = float(np.mean([position[k] for k in kids]))
        return start

    width = place((), 0.0)
    depth = max((len(n) for n in nodes), default=0)
    notes = bool(shares) or bool(probs)
    fig, (ax,) = new_figure(width=min(PAGE_WIDTH, max(4.0, 1.1 * width + 1.5)),
                            height=(1.6 if notes else 1.2) * depth + 1.6)
    cmap = colormaps[HEATMAP]
    for node in nodes:
        for kid in children.get(node, []):
            ax.plot([position[node], position[kid]], [-len(node), -len(kid)], color="0.6", linewidth=1, zorder=1)
    ground = {"facecolor": "white", "edgecolor": "none", "pad": 0.6}
    for node in nodes:
        label = "-".join(node) if node else ROOT
        row = shares.get(label)
        face = "white" if row is None else cmap(float(getattr(row, "distinguished")))
        ax.scatter([position[node]], [-len(node)], s=160, color=face, edgecolors="black", zorder=2)
        ax.text(position[node] + 0.09, -len(node) + 0.06, "\n".join(node) if node else ROOT, ha="left",
                va="bottom", fontsize=9, zorder=3, bbox=ground, linespacing=1.0)
        below = [text for text in ((probs or {}).get(label), None if row is None else _leaf_text(row)) if text]
        if below:
            ax.text(position[node], -len(node) - 0.12, "\n".join(below), ha="center", va="top", fontsize=9,
                    zorder=3, bbox=ground, linespacing=1.05)
    ax.set_xlim(-0.6, width - 0.2)
    ax.set_ylim(-depth - (1.0 if notes else 0.4), 0.9)
    ax.set_yticks([-d for d in range(depth + 1)], [str(d) for d in range(depth + 1)])
    ax.set_ylabel("symbols back")
    ax.set_xticks([])
    for side in ("top", "right", "bottom"):
        ax.spines[side].set_visible(False)
    ax.set_title(title)
    if shares:
        fig.colorbar(ScalarMappable(Normalize(0, 1), cmap), ax=ax, label="share distinguishing it")
    return fig


def _leaf_text(row: object) -> str:
    """Return "D 0.43\nM 0.57\nS 0.00": the shares of participants by status."""
    return "\n".join(f"{short} {number(float(getattr(row, key)), '.2f')}"
                     for short, key in (("D", "distinguished"), ("M", "merged"), ("S", "split_deeper")))


def parameters_figure(fits: pd.DataFrame, winners: pd.DataFrame) -> Figure:
    """Return each participant's fitted choice parameters under their own best model, by group.

    Parameters
    ----------
    fits : pandas.DataFrame
        The fits table (participant, group, model, inv_temp, lapse, at_bound).
    winners : pandas.DataFrame
        The winners table: each participant's whole-session best model
        picks the fit shown (participants without one are left out).

    Returns
    -------
    matplotlib.figure.Figure
        One panel per parameter (inverse temperature on a log axis with
        plain ticks, lapse); one dot per participant, groups side by side in
        their colours with their median as a bar; a hollow dot is a value at
        a fit bound (a limit of what the data tell, not an estimate).
    """
    best = winners[(winners["block"] == ALL) & winners["best_model"].notna()][["participant", "best_model"]]
    shown = fits.merge(best.rename(columns={"best_model": "model"}), on=["participant", "model"])
    groups = sorted(shown["group"].astype(str).unique())
    fig, axes = new_figure(2, width=3.4, height=3.4)
    for ax, name, label in zip(axes, ("inv_temp", "lapse"), ("inverse temperature", "lapse rate")):
        for i, group in enumerate(groups):
            part = shown[shown["group"].astype(str) == group]
            values = part[name].to_numpy(dtype=float)
            at = part["at_bound"].fillna("").astype(str).str.contains(name).to_numpy()
            x = i + np.linspace(-0.25, 0.25, len(values)) if len(values) > 1 else np.full(len(values), float(i))
            ax.scatter(x[~at], values[~at], s=16, color=colour(i))
            ax.scatter(x[at], values[at], s=16, facecolors="none", edgecolors=colour(i))
            if len(values):
                ax.hlines(np.median(values), i - 0.35, i + 0.35, color="black", linewidth=1.5)
        ax.set_xticks(range(len(groups)), groups)
        ax.set_xlim(-0.6, len(groups) - 0.4)
        ax.set_title(label)
        if name == "inv_temp":
            ax.set_yscale("log")
            plain_log_ticks(ax.yaxis, *ax.get_ylim())
    axes[0].set_ylabel("value under the participant's best model")
    fig.suptitle("Fitted choice parameters (bar: group median; hollow: at a bound)", fontsize=10)
    return fig
