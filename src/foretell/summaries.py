"""Plain-words summaries for the console: model comparison and optimiser convergence.

Words are backed by named criteria. A model (or family) is "ahead" only
when one stands out: the Bayesian omnibus risk is at most :data:`BOR_MAX`
(Rigoux et al., 2014: above it, "all models equally frequent" is the more
probable account) and the leader's protected exceedance reaches
:func:`stands_out_at`; it is a "clear winner" when its protected exceedance
is at least :data:`CLEAR_PXP` as well (common practice). A participant's own
win is graded after Kass & Raftery (1995).
"""

from __future__ import annotations

from typing import Sequence

import pandas as pd

from .compare import lookalike_note
from .labels import ALL, block_label
from .text import number, plural

CLEAR_PXP = 0.95
"""Protected exceedance from which a leader is called a clear winner (common practice)."""

BOR_MAX = 0.5
"""Omnibus risk above which no model is said to stand out (Rigoux et al., 2014)."""

STANDS_OUT_MARGIN = 0.1
"""A leader stands out only when its protected exceedance is at least 1/K plus this margin (and 1/2)."""

_GRADED = ("positive", "strong", "very-strong")

_CRITERION_WORDS = {
    "bic": "BIC (log evidence -BIC/2)",
    "cv": "cross-validated log-likelihood (leave-one-block-out)",
}


def stands_out_at(k: int) -> float:
    """Return the protected exceedance a leader among ``k`` compared models needs to stand out.

    max(1/k + :data:`STANDS_OUT_MARGIN`, 1/2). Protected exceedance is 1/k for
    every model when nothing distinguishes them, and Monte-Carlo and prior
    effects move it by a few hundredths: 0.1 above chance is the smallest
    lead worth reporting. Below 1/2 the other models together are more
    probably the most frequent than the leader is, so with many models
    1/2 is the bar.
    """
    return max(1.0 / k + STANDS_OUT_MARGIN, 0.5)


def _against(value: float, bound: float) -> str:
    """Return ``value`` with enough decimals (2 to 4) that it does not print as ``bound`` unless equal."""
    for digits in (2, 3, 4):
        text = number(value, f".{digits}f")
        if value == bound or text != number(bound, f".{digits}f"):
            return text
    return text


def verdict(table: pd.DataFrame, label: str) -> tuple[str, str | None, str]:
    """Return (status, leader, words) for one comparison's rows (``label`` is "model" or "family").

    status: "none" (nothing computed), "level" (nothing stands out), "ahead"
    or "clear", after the criteria of this module.
    """
    ok = table.dropna(subset=["protected_exceedance"])
    if ok.empty:
        note = table["note"].iloc[0] if len(table) else ""
        return "none", None, f"no {label} selection ({note or 'no usable evidence'})"
    k = len(ok)
    top = ok.loc[ok["protected_exceedance"].idxmax()]
    pxp, bor, leader = float(top["protected_exceedance"]), float(top["bor"]), str(top[label])
    if k == 1:
        return "level", None, f"only one {label} compared ({leader})"
    risk = f"omnibus risk {_against(bor, BOR_MAX)}"
    if bor > BOR_MAX:
        return "level", None, f"no {label} stands out ({risk} > {number(BOR_MAX, '.2f')})"
    bar = stands_out_at(k)
    if pxp < bar:
        compared = plural(k, label, "families" if label == "family" else None)
        return "level", None, (f"no {label} stands out (highest protected exceedance "
                               f"{_against(pxp, bar)} < {number(bar, '.2f')} with {compared}; {risk})")
    if pxp >= CLEAR_PXP:
        return "clear", leader, (f"clear winner: {leader} (protected exceedance {_against(pxp, CLEAR_PXP)} "
                                 f">= {number(CLEAR_PXP, '.2f')}; {risk})")
    return "ahead", leader, (f"ahead, not clear: {leader} (protected exceedance {_against(pxp, CLEAR_PXP)} "
                             f"< {number(CLEAR_PXP, '.2f')}; {risk})")


def _block_line(table: pd.DataFrame, group: str, label: str) -> str | None:
    """Return "block 1: count-0 (pxp 0.81, BOR 0.10); ..." for one group, or None without blocks."""
    mine = table[table["group"] == group]
    keys = [k for k in ("session", "block") if k in mine.columns
            and (k == "block" or mine[k].nunique() > 1)]
    if mine.empty:
        return None
    parts = []
    for labels, unit in mine.groupby(keys, sort=False):
        labels = labels if isinstance(labels, tuple) else (labels,)
        where = " ".join(f"{k} {block_label(v)}" for k, v in zip(keys, labels))
        status, leader, _ = verdict(unit, label)
        ok = unit.dropna(subset=["protected_exceedance"])
        if status == "none":
            parts.append(f"{where}: not computed")
            continue
        pxp = number(float(ok["protected_exceedance"].max()), '.2f')
        bor = number(float(ok["bor"].iloc[0]), '.2f')
        if leader is None:
            parts.append(f"{where}: none stands out (top pxp {pxp}, BOR {bor})")
        else:
            parts.append(f"{where}: {leader} (pxp {pxp}, BOR {bor})")
    return "; ".join(parts)


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

    First the criterion (BIC or CV) and the look-alike models left out
    (``merge``, from :func:`foretell.compare.lookalikes`); then per group:
    the model verdict (:func:`verdict`), the family verdict, each block's
    leader with its protected exceedance (pxp) and omnibus risk (BOR), or
    "none stands out", and the participants' own winners with how many are
    at least "positive" evidence. Numbers never print as "-0.00".
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
        if selection_blocks is not None and (line := _block_line(selection_blocks, group, "model")):
            lines.append(f"  by block: {line}")
        if families_blocks is not None and (line := _block_line(families_blocks, group, "family")):
            lines.append(f"  families by block: {line}")
        if (line := _own_winners(winners, group)) is not None:
            lines.append(line)
    return "\n".join(lines)


def convergence_text(fits: pd.DataFrame, blocks: pd.DataFrame) -> str:
    """Return one line on optimiser failures: whole-session fits, cross-validation folds, block refits.

    A cross-validation that could not run (fewer than two blocks) is said so,
    not counted as a failure.
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
