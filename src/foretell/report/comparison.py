"""The report's model comparison and context-tree sections."""

from __future__ import annotations

import math

import pandas as pd

from foretell.contexts import STATUS_KEYS
from foretell.labels import ALL
from foretell.plots.report import parameters_figure, tree_figure, winners_heatmap
from foretell.report.layout import SELECTION_COLUMNS, Figures, Section, Source, absent, table
from foretell.summaries import CLEAR_PXP, bound_text, convergence_text, verdict
from foretell.text import number, plural

def _verdicts(table: pd.DataFrame, label: str) -> list[str]:
    return [f"Group {g} ({plural(int(part['n_participants'].iloc[0]), 'participant')}): "
            f"{verdict(part, label)[2]}." for g, part in table.groupby("group", sort=False)]


def _block_verdicts(table: pd.DataFrame, label: str) -> pd.DataFrame:
    """Return per group x session x block: the verdict's leader (or none), top protected exceedance, omnibus risk."""
    rows = []
    for (group, session, block), unit in table.groupby(["group", "session", "block"], sort=False):
        status, leader, words = verdict(unit, label)
        ok = unit.dropna(subset=["protected_exceedance"])
        rows.append({"group": group, "session": session, "block": block,
                     "leader": leader or "none stands out",
                     "top": float(ok["protected_exceedance"].max()) if len(ok) else math.nan,
                     "omnibus_risk": float(ok["omnibus_risk"].iloc[0]) if len(ok) else math.nan, "words": words})
    return pd.DataFrame(rows)


def models_section(source: Source, figures: Figures) -> Section:
    """Return the model comparison section: group selection, families, per-block leaders, each participant's winner.

    Parameters
    ----------
    source : Source
        The analysis (its ``fit/`` result).
    figures : Figures
        Collects the figures shown; the winners heatmap is drawn here.

    Returns
    -------
    Section
        Models are named only as :func:`foretell.summaries.verdict` does
        (Rigoux et al., 2014; common practice); a participant's own win is
        graded after Kass & Raftery (1995).
    """
    heading = "Model comparison"
    if not source.has("fit"):
        return absent("models", heading, "No fit/ folder: no models were fitted.")
    paragraphs: list[str] = []  # variational selection on BIC: no posterior draws, never provisional
    items: list[str] = []
    tables = []
    selection = source.table("fit/selection")
    if selection is not None and len(selection):
        crit = selection["criterion"].dropna()
        paragraphs.append(
            "Random-effects Bayesian model selection per group on whole-session "
            f"{'BIC' if len(crit) and crit.iloc[0] == 'bic' else 'cross-validated'} evidence. A model is "
            f"named only when it stands out: omnibus risk at most 0.5 and a protected exceedance above "
            f"chance by 0.1 (and at least 0.5); it is a clear winner from a protected exceedance of "
            f"{number(CLEAR_PXP, '.2f')} (common practice).")
        items.extend(_verdicts(selection, "model"))
        tables.append(table(selection, SELECTION_COLUMNS, "Model selection per group (whole session)"))
    families = source.table("fit/families")
    if families is not None and len(families):
        items.extend(f"Families, {line[0].lower()}{line[1:]}" for line in _verdicts(families, "family"))
        tables.append(table(families, {**SELECTION_COLUMNS, "models": "models"},
                             "Model families per group (whole session)"))
    blocks = source.table("fit/selection_blocks")
    if blocks is not None and len(blocks):
        tables.append(table(_block_verdicts(blocks, "model"), {
            "group": "group", "session": "session", "block": "block", "leader": "model standing out",
            "top": "highest protected exceedance (block)", "omnibus_risk": "omnibus risk (block)"},
            "Model selection per block (refitted on each block's trials)"))
    winners = source.table("fit/winners")
    if winners is not None and len(winners):
        path = figures.draw("winners", winners_heatmap(winners))
        graded = winners[(winners["block"] == ALL) & winners["best_model"].notna()]
        paragraphs.append(
            f"Each participant's own best model ({plural(len(graded), 'participant')} with a whole-session "
            "winner), whole session and per block. Cell text: the strength of the lead over the runner-up after "
            "Kass & Raftery (1995); 'bare' is not worth more than a bare mention, so such a cell names no winner.")
        fig_list = ((path, "Best model per participant and block (colour; grey: no winner), with the strength "
                     "of its lead over the runner-up (text); participants by group, the whole session apart."),)
        fits = source.table("fit/fits")
        if fits is not None and {"inv_temp", "lapse"} <= set(fits.columns):
            fig_list += ((figures.draw("parameters", parameters_figure(fits, winners)),
                          "Each participant's inverse temperature and lapse rate under their own best model, by "
                          "group (bar: median; hollow: at a fit bound, a limit rather than an estimate)."),)
    else:
        fig_list = ()
    fits, blocks = source.table("fit/fits"), source.table("fit/blocks")
    if fits is not None and blocks is not None:
        items += [convergence_text(fits, blocks), *bound_text(fits, winners, width=None).splitlines()]
    return Section("models", heading, tuple(paragraphs), tuple(items), fig_list, tuple(tables))


def trees_section(source: Source, figures: Figures) -> Section:
    """Return the context-tree section: the source tree and each group's typical response tree.

    Parameters
    ----------
    source : Source
        The analysis (its ``fit/`` result).
    figures : Figures
        Collects the figures shown; the trees are drawn here.

    Returns
    -------
    Section
    """
    heading = "Context trees"
    if not source.has("fit"):
        return absent("trees", heading, "No fit/ folder: no response trees were computed.")
    agreement = source.table("fit/context_agreement")
    if agreement is None or agreement.empty:
        return absent("trees", heading, "No source contexts in fit/context_agreement.csv (the task gives no "
                                         "source, or no response trees were computed).")
    whole = agreement[(agreement["block"] == ALL) & (agreement["session"] == ALL)]
    contexts = list(dict.fromkeys(whole["source_context"]))
    probs = _source_probs(source.table("groups/context_learning"))
    path = figures.draw("source_tree", tree_figure(contexts, {}, title="Source tree (the task's contexts)",
                                                   probs=probs))
    shares = status_shares(whole, source.table("fit/contexts"))
    shown = [(path, "The task's context tree: the root '*' is no past; each step down "
              "prepends an older symbol (labels oldest first). Leaves are the contexts the source distinguishes"
              + (", with the source's next-symbol probabilities under each." if probs else "."))]
    tables = []
    for group, part in shares.groupby("group", sort=False):
        drawn = tree_figure(contexts, {r.source_context: r for r in part.itertuples(index=False)},
                            title=f"Typical response tree, group {group}")
        shown.append((figures.draw(f"response_tree_{_slug(group)}", drawn),
                      f"Group {group}: per source context, the share of participants whose response tree "
                      "distinguishes it (D), merges it into a shorter context (M) or splits it into longer ones "
                      "(S); the table below gives the shares their winning models produce."))
        tables.append(table(part, {
            "source_context": "source context", "depth": "depth", "n_participants": "participants",
            "distinguished": "distinguished", "merged": "merged into shorter", "split_deeper": "split into longer",
            "unvisited": "not visited", "model_distinguished": "distinguished by winning models",
            "model_merged": "merged into shorter by winning models",
            "model_split_deeper": "split into longer by winning models",
            "expected_status_share": "winning models' share of the observed status",
            "beyond_model": "beyond the winning model"},
            f"Response trees of group {group} (whole session): shares of participants", {"depth": "d"}))
    paragraphs = (
        "A response tree says which past stimuli the guesses depend on, whatever learner produced them. "
        "Recency alone makes guesses depend on the past, so a tree deeper than the source shows context use "
        "only when it goes beyond what the participant's winning model produces: 'beyond the winning model' "
        "counts participants whose observed status occurs in under 5% of the simulated replicates "
        "(a posterior predictive check).",)
    return Section("trees", heading, paragraphs, figures=tuple(shown), tables=tuple(tables))


def status_shares(whole: pd.DataFrame, contexts: pd.DataFrame | None) -> pd.DataFrame:
    """Return per group x source context: shares of participants by observed status, and the models' shares.

    Parameters
    ----------
    whole : pandas.DataFrame
        The whole-session rows of the context_agreement table.
    contexts : pandas.DataFrame or None
        The contexts table: each participant's expected_distinguished,
        expected_merged and expected_split_deeper (the share of replicates of
        the winning model with that status).

    Returns
    -------
    pandas.DataFrame
        group, source_context, the shares ``distinguished``, ``merged``,
        ``split_deeper``, ``unvisited``, n_participants, depth,
        expected_status_share (mean), beyond_model (count) and the winning
        models' shares ``model_*`` averaged over the group's participants.
    """
    counts = pd.crosstab([whole["group"], whole["source_context"]], whole["status"])
    counts = counts.reindex(columns=list(STATUS_KEYS), fill_value=0)
    n = counts.sum(axis=1)
    out = counts.div(n, axis=0).rename(columns=STATUS_KEYS)
    out["n_participants"] = n
    agg = whole.groupby(["group", "source_context"]).agg(
        depth=("depth", "first"), expected_status_share=("expected_status_share", "mean"),
        beyond_model=("beyond_model", lambda v: int(v.astype("boolean").fillna(False).sum())))
    out = out.join(agg)
    if contexts is not None and {"expected_distinguished", "in_source_tree"} <= set(contexts.columns):
        mine = contexts[(contexts["block"] == ALL) & (contexts["session"] == ALL)]
        model = mine.groupby(["group", "context"])[
            ["expected_distinguished", "expected_merged", "expected_split_deeper"]].mean()
        model.index = model.index.set_names(["group", "source_context"])
        out = out.join(model.rename(columns=lambda c: c.replace("expected_", "model_")))
    order = {c: i for i, c in enumerate(dict.fromkeys(whole["source_context"]))}
    out = out.reset_index()
    return out.sort_values(["group", "source_context"], key=lambda s: s.map(order) if s.name != "group" else s,
                           kind="stable").reset_index(drop=True)


def _source_probs(learning: pd.DataFrame | None) -> dict[str, str]:
    """Return per source context its next-symbol probabilities, one per line ("red 0.10\ngreen 0.80\n...").

    Read from the groups step's context_learning table (the source's probability beside each guess share);
    empty without it.
    """
    if learning is None or learning.empty:
        return {}
    rows = learning.drop_duplicates(["context", "symbol"])
    return {str(c): "\n".join(f"{s} {number(float(p), '.2f')}" for s, p in zip(part["symbol"], part["source_prob"]))
            for c, part in rows.groupby("context", sort=False)}


def _slug(label: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in str(label))
