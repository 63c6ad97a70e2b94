"""Figures of foretell's tables: small helpers that return matplotlib Figures (Agg canvas, no display).

Figures are made with :class:`matplotlib.figure.Figure` on an Agg canvas, never
through pyplot, so nothing opens a window or touches global state; the caller
saves them (``fig.savefig(path)``). Categorical colours are the Okabe-Ito
palette, safe for the common colour-vision deficiencies (Okabe & Ito, 2008,
"Color Universal Design"); heatmaps use the perceptually uniform, colour-blind
safe "cividis" map (Nunez, Anderton & Renslow, 2018).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from foretell.params import PARAMS

OKABE_ITO = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000")
"""The Okabe-Ito palette: orange, sky blue, bluish green, yellow, blue, vermillion, reddish purple, black."""
HEATMAP = "cividis"

UNITS = {name: p.unit for name, p in PARAMS.items()}
"""Axis wording of each parameter's unit (from :data:`foretell.params.PARAMS`)."""


def figure_png(fig: Figure, dpi: int = 150) -> bytes:
    """Return the figure as PNG bytes (for result folders and the report)."""
    import io

    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi)
    return buffer.getvalue()


def new_figure(n_panels: int = 1, *, width: float = 4.2, height: float = 3.6) -> tuple[Figure, list]:
    """Return a Figure on an Agg canvas and its ``n_panels`` axes side by side."""
    fig = Figure(figsize=(width * n_panels, height), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, n_panels, squeeze=False)[0]
    return fig, list(axes)


def colour(i: int) -> str:
    """Return the i-th colour: the Okabe-Ito palette, then its tints (halfway to white), then cycling.

    Sixteen colours that stay apart; beyond them colours repeat, so a figure
    with more categories should also label them in place.
    """
    base = OKABE_ITO[i % len(OKABE_ITO)]
    if (i // len(OKABE_ITO)) % 2 == 0:
        return base
    rgb = [int(base[k:k + 2], 16) for k in (1, 3, 5)]
    return "#" + "".join(f"{(c + 255) // 2:02X}" for c in rgb)


def text_colour(background: str) -> str:
    """Return black or white, whichever reads better on ``background`` (relative luminance, WCAG 2.0)."""
    def linear(c: float) -> float:
        return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4

    r, g, b = (linear(int(background[k:k + 2], 16) / 255) for k in (1, 3, 5))
    luminance = 0.2126 * r + 0.7152 * g + 0.0722 * b
    return "black" if (luminance + 0.05) / 0.05 >= 1.05 / (luminance + 0.05) else "white"


def axis_label(name: str, what: str = "") -> str:
    """Return an axis label such as 'true lapse (share of guesses)'."""
    unit = UNITS.get(name)
    return f"{what} {name}".strip() + (f" ({unit})" if unit else "")


def log_axes(ax) -> None:
    """Put both axes of ``ax`` on a log scale with plain-number ticks (1, 2, 5 per decade over short spans)."""
    plain = FuncFormatter(lambda v, _: f"{v:g}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.autoscale_view()
    for axis, (lo, hi) in ((ax.xaxis, ax.get_xlim()), (ax.yaxis, ax.get_ylim())):
        subs = (1.0, 2.0, 5.0) if hi < 100 * lo else (1.0,)
        axis.set_major_locator(LogLocator(base=10, subs=subs))
        axis.set_major_formatter(plain)
        axis.set_minor_formatter(NullFormatter())


def dodge(values: pd.Series, i: int, n: int, width: float = 0.03) -> np.ndarray:
    """Return ``values`` shifted by series i of n (a share ``width`` of their span), so lines do not hide each other."""
    span = float(np.ptp(values)) or float(np.abs(values).max()) or 1.0
    return values.to_numpy(float) + (i - (n - 1) / 2) * width * span / max(n, 1)


def confusion_heatmap(table: pd.DataFrame, *, title: str, row: str = "generating_model",
                      column: str = "fitted_model", value: str = "fraction") -> Figure:
    """Return a heatmap of ``value`` (0-1) by ``row`` x ``column`` with the value written in each cell."""
    rows = list(dict.fromkeys(table[row]))
    cols = list(dict.fromkeys(table[column]))
    wide = table.pivot_table(index=row, columns=column, values=value, aggfunc="first") \
        .reindex(index=rows, columns=cols)
    size = max(3.6, 0.8 * len(cols) + 2.0)
    fig, (ax,) = new_figure(width=size + 1.0, height=max(3.2, 0.7 * len(rows) + 1.8))
    image = ax.imshow(wide.to_numpy(float), cmap=HEATMAP, vmin=0.0, vmax=1.0, aspect="auto")
    for (i, j), v in np.ndenumerate(wide.to_numpy(float)):
        text = "n/a" if np.isnan(v) else f"{v:.2f}"
        ax.text(j, i, text, ha="center", va="center", color="black" if (np.isnan(v) or v > 0.6) else "white")
    ax.set_xticks(range(len(cols)), cols, rotation=30, ha="right")
    ax.set_yticks(range(len(rows)), rows)
    ax.set_xlabel(column.replace("_", " "))
    ax.set_ylabel(row.replace("_", " "))
    ax.set_title(title)
    fig.colorbar(image, ax=ax, label=f"{value} of participants")
    return fig


def true_vs_fitted(params: pd.DataFrame, *, title: str) -> Figure:
    """Return one scatter panel per parameter: fitted against true value, one colour per model.

    ``params`` has model, parameter, true, fitted (and optionally converged:
    only converged fits are drawn). Log-scale parameters (:data:`PARAMS`) use
    log axes. The grey line is fitted = true.
    """
    if "converged" in params.columns:
        params = params[params["converged"].astype(bool)]
    names = list(dict.fromkeys(params["parameter"]))
    models = list(dict.fromkeys(params["model"]))
    fig, axes = new_figure(max(1, len(names)))
    for ax, name in zip(axes, names):
        part = params[params["parameter"] == name]
        for i, model in enumerate(models):
            sub = part[part["model"] == model]
            if len(sub):
                ax.scatter(sub["true"], sub["fitted"], s=14, alpha=0.8, color=colour(i), label=model)
        values = part[["true", "fitted"]].to_numpy(float)
        values = values[np.isfinite(values) & (values > 0 if PARAMS[name].log_scale else True)]
        if values.size:
            lo, hi = values.min(), values.max()
            ax.plot([lo, hi], [lo, hi], color="0.5", linewidth=1, zorder=0)
        if PARAMS[name].log_scale:
            log_axes(ax)
        ax.set_xlabel(axis_label(name, "true"))
        ax.set_ylabel(axis_label(name, "fitted"))
        ax.set_title(name)
    if models and names:
        axes[0].legend(title="generating model", fontsize="small")
    fig.suptitle(title)
    return fig


def recovery_by_trials(confusion: pd.DataFrame, summary: pd.DataFrame, target_diagonal: float,
                       target_spearman: float, ci_level: float = 0.95) -> Figure:
    """Return two panels against trials per participant: each model's recovery fraction, each parameter's rho.

    Left: the confusion diagonal (share of a model's participants best fitted
    by it) with its ``ci_level`` interval; right: Spearman's rho of true and fitted values.
    Dashed lines mark the design check's thresholds.
    """
    fig, (left, right) = new_figure(2, width=4.8)
    diag = confusion[confusion["generating_model"] == confusion["fitted_model"]]
    models = list(dict.fromkeys(diag["generating_model"]))
    for i, model in enumerate(models):
        part = diag[diag["generating_model"] == model].sort_values("trials")
        err = np.vstack([part["fraction"] - part["ci_low"], part["ci_high"] - part["fraction"]])
        left.errorbar(dodge(part["trials"], i, len(models)), part["fraction"], yerr=err, marker="o",
                      capsize=3, color=colour(i), label=model)
    _threshold(left, target_diagonal)
    left.set_ylim(-0.02, 1.02)
    left.set_xlabel("trials per participant")
    left.set_ylabel(f"share of participants recovered ({ci_level:.0%} CI)")
    left.set_title("Model recovery")
    left.legend(title="generating model", fontsize="small", loc="lower right")
    pairs = list(summary.groupby(["model", "parameter"], sort=False))
    for k, ((model, name), part) in enumerate(pairs):
        part = part.sort_values("trials")
        i = models.index(model) if model in models else k
        right.plot(dodge(part["trials"], k, len(pairs)), part["spearman"], marker="o", color=colour(i),
                   linestyle=_dashes(name), label=f"{name} of {model}")
    _threshold(right, target_spearman)
    right.set_ylim(-1.02, 1.02)
    right.set_xlabel("trials per participant")
    right.set_ylabel("Spearman's rho, true vs fitted")
    right.set_title("Parameter recovery")
    right.legend(fontsize="small", loc="upper left", bbox_to_anchor=(1.02, 1.0))
    for ax in (left, right):
        ax.set_xticks(sorted(confusion["trials"].unique()))
    return fig


def _threshold(ax, value: float) -> None:
    """Draw the dashed line of a design-check threshold."""
    ax.axhline(value, color="0.4", linestyle="--", linewidth=1, label=f"check threshold {value:g}")


def _dashes(name: str, styles: Sequence[str] = ("-", "--", ":", "-.")) -> str:
    """Return a line style per parameter name, so parameters differ without colour."""
    return styles[list(PARAMS).index(name) % len(styles)] if name in PARAMS else "-"
