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
from foretell.plots.common import HEATMAP, colour, new_figure, text_colour
from foretell.text import number

STRENGTH_SHORT = {"bare-mention": "bare", "positive": "pos.", "strong": "strong", "very-strong": "v. strong"}
"""Cell text of each Kass-Raftery strength grade in the winners heatmap."""


def winners_heatmap(winners: pd.DataFrame) -> Figure:
    """Return the participant x block heatmap of best models (colour) annotated with the Kass-Raftery strength.

    Parameters
    ----------
    winners : pandas.DataFrame
        The winners table of the fits (participant, session, block,
        best_model, strength; block ``all`` is the whole session, drawn last).

    Returns
    -------
    matplotlib.figure.Figure
        One row per participant, one column per block; grey where no model
        won. Strength grades after Kass & Raftery (1995), shortened by
        :data:`STRENGTH_SHORT`.
    """
    table = winners.assign(unit=_unit_labels(winners))
    units = list(dict.fromkeys(u for u in table["unit"] if u != "whole session")) + ["whole session"]
    people = list(dict.fromkeys(table["participant"]))
    models = sorted(table["best_model"].dropna().unique())
    code = {m: i for i, m in enumerate(models)}
    grid = np.full((len(people), len(units)), np.nan)
    text = np.full(grid.shape, "n/a", dtype=object)
    for row in table.itertuples(index=False):
        i, j = people.index(row.participant), units.index(row.unit)
        if isinstance(row.best_model, str):
            grid[i, j] = code[row.best_model]
            text[i, j] = STRENGTH_SHORT.get(str(row.strength), str(row.strength))
    fig, (ax,) = new_figure(width=max(4.5, 0.9 * len(units) + 3.0), height=max(2.8, 0.32 * len(people) + 1.6))
    palette = ListedColormap([colour(i) for i in range(max(len(models), 1))]).with_extremes(bad="0.85")
    ax.imshow(np.ma.masked_invalid(grid), cmap=palette, vmin=-0.5, vmax=max(len(models), 1) - 0.5,
              aspect="auto", interpolation="nearest")
    for (i, j), label in np.ndenumerate(text):
        shade = colour(int(grid[i, j])) if np.isfinite(grid[i, j]) else "#D9D9D9"
        ax.text(j, i, label, ha="center", va="center", fontsize="x-small", color=text_colour(shade))
    ax.set_xticks(range(len(units)), units, rotation=30, ha="right")
    ax.set_yticks(range(len(people)), people)
    ax.set_xlabel("block")
    ax.set_ylabel("participant")
    ax.set_title("Best model per participant and block")
    ax.legend(handles=[Patch(color=colour(code[m]), label=m) for m in models], title="best model",
              fontsize="small", loc="upper left", bbox_to_anchor=(1.02, 1.0))
    return fig


def _unit_labels(table: pd.DataFrame) -> list[str]:
    """Return each row's block label: "whole session" for block all, "session:block" when sessions differ."""
    sessions = set(table.loc[table["block"] != ALL, "session"])
    return ["whole session" if b == ALL else (str(b) if len(sessions) <= 1 else f"{s}:{b}")
            for s, b in zip(table["session"], table["block"])]


def tree_figure(contexts: Sequence[str], shares: Mapping[str, object], *, title: str) -> Figure:
    """Return a node-link drawing of the context tree whose leaves are ``contexts``.

    Parameters
    ----------
    contexts : sequence of str
        The leaves, labels oldest first joined by '-'; the root is '*'.
    shares : mapping of str to row
        Per leaf, a row with ``distinguished``, ``merged``, ``split_deeper``
        and optionally ``model_*`` shares; empty to draw the bare tree.
    title : str
        The figure's title.

    Returns
    -------
    matplotlib.figure.Figure
        Root '*' at the top; a child prepends an older symbol. A leaf with
        shares is coloured by the share of participants that distinguish it
        (cividis) and annotated "D / M / S" with the winning models' shares in
        brackets.
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
    fig, (ax,) = new_figure(width=max(4.0, 2.3 * width), height=1.5 * depth + 2.2)
    cmap = colormaps[HEATMAP]
    for node in nodes:
        for kid in children.get(node, []):
            ax.plot([position[node], position[kid]], [-len(node), -len(kid)], color="0.5", linewidth=1, zorder=1)
            ax.text((position[node] + position[kid]) / 2, -(len(node) + len(kid)) / 2, f" {kid[0]}",
                    fontsize="small", color="0.35", ha="left", va="center")
    for node in nodes:
        label = "-".join(node) if node else ROOT
        row = shares.get(label)
        face = "white" if row is None else cmap(float(getattr(row, "distinguished")))
        ax.scatter([position[node]], [-len(node)], s=420, color=face, edgecolors="black", zorder=2)
        ax.text(position[node], -len(node) + 0.28, label, ha="center", va="bottom", fontsize="small")
        if row is not None:
            ax.text(position[node], -len(node) - 0.28, _leaf_text(row), ha="center", va="top", fontsize="x-small")
    ax.set_xlim(-0.8, width - 0.2)
    ax.set_ylim(-depth - 1.1, 0.8)
    ax.set_yticks([-d for d in range(depth + 1)], [str(d) for d in range(depth + 1)])
    ax.set_ylabel("context length (symbols back)")
    ax.set_xticks([])
    for side in ("top", "right", "bottom"):
        ax.spines[side].set_visible(False)
    ax.set_title(title)
    if shares:
        fig.colorbar(ScalarMappable(Normalize(0, 1), cmap), ax=ax,
                     label="share of participants distinguishing it")
    return fig


def _leaf_text(row: object) -> str:
    parts = []
    for short, key in (("D", "distinguished"), ("M", "merged"), ("S", "split_deeper")):
        text = f"{short} {number(float(getattr(row, key)), '.2f')}"
        model = getattr(row, f"model_{key}", None)
        if model is not None and not pd.isna(model):
            text += f" ({number(float(model), '.2f')})"
        parts.append(text)
    return "\n".join(parts)
