"""The rt step's comparisons: random-effects selection over participants and blocks, baseline included; the words."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy.special import betainc

from foretell.compare import selection, selection_blocks
from foretell.labels import ALL
from foretell.measure import BASELINE_MODEL, Measure
from foretell.models import Partition
from foretell.summaries import CLEAR_PXP, probability_words, verdict
from foretell.text import plural
from foretell.validation import child_int

CRITERION = "rfx_bms_bic"
"""What the per-participant comparisons call on: random-effects BMS of -BIC/2 per participant."""
COMPARE_COLUMNS = ("model", "rank", "criterion", "bic_sum", "d_bic_sum", "elpd_loo", "elpd_loo_se", "elpd_diff",
                   "elpd_diff_se", "p_loo", "stacking_weight", "expected_freq", "exceedance", "protected_exceedance",
                   "omnibus_risk", "n_participants", "called", "evidence", "provisional")
SELECTION_COLUMNS = ("group", "model", "expected_freq", "exceedance", "protected_exceedance", "omnibus_risk",
                     "freq_concentration", "n_participants", "criterion", "method", "called", "note")
_RFX = ("expected_freq", "exceedance", "protected_exceedance")


def rfx_selection(fits: pd.DataFrame, seed: int, merge: Sequence[Sequence[str]] = ()) -> pd.DataFrame:
    """Return random-effects model selection of the learners and the baseline, for everyone and per group.

    :func:`foretell.compare.selection` on the per-participant log evidence
    -BIC/2 of every model and the baseline (Stephan et al., 2009; protected
    exceedance and omnibus risk, Rigoux et al., 2014); ``called`` marks the
    model that :func:`foretell.summaries.verdict` names in each group (BOR
    at most 0.5 and protected exceedance at least max(1/K + 0.1, 0.5)).

    Parameters
    ----------
    fits : pandas.DataFrame
        The fits table (participant, group, model, bic).
    seed : int
        The Gibbs check draws from ``child_rng(child_int(seed, "rt", "selection"), "model", group)``.
    merge : sequence of sequence of str
        Look-alike models (:func:`foretell.models.lookalikes`): identical
        regressors, compared once (the others named in ``note``).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`SELECTION_COLUMNS`.
    """
    usable = fits.dropna(subset=["bic"]) if "bic" in fits.columns else fits.iloc[0:0]
    if usable.empty:
        return pd.DataFrame(columns=SELECTION_COLUMNS)
    table = selection(usable[["participant", "group", "model", "bic"]], criterion="bic", merge=merge,
                      seed=child_int(seed, "rt", "selection"))
    table["called"], _ = _graded(table, ["group"])
    return table[list(SELECTION_COLUMNS)]


def _graded(table: pd.DataFrame, keys: list[str]) -> tuple[pd.Series, pd.Series]:
    """Return per row: whether its model is the leader :func:`foretell.summaries.verdict` names in its
    comparison, and the evidence word (the verdict's status on the leader's row, "behind" on the others,
    "level" everywhere when nothing stands out)."""
    called = pd.Series(False, index=table.index)
    evidence = pd.Series("", index=table.index, dtype=object)
    for _, rows in table.groupby(keys, sort=False):
        status, leader, _ = verdict(rows, "model")
        called[rows.index] = rows["model"] == leader
        evidence[rows.index] = np.where(rows["model"] == leader, status, "behind" if leader is not None else "level")
    return called, evidence


HIERARCHICAL_MODELS = ("in_play", "all")
"""Which learner models the rt step samples hierarchically: those :func:`in_play` leaves in play, or all."""


def in_play(table: pd.DataFrame, models: Sequence[str]) -> tuple[list[str], str]:
    """Return (the learner models the random-effects selection leaves in play, why in words).

    In group ``all`` the leader is the model (or the baseline) with the
    highest protected exceedance. Another model is told apart from it when
    the posterior probability that the leader is the more frequent of the
    two, P(r_lead > r_j) = 1 - I_1/2(alpha_lead, alpha_j) (the two
    frequencies' share is Beta(alpha_lead, alpha_j) under the Dirichlet
    posterior; Stephan et al., 2009), reaches :data:`foretell.summaries.CLEAR_PXP`.
    In play: a learner leader and every learner not told apart from the
    leader (the baseline joins every comparison anyway). Without a usable
    selection every model is in play.

    Parameters
    ----------
    table : pandas.DataFrame
        :func:`rfx_selection` (group, model, protected_exceedance, freq_concentration).
    models : sequence of str
        The learner models, in order.

    Returns
    -------
    (list of str, str)
        The models in play, in the order of ``models``; the reason.

    References
    ----------
    Stephan, K. E., Penny, W. D., Daunizeau, J., Moran, R. J., & Friston,
    K. J. (2009). Bayesian model selection for group studies. NeuroImage
    46, 1004-1017.
    """
    rows = table[table["group"] == ALL].dropna(subset=["protected_exceedance", "freq_concentration"])
    if rows.empty:
        return list(models), "no usable random-effects selection: every learner model in play"
    alpha = rows.set_index("model")["freq_concentration"].astype(float)
    lead = str(rows.loc[rows["protected_exceedance"].astype(float).idxmax(), "model"])
    beaten = {m: 1.0 - float(betainc(alpha[lead], alpha[m], 0.5)) for m in alpha.index if m != lead}
    kept = [m for m in models if m == lead or (m in beaten and beaten[m] < CLEAR_PXP)]
    return kept, (f"the random-effects selection's leader {lead} and every learner it does not tell apart from "
                  f"it (P(leader more frequent) < {CLEAR_PXP:g}; Stephan et al., 2009)")


def same_evidence(fits: pd.DataFrame, merge: Sequence[Sequence[str]]) -> list[tuple[str, ...]]:
    """Return ``merge`` joined with the sets of models whose BIC is the same for every participant.

    Models with identical evidence split their share of a random-effects
    selection between them (e.g. a leaky model whose leak, taken from the
    guess fits, is 0 for everyone, and the same model without a leak), so
    they are compared once, as look-alikes are; the first of each set, in
    the order of ``fits``, is kept.

    Parameters
    ----------
    fits : pandas.DataFrame
        participant, model, bic (the per-participant fits).
    merge : sequence of sequence of str
        Look-alike sets already known (:func:`foretell.models.lookalikes`).

    Returns
    -------
    list of tuple of str
    """
    order = list(dict.fromkeys(fits["model"].astype(str)))
    sets = Partition(order)
    for members in merge:
        present = [m for m in members if m in order]
        for other in present[1:]:
            sets.join(present[0], other)
    if "bic" not in fits.columns:  # no participant had enough trials for a fit
        return sets.sets()
    bic = fits.pivot_table(index="participant", columns="model", values="bic", aggfunc="first", dropna=False)
    for i, a in enumerate(order):
        for b in order[i + 1:]:
            if a in bic and b in bic and not sets.same(a, b) and bic[a].notna().any() and np.allclose(
                    bic[a].to_numpy(float), bic[b].to_numpy(float), rtol=0.0, atol=1e-9, equal_nan=True):
                sets.join(a, b)
    return sets.sets()


def ranking_text(compare: pd.DataFrame) -> str:
    """Return the ranking of ``compare`` for the console: one line per model, the columns that hold numbers.

    Model, rank, the random-effects columns (protected exceedance, expected
    frequency), summed BIC to the lowest, the ELPD difference and its SE when
    the hierarchical comparison ran, participants and the evidence word;
    probabilities to three decimals, never rounded onto 0 or 1.
    """
    shown = ["model", "rank", "protected_exceedance", "expected_freq", "d_bic_sum", "elpd_diff", "elpd_diff_se",
             "n_participants", "evidence"]
    if compare.empty:
        return "no model ranking: no participant had usable fits (see the notes)"
    table = compare[[c for c in shown if c in compare.columns and compare[c].notna().any()]].copy()
    for column in ("protected_exceedance", "expected_freq"):
        if column in table:
            table[column] = [probability_words(v) for v in table[column]]
    for column in ("d_bic_sum", "elpd_diff", "elpd_diff_se"):
        if column in table:
            table[column] = table[column].map(lambda v: "" if pd.isna(v) else f"{v:.1f}")
    if "rank" in table:
        table["rank"] = table["rank"].map(lambda v: "" if pd.isna(v) else str(int(v)))
    return table.rename(columns={"protected_exceedance": "prot_exceedance", "n_participants": "n"}).to_string(
        index=False)


def verdict_words(table: pd.DataFrame) -> list[str]:
    """Return one line per group of the selection table: its verdict, and what it says of the learners."""
    lines = []
    for group, rows in table.groupby("group", sort=False):
        _, leader, words = verdict(rows, "model")
        n = int(rows["n_participants"].iloc[0])
        if leader is None:
            what = "no learner is called"
        elif leader == BASELINE_MODEL:
            what = f"no learner is called: the baseline {BASELINE_MODEL} leads"
        else:
            what = f"called: {leader} beats the baseline and the other learners"
        lines.append(f"random-effects selection of per-participant BIC with the baseline (Stephan et al., 2009; "
                     f"Rigoux et al., 2014), group {group} ({plural(n, 'participant')}): {words}; {what}")
    return lines


def compare_table(fits: pd.DataFrame, chosen: pd.DataFrame) -> pd.DataFrame:
    """Return the model ranking of the per-participant path: by protected exceedance in group ``all``.

    Summed BIC (``bic_sum``, ``d_bic_sum``: fixed effects, every
    participant assumed to use the same model) stays beside it and makes no
    call. ``called`` marks the model the random-effects selection calls for
    everyone (:func:`rfx_selection`); ``evidence`` is its
    :func:`foretell.summaries.verdict` status ("clear", "ahead") on its
    row, "behind" on the others, "level" everywhere when nothing stands out.
    """
    usable = fits.dropna(subset=["bic"]) if "bic" in fits.columns else fits.iloc[0:0]
    if usable.empty:
        return pd.DataFrame(columns=COMPARE_COLUMNS)
    bic = usable.groupby("model", sort=False)["bic"].sum()
    rows = chosen[chosen["group"] == ALL]
    called, evidence = _graded(rows, ["group"])
    rows = rows.assign(called=called, evidence=evidence).set_index("model")
    table = pd.DataFrame({"model": bic.index, "bic_sum": bic.to_numpy(), "d_bic_sum": bic.to_numpy() - bic.min()})
    for column in (*_RFX, "omnibus_risk", "called", "evidence"):
        table[column] = rows[column].reindex(table["model"]).to_numpy()
    table["n_participants"] = usable.groupby("model", sort=False)["participant"].nunique().to_numpy()
    table = table.sort_values(["protected_exceedance", "bic_sum"], ascending=[False, True], kind="stable",
                              na_position="last").reset_index(drop=True)
    table["rank"] = np.arange(1, len(table) + 1)
    table["criterion"] = CRITERION
    table["called"] = table["called"].fillna(False).astype(bool)
    table["evidence"] = table["evidence"].fillna("look-alike")  # compared once, as the model it equals
    for column in ("elpd_loo", "elpd_loo_se", "elpd_diff", "elpd_diff_se", "p_loo", "stacking_weight"):
        table[column] = math.nan
    table["provisional"] = False
    return table[list(COMPARE_COLUMNS)]


def merge_elpd(rfx: pd.DataFrame, elpd: pd.DataFrame) -> pd.DataFrame:
    """Return the compare table ranked and called by ELPD, the random-effects and summed-BIC columns beside it."""
    if elpd.empty:
        return rfx
    beside = ["bic_sum", "d_bic_sum", *_RFX, "omnibus_risk", "n_participants"]
    out = elpd.join(rfx.set_index("model")[beside], on="model")
    out["criterion"] = "elpd_loo_participant_block"
    return out[list(COMPARE_COLUMNS)].reset_index(drop=True)


def rank_blocks(rows: pd.DataFrame, chosen: Measure, seed: int, merge: Sequence[Sequence[str]] = ()) -> pd.DataFrame:
    """Return session x block x model: random-effects selection of each block's per-participant BIC.

    ``score`` is the summed per-block BIC (kept for reference, no call);
    ``rank`` orders the models by protected exceedance; ``called`` and
    ``evidence`` as in :func:`compare_table`, block by block (the same rule
    as the whole session). The variational scheme alone (Stephan et al.,
    2009): the Gibbs check of the whole-session call would cost a sampler
    run per block.

    Parameters
    ----------
    rows : pandas.DataFrame
        participant, session, block, model, n_trials, bic, slope
        (:func:`foretell.steps.measure_fits.participant_blocks`).
    chosen : Measure
    seed : int
    merge : sequence of sequence of str
        Look-alike models (:func:`rfx_selection`).

    Returns
    -------
    pandas.DataFrame
    """
    slope = f"slope_median_{chosen.slope_name}"
    columns = ["session", "block", "model", "score", "criterion", "rank", "n_participants", "n_trials", slope,
               *_RFX, "omnibus_risk", "called", "evidence"]
    if rows.empty:
        return pd.DataFrame(columns=columns)
    keys = ["session", "block", "model"]
    out = rows.groupby(keys, sort=False).agg(
        score=("bic", "sum"), n_participants=("participant", "nunique"), n_trials=("n_trials", "sum"),
        **{slope: ("slope", "median")}).reset_index()
    picked = selection_blocks(rows.rename(columns={"bic": "bic_block"}).assign(group=pd.NA), by_group=False,
                              merge=merge, method="variational", seed=child_int(seed, "rt", "blocks"))
    picked["called"], picked["evidence"] = _graded(picked, ["session", "block"])
    out = out.merge(picked[["session", "block", "model", *_RFX, "omnibus_risk", "called", "evidence"]], on=keys,
                    how="left")
    out["criterion"] = CRITERION
    out["called"] = out["called"].fillna(False).astype(bool)
    out["order"] = out.groupby(["session", "block"], sort=False).ngroup()
    out = out.sort_values(["order", "protected_exceedance", "score"], ascending=[True, False, True],
                          kind="stable", na_position="last")
    out["rank"] = out.groupby("order").cumcount() + 1
    return out[columns].reset_index(drop=True)


def block_words(blocks: pd.DataFrame) -> str | None:
    """Return the line saying in how many blocks a learner is called, and which."""
    if blocks.empty:
        return None
    units = blocks.groupby(["session", "block"], sort=False)
    called = blocks[blocks["called"] & (blocks["model"] != BASELINE_MODEL)]
    where = "; ".join(f"{m} in {plural(len(r), 'block')}" for m, r in called.groupby("model", sort=False))
    return (f"block by block (variational random-effects selection of each block's BIC, the same rule): a "
            f"learner is called "
            f"in {called[['session', 'block']].drop_duplicates().shape[0]} of {plural(units.ngroups, 'block')}"
            + (f" ({where})" if where else ""))


def bic_words(fits: pd.DataFrame) -> list[str]:
    """Return the line on summed BIC: which model is lowest and by how much (fixed effects; no call)."""
    usable = fits.dropna(subset=["bic"]) if "bic" in fits.columns else fits.iloc[0:0]
    if usable.empty:
        return ["no participant had enough kept trials"]
    total = usable.groupby("model", sort=False)["bic"].sum().sort_values(kind="stable")
    lines = []
    if usable.groupby("model", sort=False)["participant"].nunique().nunique() > 1:
        lines.append("summed BIC: models were summed over different participants (too few kept trials for some)")
    if len(total) > 1:
        lines.append(f"summed BIC (fixed effects, shown for reference, no call): {total.index[0]} lowest, "
                     f"{total.iloc[1] - total.iloc[0]:.1f} below {total.index[1]}")
    return lines
