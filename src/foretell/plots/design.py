"""Figures of the design check: confusion, true against fitted parameters, recovery and RT power by trial count."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from foretell.params import PARAMS
from foretell.plots.common import HEATMAP, colour, log_axes, new_figure


def axis_label(name: str, what: str = "") -> str:
    """Return an axis label such as 'true lapse (share of guesses)'.

    Parameters
    ----------
    name : str
        A parameter (its unit from :data:`foretell.params.PARAMS`) or any label.
    what : str
        A word before the name.

    Returns
    -------
    str
    """
    unit = PARAMS[name].unit if name in PARAMS else None
    return f"{what} {name}".strip() + (f" ({unit})" if unit else "")


def dodge(values: pd.Series, i: int, n: int, width: float = 0.03) -> np.ndarray:
    """Return ``values`` shifted for series i of n, so that lines do not hide each other.

    Parameters
    ----------
    values : pandas.Series
    i, n : int
        The series and the number of series.
    width : float, default 0.03
        The shift between neighbouring series, as a share of the values' span.

    Returns
    -------
    numpy.ndarray
    """
    span = float(np.ptp(values)) or float(np.abs(values).max()) or 1.0
    return values.to_numpy(float) + (i - (n - 1) / 2) * width * span / max(n, 1)


def confusion_heatmap(table: pd.DataFrame, *, title: str, row: str = "generating_model",
                      column: str = "fitted_model", value: str = "fraction") -> Figure:
    """Return a heatmap of ``value`` (0-1) by ``row`` x ``column`` with the value written in each cell.

    Parameters
    ----------
    table : pandas.DataFrame
        One trial count's rows of the confusion (or inversion) table.
    title : str
    row, column, value : str
        The columns of the table drawn.

    Returns
    -------
    matplotlib.figure.Figure
    """
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

    Parameters
    ----------
    params : pandas.DataFrame
        model, parameter, true, fitted (and optionally converged: only
        converged fits are drawn).
    title : str

    Returns
    -------
    matplotlib.figure.Figure
        Log-scale parameters (:data:`foretell.params.PARAMS`) use log axes;
        the grey line is fitted = true.
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

    Parameters
    ----------
    confusion, summary : pandas.DataFrame
        The confusion table and the parameter summary of a design check.
    target_diagonal, target_spearman : float
        The check's thresholds, drawn as dashed lines.
    ci_level : float, default 0.95
        The level of the confusion's intervals (axis label).

    Returns
    -------
    matplotlib.figure.Figure
        Left: the confusion diagonal (share of a model's participants best
        fitted by it) with its interval; right: Spearman's rho of true and
        fitted values.
    """
    fig, (left, right) = new_figure(2, width=4.8)
    diag = confusion[confusion["generating_model"] == confusion["fitted_model"]]
    models = list(dict.fromkeys(diag["generating_model"]))
    for i, model in enumerate(models):
        part = diag[diag["generating_model"] == model].sort_values("trials")
        err = np.vstack([part["fraction"] - part["ci95_low"], part["ci95_high"] - part["fraction"]])
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


def rt_power_figure(rates: pd.DataFrame, target_power: float, false_positive_level: float,
                    ci_level: float = 0.95) -> Figure:
    """Return two panels against trials per participant: each learner's power, each null's false-positive share.

    Parameters
    ----------
    rates : pandas.DataFrame
        The RT design check's ``rt_rates`` table (trials, generating, rate,
        share, ci95_low, ci95_high).
    target_power, false_positive_level : float
        The check's criteria, drawn as dashed lines.
    ci_level : float, default 0.95
        The level of the intervals (axis labels).

    Returns
    -------
    matplotlib.figure.Figure
        Left: the share of a learner's datasets in which the RT analysis
        calls it; right: the share of a null's datasets in which it calls
        any learner; each with its interval.
    """
    fig, axes = new_figure(2, width=4.8)
    panels = (("power", target_power, "share of datasets calling the generating learner", "Power"),
              ("false positive", false_positive_level, "share of null datasets calling a learner",
               "False positives"))
    for ax, (rate, value, label, title) in zip(axes, panels):
        rows = rates[rates["rate"] == rate]
        names = list(dict.fromkeys(rows["generating"]))
        for i, name in enumerate(names):
            part = rows[rows["generating"] == name].sort_values("trials")
            err = np.vstack([part["share"] - part["ci95_low"], part["ci95_high"] - part["share"]])
            ax.errorbar(dodge(part["trials"], i, len(names)), part["share"], yerr=err, marker="o", capsize=3,
                        color=colour(i), label=name)
        _threshold(ax, value)
        ax.set_ylim(-0.02, 1.02)
        ax.set_xticks(sorted(rates["trials"].unique()))
        ax.set_xlabel("trials per participant")
        ax.set_ylabel(f"{label} ({ci_level:.0%} CI)")
        ax.set_title(title)
        ax.legend(title="generating", fontsize="small")
    return fig


def _threshold(ax, value: float) -> None:
    """Draw the dashed line of a design-check threshold."""
    ax.axhline(value, color="0.4", linestyle="--", linewidth=1, label=f"check threshold {value:g}")


def _dashes(name: str, styles: Sequence[str] = ("-", "--", ":", "-.")) -> str:
    """Return a line style per parameter name, so parameters differ without colour."""
    return styles[list(PARAMS).index(name) % len(styles)] if name in PARAMS else "-"
