"""Plain-words summaries for the console: model comparison, optimiser convergence, parameters at bounds.

Every word is backed by a named criterion (:func:`verdict`); a participant's
own win is graded after Kass & Raftery (1995).
"""

from __future__ import annotations

import math
import re
import textwrap
from typing import Sequence

import pandas as pd

from .labels import ALL, block_label
from .models import lookalike_note
from .params import PARAMS
from .text import number, plural

CLEAR_PXP = 0.95
"""Protected exceedance from which a leader is called a clear winner (common practice)."""

BOR_MAX = 0.5
"""Omnibus risk above which no model is said to stand out (Rigoux et al., 2014)."""

STANDS_OUT_MARGIN = 0.1
"""A leader stands out only when its protected exceedance is at least 1/K plus this margin (and 1/2)."""

HOLM_ALPHA = 0.05
"""Family-wise level at which a Holm-corrected permutation p is counted as a difference (common practice)."""

LINE_WIDTH = 99
"""The longest console summary line: under 100 characters."""

METRIC_WORDS = {"accuracy": "accuracy", "optimal_rate": "optimal-guess rate", "gain_bits": "gain over chance",
                "inv_temp": "choice determinism", "median_rt": "median RT", "depth": "context depth",
                "rt_surprise_slope": "RT cost of surprise"}
"""Each learning-curve metric (:data:`foretell.curves.METRICS`) in a few plain words, for labels and lines."""


def p_words(p: float) -> str:
    """Return a p-value for reading: "< 0.001" below 0.001, else "= 0.012" (three decimals, two from 0.1).

    Near :data:`HOLM_ALPHA` four decimals, so that no p is rounded onto or across it.

    Parameters
    ----------
    p : float

    Returns
    -------
    str

    Examples
    --------
    >>> p_words(0.0004), p_words(0.0123), p_words(0.47), p_words(0.0496), p_words(0.0504)
    ('< 0.001', '= 0.012', '= 0.47', '= 0.0496', '= 0.0504')
    """
    if p < 0.001:
        return "< 0.001"
    digits = ".4f" if abs(p - HOLM_ALPHA) < 0.0005 else ".2f" if p >= 0.1 else ".3f"
    return f"= {number(p, digits)}"


def contrast_words(group: object, reference: object) -> str:
    """Return a group contrast as "group − reference" (a minus sign between spaces: labels may hold hyphens).

    Examples
    --------
    >>> contrast_words("sleep-restricted", "rested")
    'sleep-restricted − rested'
    """
    return f"{group} − {reference}"

_GRADED = ("positive", "strong", "very-strong")

_LEADER_WORDS = {"clear": "clear winner", "ahead": "ahead, not clear"}
"""How a leader is named, by :func:`verdict` status: the same words for the whole session and each block."""

_CRITERION_WORDS = {
    "bic": "BIC (log evidence -BIC/2)",
    "cv": "cross-validated log-likelihood (leave-one-block-out)",
}


def stands_out_at(k: int) -> float:
    """Return the protected exceedance a leader among ``k`` compared models needs to stand out.

    Parameters
    ----------
    k : int
        The models (or families) compared.

    Returns
    -------
    float
        max(1/k + :data:`STANDS_OUT_MARGIN`, 1/2). Protected exceedance is 1/k
        for every model when nothing distinguishes them, and Monte-Carlo and
        prior effects move it by a few hundredths: 0.1 above chance is the
        smallest lead worth reporting. Below 1/2 the other models together are
        more probably the most frequent than the leader is, so with many
        models 1/2 is the bar.

    Examples
    --------
    >>> stands_out_at(2), stands_out_at(10)
    (0.6, 0.5)
    """
    return max(1.0 / k + STANDS_OUT_MARGIN, 0.5)


def _against(value: float, bound: float) -> str:
    """Return a probability with enough decimals (2 to 4) that it prints neither as ``bound``, 0 nor 1 unless equal.

    Beyond that, "< 0.001" and "> 0.999": 0.99987 never reads as a misleading 1.000.
    """
    if 0 < value < 0.001:
        return "< 0.001"
    if 0.999 < value < 1:
        return "> 0.999"
    for digits in (2, 3, 4):
        text = number(value, f".{digits}f")
        if (value == bound or text != number(bound, f".{digits}f")) and (
                value in (0, 1) or float(text) not in (0, 1)):
            return text
    return text


def probability_words(value: float) -> str:
    """Return a probability for a table: two to four decimals, "< 0.001" or "> 0.999", never 0 or 1 unless exact.

    Examples
    --------
    >>> probability_words(0.99987), probability_words(0.25), probability_words(float("nan"))
    ('> 0.999', '0.25', '')
    """
    return "" if pd.isna(value) else _against(float(value), math.nan)


def _versus(value: float, side: str, bound: float) -> str:
    """Return "0.84 < 0.95": a probability beside the bar it is judged against ("> 0.999" says it alone)."""
    text = _against(value, bound)
    return text if text[0] in "<>" else f"{text} {side} {number(bound, '.2f')}"


def verdict(table: pd.DataFrame, label: str) -> tuple[str, str | None, str]:
    """Return the verdict of one comparison: whether a model (or family) stands out, and the words for it.

    Parameters
    ----------
    table : pandas.DataFrame
        One comparison's rows of a selection or families table.
    label : {"model", "family"}

    Returns
    -------
    status : str
        "none" (nothing computed), "level" (nothing stands out: the omnibus
        risk exceeds :data:`BOR_MAX`, or the leader's protected exceedance is
        below :func:`stands_out_at`), "ahead" (it stands out) or "clear" (its
        protected exceedance is also at least :data:`CLEAR_PXP`, common practice).
    leader : str or None
        The model or family that stands out.
    words : str
        The verdict in words, with the numbers and bars behind it.

    References
    ----------
    Rigoux, L. et al. (2014). Bayesian model selection for group studies -
    revisited. NeuroImage 84, 971-985 (the omnibus risk and protected exceedance).
    """
    ok = table.dropna(subset=["protected_exceedance"])
    if ok.empty:
        note = table["note"].iloc[0] if len(table) else ""
        return "none", None, f"no {label} selection ({note or 'no usable evidence'})"
    k = len(ok)
    top = ok.loc[ok["protected_exceedance"].idxmax()]
    pxp, bor, leader = float(top["protected_exceedance"]), float(top["omnibus_risk"]), str(top[label])
    if k == 1:
        return "level", None, f"only one {label} compared ({leader})"
    risk = f"omnibus risk {_against(bor, BOR_MAX)}"
    if bor > BOR_MAX:
        return "level", None, f"no {label} stands out ({risk} > {number(BOR_MAX, '.2f')})"
    bar = stands_out_at(k)
    if pxp < bar:
        compared = plural(k, label, "families" if label == "family" else None)
        return "level", None, (f"no {label} stands out (highest protected exceedance "
                               f"{_versus(pxp, '<', bar)} with {compared}; {risk})")
    status, side = ("clear", ">=") if pxp >= CLEAR_PXP else ("ahead", "<")
    compared = plural(k, label, "families" if label == "family" else None)
    ahead = "" if status == "clear" else f", ahead from {number(bar, '.2f')} with {compared}"
    return status, leader, (f"{_LEADER_WORDS[status]}: {leader} (protected exceedance "
                            f"{_versus(pxp, side, CLEAR_PXP)}{ahead}; {risk})")


def _block_lines(table: pd.DataFrame, group: str, label: str) -> list[str]:
    """Return one line per block: "block 1: ahead, not clear: count-0 (protected exceedance 0.81 < 0.95; ...)".

    Each block is judged by :func:`verdict`, the rule of the whole session,
    and worded with its words; none without blocks.
    """
    mine = table[table["group"] == group]
    keys = [k for k in ("session", "block") if k in mine.columns
            and (k == "block" or mine[k].nunique() > 1)]
    out = []
    for labels, unit in (mine.groupby(keys, sort=False) if len(mine) else ()):
        labels = labels if isinstance(labels, tuple) else (labels,)
        where = " ".join(f"{k} {block_label(v)}" for k, v in zip(keys, labels))
        status, _, words = verdict(unit, label)
        out.append(f"{where}: {'not computed' if status == 'none' else words}")
    return out


def _own_winners(winners: pd.DataFrame, group: str) -> str | None:
    """Return the line on participants' own whole-session winners in ``group``."""
    mine = winners if group == ALL else winners[winners["group"].astype("string") == group]
    whole = mine[(mine["block"] == ALL) & mine["best_model"].notna()]
    if whole.empty:
        return None
    tally = whole["best_model"].value_counts(sort=True)
    graded = int(whole["strength"].isin(_GRADED).sum())
    return ("  own best model per participant (whole session): "
            + ", ".join(f"{m} {n}" for m, n in tally.items())
            + f"; at least positive evidence over the runner-up (Kass & Raftery, 1995) for "
            f"{graded} of {plural(len(whole), 'participant')}")


def summary_text(winners: pd.DataFrame, selection: pd.DataFrame,
                 selection_blocks: pd.DataFrame | None = None, families: pd.DataFrame | None = None,
                 families_blocks: pd.DataFrame | None = None,
                 merge: Sequence[Sequence[str]] = ()) -> str:
    """Return the short plain-words console summary of a model comparison.

    Parameters
    ----------
    winners : pandas.DataFrame
        :func:`foretell.compare.winners`.
    selection, selection_blocks, families, families_blocks : pandas.DataFrame
        :func:`foretell.compare.selection` and the others (all but the first optional).
    merge : sequence of sequence of str
        Look-alike sets (:func:`foretell.models.lookalikes`).

    Returns
    -------
    str
        The criterion (BIC or CV) and the look-alike models left out; then
        per group the model and family verdicts (:func:`verdict`), each
        block's verdict by the same rule and in the same words (one line
        per block, terms spelled out), and the participants' own winners with how many are at least "positive"
        evidence (Kass & Raftery, 1995). Numbers never print as "-0.00";
        lines are at most :data:`LINE_WIDTH` characters (:func:`wrapped`).
    """
    criterion = selection["criterion"].dropna()
    words = _CRITERION_WORDS.get(criterion.iloc[0], criterion.iloc[0]) if len(criterion) else "no criterion"
    lines = [f"random-effects model selection on {words}"]
    present = set(selection["model"])
    for members in merge:
        kept = [m for m in members if m in present]
        dropped = [m for m in members if m not in present]
        if kept and dropped:
            lines.append(lookalike_note(kept[0], dropped))
    for group, part in selection.groupby("group", sort=False):
        n = int(part["n_participants"].iloc[0])
        _, _, words = verdict(part, "model")
        lines.append(f"group {group} ({plural(n, 'participant')}): {words}")
        if families is not None:
            fam = families[families["group"] == group]
            if len(fam):
                lines.append(f"  families: {verdict(fam, 'family')[2]}")
        for what, blocks, label in (("by block", selection_blocks, "model"),
                                     ("families by block", families_blocks, "family")):
            if blocks is not None and (each := _block_lines(blocks, group, label)):
                lines += [f"  {what}:", *(f"    {line}" for line in each)]
        if (line := _own_winners(winners, group)) is not None:
            lines.append(line)
    return "\n".join(wrapped(line) for line in lines)


_COMPARISON = re.compile(r"\S+ (?:<|>|<=|>=|≤|≥) \S+|(?<![\w)]) ?(?:<|>) \S+")
"""A comparison ("0.51 < 0.95", "> 0.999") that a wrapped line never breaks."""


def wrapped(line: str, width: int | None = LINE_WIDTH) -> str:
    """Return ``line`` broken into lines of at most ``width`` characters, continuations indented two more.

    Parameters
    ----------
    line : str
        One logical line; its leading spaces are kept on the first line.
    width : int or None, default :data:`LINE_WIDTH`
        None: ``line`` as it is.

    Returns
    -------
    str
    """
    if width is None:
        return line
    indent = " " * (len(line) - len(line.lstrip(" ")))
    glued = _COMPARISON.sub(lambda m: m.group(0).replace(" ", "\u00a0"), line.strip())  # "0.51 < 0.95" stays whole
    return "\n".join(textwrap.wrap(glued, width, initial_indent=indent, subsequent_indent=indent + "  ",
                                   break_on_hyphens=False, break_long_words=False)).replace("\u00a0", " ") or line


def convergence_text(fits: pd.DataFrame, blocks: pd.DataFrame) -> str:
    """Return one line on optimiser failures: whole-session fits, cross-validation folds, block refits.

    Parameters
    ----------
    fits, blocks : pandas.DataFrame
        The fit tables (converged, cv_converged).

    Returns
    -------
    str
        A cross-validation that could not run (fewer than two blocks) is said
        so, not counted as a failure.
    """
    parts = [(int(fits["converged"].eq(False).sum()), len(fits), "fits")]
    notes = []
    if "cv_converged" in fits.columns:
        parts.append((int(fits["cv_converged"].eq(False).sum()), len(fits), "cross-validations"))
        if fits["cv_converged"].isna().any():
            notes.append("cross-validation skipped where a participant has fewer than two blocks")
    if "converged" in blocks.columns:
        parts.append((int(blocks["converged"].eq(False).sum()), len(blocks), "block refits"))
    failed = [f"{k} of {n} {what}" for k, n, what in parts if k]
    line = ("optimiser: every fit converged" if not failed else
            "optimiser: did not converge for " + ", ".join(failed)
            + " (see the converged and message columns; comparisons leave those fits out)")
    return "; ".join([line, *notes])


def bound_text(fits: pd.DataFrame, winners: pd.DataFrame | None = None, width: int | None = LINE_WIDTH) -> str:
    """Return the lines counting fits that ended at a parameter bound: the winning fits first, then all fits.

    Parameters
    ----------
    fits : pandas.DataFrame
        The fits table (``at_bound`` names the parameters at a bound).
    winners : pandas.DataFrame, optional
        :func:`foretell.compare.winners`: each participant's whole-session
        best model marks the winning fits (the ones the comparisons and
        curves read). Without it, all fits only.
    width : int or None, default :data:`LINE_WIDTH`
        The longest line (None: one line per statement, for the report).

    Returns
    -------
    str
        Per parameter and side, the bound the value is nearer to
        (:data:`foretell.params.PARAMS`). An upper inv_temp bound means
        near-deterministic guessing, a lower lapse bound no lapses: both are
        limits of what the data can tell, not estimates.
    """
    lines = []
    if winners is not None and {"best_model", "block"} <= set(winners.columns):
        best = winners[(winners["block"] == ALL) & winners["best_model"].notna()]
        keys = pd.MultiIndex.from_frame(best[["participant", "best_model"]].astype(str))
        won = fits[pd.MultiIndex.from_frame(fits[["participant", "model"]].astype(str)).isin(keys)]
        lines.append(f"bounds, the {plural(len(won), 'winning fit')}: {_bound_counts(won)}")
    lines.append(f"bounds, all {plural(len(fits), 'fit')}: {_bound_counts(fits)} (at_bound in fits.csv)")
    if not fits.get("at_bound", pd.Series(dtype=object)).fillna("").astype(str).eq("").all():
        lines.append("a value at a bound is a limit of what the data can tell, not an estimate")
    return "\n".join(wrapped(line, width) for line in lines)


def _bound_counts(fits: pd.DataFrame) -> str:
    """Return "lapse at its upper bound 0.5 in 6, inv_temp at its upper bound 50 in 2" (or "none at a bound")."""
    at = fits["at_bound"].fillna("").astype(str) if "at_bound" in fits.columns else pd.Series([], dtype=str)
    counts: dict[tuple[str, str], int] = {}
    for i in at.index[at != ""]:
        for name in at[i].split(";"):
            p = PARAMS[name]
            value = float(fits.at[i, name])
            side = "upper" if abs(value - p.high) < abs(value - p.low) else "lower"
            counts[(name, side)] = counts.get((name, side), 0) + 1
    if not counts:
        return "none at a bound"
    return ", ".join(f"{name} at its {side} bound {PARAMS[name].high if side == 'upper' else PARAMS[name].low:g} "
                     f"in {n}" for (name, side), n in sorted(counts.items()))
