"""The design check's tables: credit of each simulated participant, confusion, its inversion, parameter recovery, answer."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy import stats

from foretell.stats.intervals import CI_LEVEL, clopper_pearson, trials_to_show
from foretell.stats.selection import rfx_bms

TIE_BIC = 1e-9
"""BIC differences below this are ties: the tied models share the participant's credit equally."""
TARGET_DIAGONAL = 0.9
"""The share of its participants a model must be shown to recover: the lower end of the share's
Clopper-Pearson interval (:data:`foretell.stats.intervals.CI_LEVEL`) must reach it (chosen for this check,
not a published standard)."""
TARGET_SPEARMAN = 0.7
"""Design check threshold on every parameter's Spearman correlation (chosen here, not a published standard)."""
GROUP_RESAMPLES = 50
"""Bootstrap resamples of each cell's participants for the group-level check (besides the whole cell)."""


def credit(fits: pd.DataFrame, n_trials: int, label: str) -> tuple[pd.DataFrame, list[str]]:
    """Return one row per participant x winning model with its share of the credit, and notes.

    Parameters
    ----------
    fits : pandas.DataFrame
        participant, fitted_model, bic, converged (bool) of one cell.
    n_trials : int
    label : str
        The cell's generating model.

    Returns
    -------
    (pandas.DataFrame, list of str)
        trials, generating_model, participant, fitted_model, credit: the
        models within :data:`TIE_BIC` of the lowest BIC share the
        participant's credit equally; fits that did not converge are left
        out (as the analysis leaves them out of the winners), and a note says so.
    """
    usable = fits[fits["converged"] & np.isfinite(fits["bic"].astype(float))]
    best = usable.groupby("participant")["bic"].transform("min")
    won = usable[usable["bic"] - best < TIE_BIC]
    share = 1.0 / won.groupby("participant")["fitted_model"].transform("size")
    credited = pd.DataFrame({"trials": n_trials, "generating_model": label,
                             "participant": won["participant"].to_numpy(),
                             "fitted_model": won["fitted_model"].to_numpy(), "credit": share.to_numpy()})
    notes = []
    failed = fits.loc[~fits["converged"], ["participant", "fitted_model"]]
    if len(failed):
        notes.append(f"{label} at {n_trials} trials: {len(failed)} of {len(fits)} fits did not converge "
                     f"({failed['participant'].nunique()} participants) and were left out of the "
                     "confusion matrix, as the analysis leaves them out of the winners")
    return credited, notes


def group_check(fits: pd.DataFrame, labels: Sequence[str], n_trials: int, label: str,
                 rng: np.random.Generator) -> pd.DataFrame:
    """Return the share of groups in which each model has the top protected exceedance.

    Parameters
    ----------
    fits : pandas.DataFrame
        participant, fitted_model, bic, converged of one cell.
    labels : sequence of str
        Every fitted model.
    n_trials : int
    label : str
        The cell's generating model.
    rng : numpy.random.Generator
        Draws the :data:`GROUP_RESAMPLES` bootstrap resamples.

    Returns
    -------
    pandas.DataFrame
        trials, generating_model, fitted_model, share, n_groups, group_size.
        The groups are the whole cell and its resamples; random-effects BMS on
        -BIC/2 (Stephan et al., 2009) with protected exceedance (Rigoux et al.,
        2014); ties share. Resamples are not new participants: the share says
        how stable the group verdict is at this group size.
    """
    wide = fits.assign(log_evidence=np.where(fits["converged"], -0.5 * fits["bic"], np.nan)) \
        .pivot(index="participant", columns="fitted_model", values="log_evidence") \
        .reindex(columns=list(labels)).dropna()
    lme = wide.to_numpy()
    share = np.zeros(len(labels))
    n_groups = 0
    if len(lme):
        picks = [np.arange(len(lme))] + [rng.integers(len(lme), size=len(lme))
                                         for _ in range(GROUP_RESAMPLES)]
        for rows in picks:
            pxp = rfx_bms(lme[rows]).protected_exceedance
            top = np.abs(pxp - pxp.max()) < 1e-12
            share += top / top.sum()
        n_groups = len(picks)
        share /= n_groups
    return pd.DataFrame({"trials": n_trials, "generating_model": label, "fitted_model": list(labels),
                         "share": share if n_groups else np.nan, "n_groups": n_groups,
                         "group_size": len(lme)})


def confusion_table(credit: pd.DataFrame, trials: Sequence[int], labels: Sequence[str]) -> pd.DataFrame:
    """Return the confusion table: every trials x generating x fitted model, fractions and intervals.

    Parameters
    ----------
    credit : pandas.DataFrame
        :func:`credit` of every cell.
    trials : sequence of int
    labels : sequence of str
        The models, in order.

    Returns
    -------
    pandas.DataFrame
        trials, generating_model, fitted_model, fraction, ci95_low, ci95_high
        (:func:`foretell.stats.intervals.clopper_pearson` on the credited
        count rounded half to even, since split credit can make it
        fractional), n; on the diagonal (fitted = generating) ``recovered``
        (ci95_low reaches :data:`TARGET_DIAGONAL`) and ``n_needed``
        (:func:`foretell.stats.intervals.trials_to_show`: the simulated
        participants at which the fraction, as observed, would have its lower
        bound at the target; missing when the fraction is not above it), both
        missing off the diagonal. Fractions sum to 1 per trials x generating
        model (NaN when n = 0).
    """
    keys = ["trials", "generating_model"]
    counts = credit.groupby([*keys, "fitted_model"])["credit"].sum()
    grid = pd.MultiIndex.from_product([trials, labels, labels], names=[*keys, "fitted_model"])
    table = counts.reindex(grid, fill_value=0.0).rename("credit").reset_index()
    table["n"] = table.groupby(keys)["credit"].transform("sum").round().astype(int)
    table["fraction"] = table["credit"] / table["n"]
    table["ci95_low"], table["ci95_high"] = clopper_pearson(table["credit"].round(), table["n"])
    diagonal = (table["generating_model"] == table["fitted_model"]) & (table["n"] > 0)
    table["recovered"] = pd.array(np.where(diagonal, table["ci95_low"] >= TARGET_DIAGONAL, None), dtype="boolean")
    table["n_needed"] = pd.array([trials_to_show(f, TARGET_DIAGONAL) if d else math.nan
                                  for f, d in zip(table["fraction"], diagonal)], dtype="Int64")
    order = {g: i for i, g in enumerate(labels)}
    table = table.sort_values(["trials", "generating_model", "fitted_model"],
                              key=lambda c: c.map(order) if c.name != "trials" else c, kind="stable")
    return table[["trials", "generating_model", "fitted_model", "fraction", "ci95_low", "ci95_high", "n", "recovered",
                  "n_needed"]].reset_index(drop=True)


def inversion_table(confusion: pd.DataFrame) -> pd.DataFrame:
    """Return P(generating | fitted) under a uniform prior over generating models (Bayes' rule).

    Parameters
    ----------
    confusion : pandas.DataFrame
        :func:`confusion_table`.

    Returns
    -------
    pandas.DataFrame
        trials, fitted_model, generating_model, fraction (NaN for a model no
        participant was best fitted by), n (credited participants with that
        winner, fractional with ties).
    """
    table = confusion.copy()
    table["credited"] = table["fraction"] * table["n"]
    total = table.groupby(["trials", "fitted_model"])["fraction"].transform("sum")
    table["fraction"] = (table["fraction"] / total).where(total > 0)
    table["n"] = table.groupby(["trials", "fitted_model"])["credited"].transform("sum")
    table = table.sort_values(["trials", "fitted_model"], kind="stable")
    return table[["trials", "fitted_model", "generating_model", "fraction", "n"]].reset_index(drop=True)


def parameter_summary(params: pd.DataFrame, notes: list[str]) -> pd.DataFrame:
    """Return Spearman's rho, bias and RMSE of fitted against true values per trials x model x parameter.

    Parameters
    ----------
    params : pandas.DataFrame
        trials, model, parameter, true, fitted, converged.
    notes : list of str
        Extended with a note for every undefined rho.

    Returns
    -------
    pandas.DataFrame
        trials, model, parameter, spearman (NaN with fewer than 3 converged
        fits or constant values), bias (mean fitted - true), rmse, n
        (converged fits).
    """
    rows = []
    for (trials, model, name), part in params.groupby(["trials", "model", "parameter"], sort=False):
        ok = part[part["converged"] & part["fitted"].notna()]
        true, fitted = ok["true"].to_numpy(float), ok["fitted"].to_numpy(float)
        varies = len(ok) >= 3 and np.ptp(true) > 0 and np.ptp(fitted) > 0
        rho = float(stats.spearmanr(true, fitted).statistic) if varies else math.nan
        if not varies:
            notes.append(f"{name} of {model} at {trials} trials: Spearman's rho undefined "
                         "(fewer than 3 converged fits, or true or fitted values constant)")
        err = fitted - true
        rows.append({"trials": trials, "model": model, "parameter": name, "spearman": rho,
                     "bias": float(err.mean()) if len(err) else math.nan,
                     "rmse": float(np.sqrt((err ** 2).mean())) if len(err) else math.nan,
                     "n": len(ok)})
    return pd.DataFrame(rows, columns=["trials", "model", "parameter", "spearman", "bias", "rmse", "n"])


def answer_text(confusion: pd.DataFrame, summary: pd.DataFrame, n_participants: int) -> str:
    """Return the answer in words: the smallest trial count passing both criteria, or what falls short.

    A model counts as recovered at a trial count when the lower end of its
    share's Clopper-Pearson interval reaches :data:`TARGET_DIAGONAL`
    (``recovered`` of :func:`confusion_table`), a parameter when its
    Spearman rho reaches :data:`TARGET_SPEARMAN`. When every share is above
    the target at some count but the intervals are too wide to show it, the
    answer gives the simulated participants that would show it
    (``n_needed``: the largest over the models at that count).

    Parameters
    ----------
    confusion : pandas.DataFrame
        :func:`confusion_table`.
    summary : pandas.DataFrame
        :func:`parameter_summary`.
    n_participants : int

    Returns
    -------
    str
        The criteria were chosen for this check, not taken from a published
        standard, and the answer says so.
    """
    diagonal = confusion[confusion["generating_model"] == confusion["fitted_model"]]
    head = (f"Design check on {n_participants} simulated participants per model and trial count. Criteria "
            f"chosen for this check, not a published standard: a model counts as recovered when the lower end "
            f"of the {CI_LEVEL:.0%} Clopper-Pearson interval (Clopper & Pearson, 1934) of its share of "
            f"participants best fitted by it reaches {TARGET_DIAGONAL:.0%}; a parameter when its Spearman rho "
            f"is at least {TARGET_SPEARMAN:g}. ")
    recovered = [t for t, d in diagonal.groupby("trials") if d["recovered"].fillna(False).astype(bool).all()]
    for trials in recovered:
        rho = summary.loc[summary["trials"] == trials, "spearman"]
        if rho.notna().all() and (rho >= TARGET_SPEARMAN).all():
            worst = diagonal[diagonal["trials"] == trials].sort_values("ci95_low", kind="stable").iloc[0]
            return (head + f"{trials} trials per participant is the smallest listed count that meets both; its "
                    f"least recovered model is {_share(worst)}, its lowest rho {rho.min():.2f}. This holds only "
                    "if participants behave like these models with parameters in the simulated ranges.")
    text = head + "No listed trial count meets both."
    if recovered:
        text += (f" The models alone are recovered from {min(recovered)} trials per participant; "
                 "the parameters fall short.")
    else:
        text += _too_few(diagonal, n_participants)
    return text + _confused(confusion) + _low_rho(summary)


def _share(row: pd.Series) -> str:
    """Return 'model (share, 95% CI low-high)' of a confusion row."""
    return (f"{row['generating_model']} ({row['fraction']:.0%}, {CI_LEVEL:.0%} CI "
            f"{row['ci95_low']:.0%}-{row['ci95_high']:.0%})")


def _too_few(diagonal: pd.DataFrame, n_participants: int) -> str:
    """Return the sentence on the smallest count whose shares are all above the target, if any."""
    above = [t for t, d in diagonal.groupby("trials") if (d["fraction"] > TARGET_DIAGONAL).all()]
    if not above:
        return ""
    cell = diagonal[diagonal["trials"] == min(above)]
    worst = cell.sort_values("ci95_low", kind="stable").iloc[0]
    needed = int(cell["n_needed"].max())
    return (f" At {min(above)} trials every model's share is above {TARGET_DIAGONAL:.0%}, but "
            f"{n_participants} simulated participants per model are too few to show it: the lowest interval is "
            f"{_share(worst)}. At the shares observed there, {needed} per model would (the smallest n whose "
            f"{CI_LEVEL:.0%} Clopper-Pearson lower bound at the observed share reaches {TARGET_DIAGONAL:.0%}; "
            f"for a perfect record, n of n).")


def _confused(confusion: pd.DataFrame) -> str:
    """Return the sentence on the most frequent confusion at the largest trial count."""
    largest = confusion["trials"].max()
    off = confusion[(confusion["trials"] == largest)
                    & (confusion["generating_model"] != confusion["fitted_model"])]
    pair = off.loc[off["fraction"].idxmax()] if len(off) and off["fraction"].notna().any() else None
    if pair is not None and pair["fraction"] > 0:
        return (f" At {largest} trials the most frequent confusion is {pair['generating_model']} "
                f"participants best fitted by {pair['fitted_model']} ({pair['fraction']:.0%}, "
                f"{CI_LEVEL:.0%} CI {pair['ci95_low']:.0%}-{pair['ci95_high']:.0%}).")
    return f" At {largest} trials no simulated participant was best fitted by another model."


def _low_rho(summary: pd.DataFrame) -> str:
    """Return the sentence naming the parameters below the rho threshold at the largest trial count."""
    if summary.empty:
        return ""
    largest = summary["trials"].max()
    low = summary[(summary["trials"] == largest) & ~(summary["spearman"] >= TARGET_SPEARMAN)]
    if not len(low):
        return ""
    return " Parameters below the rho threshold there: " + ", ".join(
        f"{r.parameter} of {r.model} ({'undefined' if math.isnan(r.spearman) else f'{r.spearman:.2f}'})"
        for r in low.itertuples()) + "."
