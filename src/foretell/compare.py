"""Model comparison tables: per-participant winners, group-level model and family selection, look-alike models.

Tidy wrappers over the fitter's ``fits`` and ``blocks`` tables; the kernels
live in :mod:`foretell.stats.selection`, the words in :mod:`foretell.summaries`.
"""

from __future__ import annotations

import re
from typing import Callable, Iterator, Mapping, Sequence

import numpy as np
import pandas as pd

from .stats.selection import FamilyBMSResult, family_bms, rfx_bms, rfx_gibbs
from .errors import UsageError
from .labels import ALL, block_label
from .models import ModelSpec, lookalike_note
from .validation import check_option, check_seed, child_rng

CRITERIA = ("bic", "cv")
METHODS = ("auto", "variational", "gibbs")

FREQ_MARGIN = 0.05
"""With ``method="auto"``, the Gibbs result replaces the variational one when an expected frequency differs by more."""

XP_MARGIN = 0.10
"""With ``method="auto"``, the Gibbs result replaces the variational one when an exceedance differs by more.

Wider than :data:`FREQ_MARGIN`: the Gibbs exceedance is a Monte-Carlo
fraction (standard error up to 0.025 at the sampler's minimum ESS of 400).
"""

STRENGTH_GRADES = ((10.0, "very-strong"), (6.0, "strong"), (2.0, "positive"), (-np.inf, "bare-mention"))
"""Grades of 2 ln(Bayes factor) by lower bound (Kass & Raftery, 1995): 10 and more, 6 to 10, 2 to 6, below 2."""


# --------------------------------------------------------------------------- evidence tables


def _as_bool(col: pd.Series) -> pd.Series:
    if col.dtype == object or isinstance(col.dtype, pd.StringDtype):
        text = col.astype(str).str.strip().str.lower()
        return text.isin(["true", "1", "yes"])
    return col.fillna(False).astype(bool)


def _group_labels(table: pd.DataFrame) -> pd.Series:
    if "group" not in table.columns:
        return pd.Series(pd.NA, index=table.index, dtype="string")
    return table["group"].astype("string")


def _require(table: pd.DataFrame, columns: Sequence[str], what: str) -> None:
    missing = [c for c in columns if c not in table.columns]
    if missing:
        raise UsageError(f"the {what} table lacks columns {missing}")


def _usable(table: pd.DataFrame, score: pd.Series, flags: Sequence[str]) -> pd.Series:
    """Return "" where ``score`` is usable, else why not (a flag column false, or no score)."""
    note = pd.Series("", index=table.index, dtype=object)
    for flag in flags:
        if flag in table.columns:
            note = note.where((note != "") | _as_bool(table[flag]), f"{flag} false")
    return note.where((note != "") | score.notna(), "missing score")


def _tidy(table: pd.DataFrame, evidence: pd.Series, criterion: str, by: list[str],
          flags: Sequence[str]) -> pd.DataFrame:
    """Return participant, group, *by, model, criterion, log_evidence, note (NaN evidence when unusable)."""
    out = table[["participant", *by, "model"]].copy()
    for key in by:
        out[key] = out[key].map(block_label)
    out.insert(1, "group", _group_labels(table))
    out["criterion"] = criterion
    note = _usable(table, evidence, flags)
    out["log_evidence"] = evidence.where(note == "")
    out["note"] = note
    return out.reset_index(drop=True)


def _block_keys(blocks: pd.DataFrame) -> list[str]:
    """Return the columns naming a block: session and block (blocks restart at each session)."""
    return ["session", "block"] if "session" in blocks.columns else ["block"]


def log_evidence_table(fits: pd.DataFrame, criterion: str = "bic") -> pd.DataFrame:
    """Return one row per participant and model with its whole-session log evidence in nats.

    Parameters
    ----------
    fits : pandas.DataFrame
        The fits table (participant, model, bic or cv_loglik, converged, cv_converged).
    criterion : {"bic", "cv"}
        "bic": log evidence -BIC/2 (Schwarz's approximation of the log
        marginal likelihood; Raftery, 1995), usable when ``converged``;
        "cv": the leave-one-block-out held-out log-likelihood ``cv_loglik``,
        usable when ``converged`` and ``cv_converged``.

    Returns
    -------
    pandas.DataFrame
        participant, group, model, criterion, log_evidence (NaN when
        unusable), note (why it is unusable: "<flag> false" or "missing score").

    Raises
    ------
    UsageError
        For another criterion, or a table without the columns it needs.
    """
    check_option("criterion", criterion, CRITERIA)
    if criterion == "bic":
        _require(fits, ["participant", "model", "bic"], "fits")
        return _tidy(fits, -0.5 * fits["bic"].astype(float), criterion, [], ["converged"])
    _require(fits, ["participant", "model", "cv_loglik"], "fits")
    return _tidy(fits, fits["cv_loglik"].astype(float), criterion, [], ["converged", "cv_converged"])


def block_log_evidence_table(blocks: pd.DataFrame, criterion: str = "bic") -> pd.DataFrame:
    """Return one row per participant, block and model with that block's log evidence in nats.

    Parameters
    ----------
    blocks : pandas.DataFrame
        The blocks table of the fits.
    criterion : {"bic", "cv"}
        "bic": -bic_block/2, where bic_block = n_params ln(n_trials) - 2
        loglik_block (Schwarz, 1978) with every free parameter refitted on the
        block's scored trials, usable when that refit ``converged``; "cv":
        ``cv_loglik_block``, the block's held-out log-likelihood with
        parameters fitted on the other blocks, usable when ``cv_converged``
        (missing when the participant has one block).

    Returns
    -------
    pandas.DataFrame
        participant, group, session (when the table has one: blocks restart
        at each session), block (session and block as strings), model,
        criterion, log_evidence, note.

    Raises
    ------
    UsageError
        For another criterion, or a table without the columns it needs.
    """
    check_option("criterion", criterion, CRITERIA)
    score, flag = ("bic_block", "converged") if criterion == "bic" else ("cv_loglik_block", "cv_converged")
    keys = _block_keys(blocks)
    _require(blocks, ["participant", *keys, "model", score], "blocks")
    evidence = blocks[score].astype(float) * (-0.5 if criterion == "bic" else 1.0)
    return _tidy(blocks, evidence, criterion, keys, [flag])


def _merge(tidy: pd.DataFrame, merge: Sequence[Sequence[str]]) -> tuple[pd.DataFrame, str]:
    """Return ``tidy`` without the look-alikes of the kept models, and the note that says so."""
    present = set(tidy["model"])
    dropped, notes = [], []
    for group in merge:
        members = [m for m in group if m in present]
        if len(members) > 1:
            dropped += members[1:]
            notes.append(lookalike_note(members[0], members[1:]))
    return tidy[~tidy["model"].isin(dropped)], "; ".join(notes)


def _join(*notes: str) -> str:
    return "; ".join(n for n in notes if n)


# --------------------------------------------------------------------------- model families

_COUNT = re.compile(r"count-(\d+)(-leak)?")
_MIX = re.compile(r"mix-(\d+)")


def model_depth(model_id: str) -> int | None:
    """Return the context depth of a counting or mixture model id, None for ``count-task`` and ``source``.

    Parameters
    ----------
    model_id : str

    Returns
    -------
    int or None

    Examples
    --------
    >>> model_depth("count-2-leak"), model_depth("mix-4"), model_depth("source")
    (2, 4, None)
    """
    match = _COUNT.fullmatch(model_id) or _MIX.fullmatch(model_id)
    return int(match.group(1)) if match else None


def default_families(models: Sequence[str | ModelSpec], task_depth: int | None = None) -> dict[str, list[str]]:
    """Return foretell's default model families over ``models`` (empty families dropped).

    Parameters
    ----------
    models : sequence of str or ModelSpec
        A spec carries its own ``family``; for an id the depth is read from the id.
    task_depth : int, optional
        The task's deepest context: ``count-task`` is shallow when it is at most 1.

    Returns
    -------
    dict of str to list of str
        "shallow": depth <= 1, leaky or not; "deep": depth >= 2 (``count-2``
        ..., their leaky versions, ``count-task`` on a task deeper than 1,
        ``mix-D`` with D >= 2). ``source``, the oracle (family None), learns
        nothing and is left out.

    Raises
    ------
    UsageError
        For other ids: pass explicit families.
    """
    fams: dict[str, list[str]] = {"shallow": [], "deep": []}
    unknown = []
    for m in models:
        if isinstance(m, ModelSpec):
            if m.family is not None:
                fams.setdefault(m.family, []).append(m.model_id)
            continue
        depth = model_depth(m)
        if m == "source":
            continue
        if m == "count-task":
            fams["deep" if task_depth is None or task_depth >= 2 else "shallow"].append(m)
        elif depth is not None:
            fams["deep" if depth >= 2 else "shallow"].append(m)
        else:
            unknown.append(m)
    if unknown:
        raise UsageError(f"no default family for models {unknown}; pass families explicitly")
    return {name: members for name, members in fams.items() if members}


# --------------------------------------------------------------------------- group-level selection

FamilySpec = Mapping[str, Sequence[str]] | Callable[[Sequence[str]], Mapping[str, Sequence[str]]]


def _units(tidy: pd.DataFrame, by: list[str], by_group: bool) -> Iterator[tuple[dict, pd.DataFrame, str]]:
    """Yield (labels, participant x model evidence of the usable participants, note) per comparison."""
    models = list(pd.unique(tidy["model"]))
    sets = [(ALL, tidy)]
    if by_group:
        grouped = tidy[tidy["group"].notna()]
        sets += [(str(g), part) for g, part in grouped.groupby("group", sort=True)]
    for group, part in sets:
        parts = part.groupby(by, sort=False) if by else [((), part)]
        for key, unit in parts:
            key = key if isinstance(key, tuple) else (key,)
            wide = unit.pivot_table(index="participant", columns="model", values="log_evidence",
                                    aggfunc="first", dropna=False).reindex(columns=models)
            bad = sorted(set(wide.index[wide.isna().any(axis=1)]) | set(
                unit.loc[unit["log_evidence"].isna(), "participant"]), key=str)
            note = f"left out (unusable evidence): {', '.join(map(str, bad))}" if bad else ""
            yield {"group": group, **dict(zip(by, key))}, wide.dropna(axis=0, how="any"), note


def _disagree(a, b) -> bool:
    return bool(np.max(np.abs(a.expected_freq - b.expected_freq)) > FREQ_MARGIN
                or np.max(np.abs(a.exceedance - b.exceedance)) > XP_MARGIN)


def _posterior(evidence: np.ndarray, models: list[str], spec: Mapping[str, Sequence[str]] | None,
               method: str, alpha0: float, rng: np.random.Generator):
    """Return (result or None, note) of one comparison by ``method`` (see :func:`selection`)."""
    def run(how: str):
        if spec is None:
            return (rfx_bms(evidence, alpha0) if how == "variational"
                    else rfx_gibbs(evidence, alpha0, rng=rng))
        return family_bms(evidence, spec, models, alpha0=alpha0, method=how, rng=rng)

    def failed(res) -> str:
        inner = res.models if isinstance(res, FamilyBMSResult) else res
        if inner.method == "variational":
            return f"variational scheme did not converge in {inner.n_iter} iterations"
        return (f"Gibbs sampler did not converge (R-hat {inner.rhat.max():.3f}, "
                f"ESS {inner.ess.min():.0f} after {inner.n_draws} draws per chain)")

    if method != "auto":
        res = run(method)
        return (res, "") if res.converged else (None, failed(res))
    vb, gibbs = run("variational"), run("gibbs")
    if vb.converged and gibbs.converged:
        if _disagree(vb, gibbs):
            return gibbs, "variational and Gibbs posteriors disagree; Gibbs used"
        return vb, ""
    if gibbs.converged:
        return gibbs, failed(vb)
    if vb.converged:
        return vb, f"{failed(gibbs)}; variational result unchecked"
    return None, _join(failed(vb), failed(gibbs))


def _select_rows(tidy: pd.DataFrame, by: list[str], by_group: bool, families_spec: FamilySpec | None,
                 merge: Sequence[Sequence[str]], method: str, alpha0: float, seed: int) -> pd.DataFrame:
    check_option("method", method, METHODS)
    seed = check_seed(seed)
    criterion = tidy["criterion"].iloc[0] if len(tidy) else None
    tidy, merged = _merge(tidy, merge)
    label = "family" if families_spec is not None else "model"
    rows = []
    for labels, wide, note in _units(tidy, by, by_group):
        models = list(wide.columns)
        spec = None
        if families_spec is not None:
            given = families_spec(models) if callable(families_spec) else families_spec
            spec = {name: [m for m in members if m in models] for name, members in given.items()}
            empty = [name for name, members in spec.items() if not members]
            spec = {name: members for name, members in spec.items() if members}
            inside = [m for members in spec.values() for m in members]
            outside = [m for m in models if m not in inside]
            note = _join(note, f"not in any family: {', '.join(outside)}" if outside else "",
                         f"no compared model in family: {', '.join(empty)}" if empty else "")
            models = [m for m in models if m in inside]
            wide = wide[models]
        names = list(spec) if spec is not None else models
        result, used = None, ""
        if len(wide) and names:
            # keyed by the participants compared, not the group's name: the same people (a single
            # group and "all") get the same draws, so Monte Carlo error cannot give them two verdicts
            unit = [v for k, v in labels.items() if k != "group"]
            rng = child_rng(seed, label, *unit, *sorted(map(str, wide.index)))
            result, why = _posterior(wide.to_numpy(), models, spec, method, alpha0, rng)
            used = result.method if result is not None else ""
            note = _join(note, why)
        elif not note:
            note = "no participants" if not len(wide) else "no models"
        base = {**labels, "n_participants": len(wide), "criterion": criterion, "method": used}
        for i, name in enumerate(names):
            row = {**base, label: name, "note": _join(merged, note)}
            if spec is not None:
                row["models"] = ";".join(spec[name])
            if result is None:
                row.update(expected_freq=np.nan, exceedance=np.nan, protected_exceedance=np.nan,
                           omnibus_risk=np.nan, freq_concentration=np.nan)
            else:
                row.update(expected_freq=result.expected_freq[i], exceedance=result.exceedance[i],
                           protected_exceedance=result.protected_exceedance[i], omnibus_risk=result.bor,
                           freq_concentration=result.alpha[i])
            rows.append(row)
    columns = (["group", *by, label, "expected_freq", "exceedance", "protected_exceedance", "omnibus_risk",
                "freq_concentration", "n_participants", "criterion", "method"]
               + (["models"] if families_spec is not None else []) + ["note"])
    return pd.DataFrame(rows, columns=columns)


def selection(fits: pd.DataFrame, *, criterion: str = "bic", by_group: bool = True,
              merge: Sequence[Sequence[str]] = (), method: str = "auto", alpha0: float = 1.0,
              seed: int = 0) -> pd.DataFrame:
    """Return random-effects model selection over participants' whole sessions, for everyone and per group.

    Parameters
    ----------
    fits : pandas.DataFrame
        The fits table; evidence as in :func:`log_evidence_table`.
    criterion : {"bic", "cv"}
    by_group : bool, default True
        Add a comparison per group besides ``all``.
    merge : sequence of sequence of str
        Look-alike sets from :func:`lookalikes` (the first of each kept);
        empty to compare every model.
    method : {"auto", "variational", "gibbs"}
        "auto": the variational result unless the Gibbs sampler (run as a
        check) differs from it by more than :data:`FREQ_MARGIN` in an
        expected frequency or :data:`XP_MARGIN` in an exceedance, then the
        Gibbs result; a scheme that does not converge is not used.
    alpha0 : float, default 1.0
        The Dirichlet prior on frequencies (per family for families).
    seed : int or numpy.random.Generator, default 0
        The Gibbs sampler's seed: each comparison draws from
        ``child_rng(seed, "model" or "family", session, block, *participants)``.

    Returns
    -------
    pandas.DataFrame
        group (``all``, then each group), model, expected_freq (posterior
        mean frequency), exceedance (posterior probability of being more
        frequent than every other), protected_exceedance ((1 - r)
        exceedance + r / K, r the omnibus risk), omnibus_risk (Bayesian
        omnibus risk: the posterior probability that all models are equally
        frequent), freq_concentration
        (the posterior Dirichlet parameter, or alpha0 + the posterior mean
        count with Gibbs), n_participants (those with usable evidence for
        every model), criterion, method ("variational", "gibbs", or empty when
        nothing could be computed), note (participants and look-alikes left
        out, failures).

    Notes
    -----
    Inputs that fail refuse to speak: a participant with unusable evidence
    for any model is left out of the comparison and named in ``note``
    (random-effects selection needs every model's evidence for every
    participant it counts); when nobody is left, or no scheme converged,
    every number is NaN and ``note`` says why.

    References
    ----------
    Stephan, K. E. et al. (2009). Bayesian model selection for group studies.
    NeuroImage 46, 1004-1017. Penny, W. D. et al. (2010). Comparing families of
    dynamic causal models. PLoS Comput. Biol. 6, e1000709. Rigoux, L. et al.
    (2014). Bayesian model selection for group studies - revisited.
    NeuroImage 84, 971-985.
    """
    return _select_rows(log_evidence_table(fits, criterion), [], by_group, None, merge, method, alpha0, seed)


def selection_blocks(blocks: pd.DataFrame, *, criterion: str = "bic", by_group: bool = True,
                     merge: Sequence[Sequence[str]] = (), method: str = "auto", alpha0: float = 1.0,
                     seed: int = 0) -> pd.DataFrame:
    """Return :func:`selection` for every block, from each block's own evidence.

    Parameters
    ----------
    blocks : pandas.DataFrame
        The blocks table; evidence as in :func:`block_log_evidence_table`
        (with "bic" the per-block refit's -bic_block/2, with "cv" the block's
        held-out log-likelihood).
    criterion, by_group, merge, method, alpha0, seed
        As :func:`selection`.

    Returns
    -------
    pandas.DataFrame
        group, session (when ``blocks`` has one), block (as strings), then
        the columns of :func:`selection`.
    """
    tidy = block_log_evidence_table(blocks, criterion)
    return _select_rows(tidy, _block_keys(blocks), by_group, None, merge, method, alpha0, seed)


def families(fits: pd.DataFrame, families: FamilySpec | None = None, *, criterion: str = "bic",
             by_group: bool = True, merge: Sequence[Sequence[str]] = (), method: str = "gibbs",
             alpha0: float = 1.0, seed: int = 0) -> pd.DataFrame:
    """Return family-level model selection (Penny et al., 2010) over whole sessions, for everyone and per group.

    Parameters
    ----------
    fits : pandas.DataFrame
    families : mapping or callable, optional
        Family names -> model ids, or a function of the compared model ids
        returning such a map (default :func:`default_families`; pass
        ``default_families(specs)`` to use each spec's family). Models in no
        family are left out (named in ``note``).
    criterion, by_group, merge, alpha0, seed
        As :func:`selection`.
    method : {"gibbs", "variational", "auto"}, default "gibbs"
        With unequal family sizes the variational scheme can be far off.

    Returns
    -------
    pandas.DataFrame
        group, family, then the columns of :func:`selection` (expected_freq,
        exceedance and freq_concentration summed over the family's models)
        and models (the family's compared models, ";"-joined).
    """
    return _select_rows(log_evidence_table(fits, criterion), [], by_group, families or default_families,
                        merge, method, alpha0, seed)


def families_blocks(blocks: pd.DataFrame, families: FamilySpec | None = None, *, criterion: str = "bic",
                    by_group: bool = True, merge: Sequence[Sequence[str]] = (), method: str = "gibbs",
                    alpha0: float = 1.0, seed: int = 0) -> pd.DataFrame:
    """Return :func:`families` for every block, from each block's own evidence.

    Parameters
    ----------
    blocks : pandas.DataFrame
        Evidence as in :func:`block_log_evidence_table`.
    families, criterion, by_group, merge, method, alpha0, seed
        As :func:`families`.

    Returns
    -------
    pandas.DataFrame
        group, session (when ``blocks`` has one), block, then the columns of :func:`families`.
    """
    tidy = block_log_evidence_table(blocks, criterion)
    return _select_rows(tidy, _block_keys(blocks), by_group, families or default_families, merge,
                        method, alpha0, seed)


# --------------------------------------------------------------------------- winners


def strength(delta: float) -> str | None:
    """Return the Kass & Raftery (1995) grade of 2 ln BF = ``delta``.

    Parameters
    ----------
    delta : float

    Returns
    -------
    str or None
        "bare-mention" (< 2, not worth more than a bare mention), "positive"
        (2 to 6), "strong" (6 to 10), "very-strong" (> 10); None when NaN.

    References
    ----------
    Kass, R. E., & Raftery, A. E. (1995). Bayes factors. JASA 90, 773-795.

    Examples
    --------
    >>> strength(7.5)
    'strong'
    """
    if delta is None or np.isnan(delta):
        return None
    return next(name for low, name in STRENGTH_GRADES if delta >= low)


def winners(fits: pd.DataFrame, blocks: pd.DataFrame | None = None, *, criterion: str = "bic",
            merge: Sequence[Sequence[str]] = ()) -> pd.DataFrame:
    """Return each participant's best model for the whole session and for every block.

    Parameters
    ----------
    fits : pandas.DataFrame
    blocks : pandas.DataFrame, optional
    criterion : {"bic", "cv"}
        Log evidence -BIC/2 (whole session: ``bic``; block: ``bic_block`` of
        the per-block refit) or the held-out log-likelihood (``cv_loglik``,
        ``cv_loglik_block``); usability as in :func:`log_evidence_table`.
    merge : sequence of sequence of str
        Look-alike sets (:func:`lookalikes`).

    Returns
    -------
    pandas.DataFrame
        participant, group, session (only when ``blocks`` has one), block
        (``all`` for the whole session, else the number as a string),
        best_model, runner_up, criterion, delta (2 x the log-evidence
        difference of best and runner-up: 2 ln(Bayes factor), approximately
        for BIC, by analogy for CV; NaN with one usable model), strength
        (:func:`strength` of delta; empty when delta is NaN or a model was left
        out as unusable: it might have won), n_models (usable models), note
        (models left out as unusable, look-alikes left out).
    """
    keys = _block_keys(blocks) if blocks is not None else ["block"]
    tables = [log_evidence_table(fits, criterion).assign(**{k: ALL for k in keys})]
    if blocks is not None:
        tables.append(block_log_evidence_table(blocks, criterion))
    tidy, merged = _merge(pd.concat(tables, ignore_index=True), merge)
    rows = []
    for labels, unit in tidy.groupby(["participant", *keys], sort=False):
        usable = unit[unit["log_evidence"].notna()].sort_values("log_evidence", ascending=False,
                                                                 kind="stable")
        left_out = unit.loc[unit["log_evidence"].isna(), "model"].tolist()
        best = usable.iloc[0] if len(usable) else None
        runner = usable.iloc[1] if len(usable) > 1 else None
        delta = 2.0 * (best["log_evidence"] - runner["log_evidence"]) if runner is not None else np.nan
        rows.append({
            **dict(zip(["participant", *keys], labels)), "group": unit["group"].iloc[0],
            "best_model": best["model"] if best is not None else None,
            "runner_up": runner["model"] if runner is not None else None,
            "criterion": criterion, "delta": delta,
            "strength": None if left_out else strength(delta), "n_models": len(usable),
            "note": _join(f"left out (unusable fit): {', '.join(left_out)}" if left_out else "", merged),
        })
    columns = ["participant", "group", *keys, "best_model", "runner_up", "criterion", "delta", "strength",
               "n_models", "note"]
    return pd.DataFrame(rows, columns=columns)
