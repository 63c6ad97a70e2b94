"""Model comparison: group-level random-effects model selection, model families, winners.

Kernels (pure numpy, no pandas): :func:`rfx_bms`, :func:`family_bms`,
:func:`exceedance_prob`, :func:`default_families`. Tidy wrappers over the
fitter's ``fits`` and ``blocks`` tables: :func:`log_evidence_table`,
:func:`block_log_evidence_table`, :func:`selection`, :func:`selection_blocks`,
:func:`families`, :func:`families_blocks`, :func:`winners`, :func:`summary_text`.

Inputs that fail refuse to speak
--------------------------------
A participant's log evidence for a model is *unusable* when the fit did not
converge (``converged`` is false) or when the score is missing or NaN. A
group comparison then leaves that participant out entirely (random-effects
selection needs every model's evidence for every participant it counts) and
says so in the ``note`` column, with a :class:`UserWarning`; ``n_participants``
counts only those kept. When nobody is left, or when the variational scheme
does not converge, every number of that comparison is NaN and ``note`` says
why. Winners are chosen among the usable models of a participant and block;
when any model had to be left out, ``clear`` is false and ``note`` names the
models left out (the excluded fit might have won).

References
----------
Stephan, K. E., Penny, W. D., Daunizeau, J., Moran, R. J., & Friston, K. J.
(2009). Bayesian model selection for group studies. NeuroImage 46, 1004-1017.
Penny, W. D., Stephan, K. E., Daunizeau, J., et al. (2010). Comparing
families of dynamic causal models. PLoS Comput. Biol. 6, e1000709.
Rigoux, L., Stephan, K. E., Friston, K. J., & Daunizeau, J. (2014). Bayesian
model selection for group studies - revisited. NeuroImage 84, 971-985.
Raftery, A. E. (1995). Bayesian model selection in social research.
Sociological Methodology 25, 111-163.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import integrate, stats
from scipy.special import digamma, gammainc, gammaln, logsumexp, softmax, xlogy

from .labels import ALL, block_label

CLEAR_DELTA_BIC = 2.0
"""A BIC difference of at least 2 is 'positive' evidence (Raftery, 1995)."""

CLEAR_PXP = 0.95
"""Protected exceedance from which the summary calls a winner clear (common practice)."""

CRITERIA = ("bic", "cv")


# --------------------------------------------------------------------------- kernels


@dataclass(frozen=True)
class BMSResult:
    """Posterior of random-effects Bayesian model selection over K models.

    ``alpha`` is the Dirichlet posterior over model frequencies,
    ``expected_freq`` = alpha / sum(alpha), ``exceedance`` the probability
    that each model is more frequent than every other, ``bor`` the Bayesian
    omnibus risk, ``protected_exceedance`` = (1 - bor) * exceedance + bor / K,
    ``posterior`` (N, K) the probability that participant n's data came from
    model k, ``free_energy`` (F1) and ``null_log_evidence`` (F0) in nats,
    ``n_iter`` and ``converged`` describe the variational iterations.
    """

    alpha0: np.ndarray
    alpha: np.ndarray
    expected_freq: np.ndarray
    exceedance: np.ndarray
    protected_exceedance: np.ndarray
    bor: float
    posterior: np.ndarray
    free_energy: float
    null_log_evidence: float
    n_iter: int
    converged: bool


@dataclass(frozen=True)
class FamilyBMSResult:
    """Posterior of family-level random-effects selection (Penny et al., 2010).

    ``families`` names the families in the order of the arrays; ``members``
    gives each family's model columns; ``alpha`` is the family Dirichlet
    posterior (the sum of its models' alphas), ``expected_freq``,
    ``exceedance``, ``bor`` and ``protected_exceedance`` = (1 - bor) * xp +
    bor / F are at the family level; ``models`` is the underlying model-level
    result, fitted with the family-balanced prior.
    """

    families: tuple[str, ...]
    members: tuple[tuple[int, ...], ...]
    alpha: np.ndarray
    expected_freq: np.ndarray
    exceedance: np.ndarray
    protected_exceedance: np.ndarray
    bor: float
    models: BMSResult


def _check_evidence(log_evidence: np.ndarray) -> np.ndarray:
    lme = np.asarray(log_evidence, dtype=float)
    if lme.ndim != 2 or lme.shape[0] < 1 or lme.shape[1] < 1:
        raise ValueError(f"log_evidence must be a 2-D array (n_subjects, n_models) with at least "
                         f"one of each; got shape {lme.shape}")
    if np.isnan(lme).any() or np.isposinf(lme).any():
        raise ValueError("log_evidence must not contain NaN or +inf (-inf means 'impossible')")
    impossible = np.isneginf(lme).all(axis=1)
    if impossible.any():
        raise ValueError(f"log_evidence is -inf for every model in rows {np.flatnonzero(impossible).tolist()}: "
                         "no model can explain these subjects")
    return lme


def _prior(alpha0: float | np.ndarray, n_models: int) -> np.ndarray:
    a0 = np.broadcast_to(np.asarray(alpha0, dtype=float), (n_models,)).copy()
    if not np.all(np.isfinite(a0)) or np.any(a0 <= 0):
        raise ValueError(f"alpha0 must be positive and finite; got {alpha0!r}")
    return a0


def exceedance_prob(alpha: np.ndarray, *, method: str = "exact", n_samples: int = 100_000,
                    rng: np.random.Generator | int | None = None) -> np.ndarray:
    """Return xp_k = P(r_k > r_j for every j != k) for r ~ Dirichlet(alpha).

    ``method="exact"``: for two models the closed form xp_1 = 1 - I_{1/2}(a1, a2),
    the regularised incomplete Beta function (Stephan et al., 2009); for more,
    one-dimensional quadrature over the Gamma representation of the Dirichlet
    (r = G / sum G with G_k ~ Gamma(alpha_k) independent, so r_k is the largest
    iff G_k is): xp_k = int_0^inf f_{a_k}(g) prod_{j != k} F_{a_j}(g) dg.
    ``method="sampling"``: the fraction of ``n_samples`` Dirichlet draws in
    which model k is the largest, from ``rng`` (a Generator or a seed; needed).
    """
    a = np.asarray(alpha, dtype=float)
    k = a.size
    if k == 1:
        return np.ones(1)
    if method == "sampling":
        if rng is None:
            raise ValueError("exceedance by sampling needs rng (a numpy Generator or a seed)")
        draws = np.random.default_rng(rng).dirichlet(a, size=n_samples)
        return np.bincount(draws.argmax(axis=1), minlength=k) / n_samples
    if method != "exact":
        raise ValueError(f"method must be 'exact' or 'sampling'; got {method!r}")
    if k == 2:
        xp1 = stats.beta.sf(0.5, a[0], a[1])
        return np.array([xp1, 1.0 - xp1])
    xp = np.empty(k)
    for i in range(k):
        others = np.delete(a, i)

        def integrand(g: float, i: int = i, others: np.ndarray = others) -> float:
            # Gamma(a, 1) density times the product of the others' CDFs (regularised gammainc)
            with np.errstate(divide="ignore"):
                log_f = (a[i] - 1.0) * np.log(g) - g - gammaln(a[i]) + np.log(gammainc(others, g)).sum()
            return float(np.exp(log_f))

        lo, hi = stats.gamma.ppf(1e-15, a[i]), stats.gamma.isf(1e-15, a[i])
        mode = max(a[i] - 1.0, lo)
        xp[i] = integrate.quad(integrand, lo, hi, points=[mode], limit=200, epsabs=1e-12)[0]
    return xp


def _free_energy(lme: np.ndarray, alpha0: np.ndarray, alpha: np.ndarray, g: np.ndarray) -> float:
    """Return the variational free energy F1 of the RFX model (Stephan et al., 2009, eq. 7-14).

    F = sum_nk g_nk (L_nk + E[log r_k]) - sum_nk g_nk log g_nk
        + E[log Dir(r | alpha0)] - E[log Dir(r | alpha)],  E[log r_k] = psi(a_k) - psi(sum a).
    """
    elogr = digamma(alpha) - digamma(alpha.sum())
    fit = np.where(g > 0, g * (np.where(np.isneginf(lme), 0.0, lme) + elogr), 0.0).sum()
    entropy = -xlogy(g, g).sum()

    def e_log_dir(a: np.ndarray) -> float:
        return gammaln(a.sum()) - gammaln(a).sum() + ((a - 1.0) * elogr).sum()

    return float(fit + entropy + e_log_dir(alpha0) - e_log_dir(alpha))


def rfx_bms(log_evidence: np.ndarray, alpha0: float | np.ndarray = 1.0, *, tol: float = 1e-10,
            max_iter: int = 10_000, exceedance_method: str = "exact", n_samples: int = 100_000,
            rng: np.random.Generator | int | None = None) -> BMSResult:
    """Return the random-effects model-selection posterior for log evidence (N subjects, K models).

    Variational Bayes of Stephan et al. (2009): iterate
    u_nk = exp(L_nk + psi(a_k) - psi(sum a)), g_nk = u_nk / sum_k u_nk,
    a = alpha0 + sum_n g_n  until max |delta a| < tol. Then expected frequencies
    a / sum a, exceedance probabilities (:func:`exceedance_prob`), and after
    Rigoux et al. (2014) the Bayesian omnibus risk BOR = 1 / (1 + exp(F1 - F0)),
    with F1 the free energy of the RFX model and F0 = sum_n log sum_k r0_k e^{L_nk}
    the exact log evidence of the null that frequencies are fixed at the prior
    mean r0 = alpha0 / sum alpha0 (all models equally frequent for a uniform
    alpha0), and pxp = (1 - BOR) xp + BOR / K.

    ``L`` is in nats (e.g. -BIC/2). An entry -inf means the model cannot produce
    that subject's data. With one model, xp = pxp = 1 and BOR is NaN (there is
    nothing to compare).
    """
    lme = _check_evidence(log_evidence)
    n, k = lme.shape
    a0 = _prior(alpha0, k)
    alpha = a0.copy()
    converged = False
    n_iter = 0
    for n_iter in range(1, max_iter + 1):
        g = softmax(lme + (digamma(alpha) - digamma(alpha.sum())), axis=1)
        new = a0 + g.sum(axis=0)
        change = np.max(np.abs(new - alpha))
        alpha = new
        if change < tol:
            converged = True
            break
    g = softmax(lme + (digamma(alpha) - digamma(alpha.sum())), axis=1)
    f1 = _free_energy(lme, a0, alpha, g)
    f0 = float(logsumexp(lme, axis=1, b=a0 / a0.sum()).sum())
    xp = exceedance_prob(alpha, method=exceedance_method, n_samples=n_samples, rng=rng)
    if k == 1:
        bor = float("nan")
        pxp = np.ones(1)
    else:
        bor = float(1.0 / (1.0 + np.exp(np.clip(f1 - f0, -700, 700))))
        pxp = (1.0 - bor) * xp + bor / k
    return BMSResult(alpha0=a0, alpha=alpha, expected_freq=alpha / alpha.sum(), exceedance=xp,
                     protected_exceedance=pxp, bor=bor, posterior=g, free_energy=f1,
                     null_log_evidence=f0, n_iter=n_iter, converged=converged)


def family_bms(log_evidence: np.ndarray, families: Mapping[str, Sequence[int | str]],
               model_ids: Sequence[str] | None = None, *, alpha0: float = 1.0,
               **options) -> FamilyBMSResult:
    """Return the family-level random-effects selection posterior (Penny et al., 2010).

    ``families`` maps a family name to its models, as column indices or as
    model ids (then ``model_ids`` names the columns); the families must
    partition the models. The model-level prior spreads each family's prior
    mass ``alpha0`` uniformly over its N_f members (a_k = alpha0 / N_f), so
    every family gets the same prior; the family posterior is the Dirichlet
    with a_f = sum_{k in f} a_k (aggregation property of the Dirichlet), from
    which family frequencies and exceedances follow. The omnibus risk compares
    with the null that families are equally frequent (and models equally
    frequent within a family), i.e. the prior mean; pxp = (1 - BOR) xp + BOR / F.
    ``options`` go to :func:`rfx_bms`.
    """
    lme = _check_evidence(log_evidence)
    k = lme.shape[1]
    index = {m: i for i, m in enumerate(model_ids)} if model_ids is not None else {}
    if model_ids is not None and len(index) != k:
        raise ValueError(f"model_ids must name the {k} columns once each; got {list(model_ids)}")
    members = []
    for name, models in families.items():
        try:
            cols = tuple(index[m] if isinstance(m, str) else int(m) for m in models)
        except KeyError as err:
            raise ValueError(f"family {name!r} names an unknown model {err.args[0]!r}") from None
        if not cols:
            raise ValueError(f"family {name!r} has no models")
        members.append(cols)
    flat = sorted(c for cols in members for c in cols)
    if flat != list(range(k)):
        raise ValueError(f"families must partition the {k} models (each in exactly one family); "
                         f"got {dict(zip(families, members))}")
    a0 = np.empty(k)
    for cols in members:
        a0[list(cols)] = alpha0 / len(cols)
    res = rfx_bms(lme, a0, **options)
    fam_alpha = np.array([res.alpha[list(cols)].sum() for cols in members])
    xp = exceedance_prob(fam_alpha, method=options.get("exceedance_method", "exact"),
                         n_samples=options.get("n_samples", 100_000), rng=options.get("rng"))
    n_fam = len(members)
    bor = res.bor if n_fam > 1 else float("nan")
    pxp = (1.0 - bor) * xp + bor / n_fam if n_fam > 1 else np.ones(1)
    return FamilyBMSResult(families=tuple(families), members=tuple(members), alpha=fam_alpha,
                           expected_freq=fam_alpha / fam_alpha.sum(), exceedance=xp,
                           protected_exceedance=pxp, bor=bor, models=res)


# --------------------------------------------------------------------------- model families

_COUNT = re.compile(r"count-(\d+)(-leak)?")
_MIX = re.compile(r"mix-(\d+)")


def model_depth(model_id: str) -> int | None:
    """Return the context depth of a counting or mixture model id, None for ``count-task`` and ``source``."""
    match = _COUNT.fullmatch(model_id) or _MIX.fullmatch(model_id)
    return int(match.group(1)) if match else None


def default_families(model_ids: Sequence[str], task_depth: int | None = None) -> dict[str, list[str]]:
    """Return foretell's default model families over ``model_ids`` (empty families dropped).

    "shallow": depth <= 1, leaky or not (``count-0``, ``count-1``, ``count-0-leak``,
    ``count-1-leak``, and ``mix-0``/``mix-1`` if present); "deep": depth >= 2
    (``count-2`` ..., their leaky versions, ``count-task``, ``mix-D`` with D >= 2).
    ``count-task`` counts on the task's contexts, so with ``task_depth`` (the
    task's deepest context) given and at most 1 it is shallow.
    ``source``, the oracle, learns nothing and is neither: it is left out of
    the family comparison (which then runs on the other models only). Other
    ids raise ValueError: pass explicit families for them.
    """
    fams: dict[str, list[str]] = {"shallow": [], "deep": []}
    unknown = []
    for m in model_ids:
        depth = model_depth(m)
        if m == "source":
            continue
        if m == "count-task":
            fams["deep" if task_depth is None or task_depth >= 2 else "shallow"].append(m)
        elif depth is not None and depth >= 2:
            fams["deep"].append(m)
        elif depth is not None:
            fams["shallow"].append(m)
        else:
            unknown.append(m)
    if unknown:
        raise ValueError(f"no default family for models {unknown}; pass families explicitly")
    return {name: models for name, models in fams.items() if models}


# --------------------------------------------------------------------------- tidy wrappers


def _as_bool(col: pd.Series) -> pd.Series:
    if col.dtype == object or isinstance(col.dtype, pd.StringDtype):
        text = col.astype(str).str.strip().str.lower()
        return text.isin(["true", "1", "yes"])
    return col.fillna(False).astype(bool)


def _group_labels(table: pd.DataFrame) -> pd.Series:
    if "group" not in table.columns:
        return pd.Series(pd.NA, index=table.index, dtype="string")
    return table["group"].astype("string")


def _tidy(table: pd.DataFrame, evidence: pd.Series, criterion: str, by: list[str],
          ok: pd.Series | None) -> pd.DataFrame:
    """Return participant, group, *by, model, criterion, log_evidence, note (NaN evidence when unusable)."""
    out = table[["participant", *by, "model"]].copy()
    out.insert(1, "group", _group_labels(table))
    out["criterion"] = criterion
    note = pd.Series("", index=table.index, dtype=object)
    if ok is not None:
        note = note.where(ok, "not converged")
    note = note.where(evidence.notna() | (note != ""), "missing score")
    out["log_evidence"] = evidence.where(note == "")
    out["note"] = note
    return out.reset_index(drop=True)


def _converged(fits: pd.DataFrame, columns: Sequence[str]) -> pd.Series | None:
    present = [c for c in columns if c in fits.columns]
    if not present:
        return None
    ok = pd.Series(True, index=fits.index)
    for c in present:
        ok &= _as_bool(fits[c])
    return ok


def _block_keys(blocks: pd.DataFrame) -> list[str]:
    """Return the columns naming a block: session and block (blocks restart at each session)."""
    return ["session", "block"] if "session" in blocks.columns else ["block"]


def log_evidence_table(fits: pd.DataFrame, criterion: str = "bic") -> pd.DataFrame:
    """Return one row per participant and model with its log evidence in nats.

    ``criterion="bic"``: log evidence = -BIC / 2 (Schwarz's approximation of
    the log marginal likelihood, Raftery, 1995); ``"cv"``: the leave-one-block-out
    held-out log-likelihood ``cv_loglik``. Columns participant, group, model,
    criterion, log_evidence, note; log_evidence is NaN and note says why for a
    fit that did not converge (``converged``; with "cv" also ``cv_converged``,
    when the table has them) or has no score.
    """
    if criterion not in CRITERIA:
        raise ValueError(f"criterion must be one of {CRITERIA}; got {criterion!r}")
    if criterion == "bic":
        score, ok = -0.5 * fits["bic"].astype(float), _converged(fits, ["converged"])
    else:
        score, ok = fits["cv_loglik"].astype(float), _converged(fits, ["converged", "cv_converged"])
    return _tidy(fits, score, criterion, [], ok)


def block_log_evidence_table(blocks: pd.DataFrame, fits: pd.DataFrame | None = None) -> pd.DataFrame:
    """Return one row per participant, block and model with log evidence -BIC/2 of that block.

    BIC_b = -2 loglik_b + n_params ln(n_trials_b) (Schwarz, 1978; n = the scored
    trials of the block), with n_params from the table or 2 (inv_temp and lapse).
    Columns as :func:`log_evidence_table` plus session (when the table has one:
    blocks restart at each session) and block. A block's ``loglik`` comes from
    the participant's whole-session fit, so it is usable when that fit
    converged: pass ``fits`` to check; the blocks table's own ``converged``
    (the per-block refit of inv_temp and lapse) is not used. A block without
    scored trials has no score.
    """
    n_params = blocks["n_params"].astype(float) if "n_params" in blocks.columns else 2.0
    n_trials = blocks["n_trials"].astype(float)
    score = blocks["loglik"].astype(float) - 0.5 * n_params * np.log(n_trials.where(n_trials > 0))
    ok = None
    if fits is not None:
        fit_ok = _converged(fits, ["converged"])
        if fit_ok is not None:
            failed = set(map(tuple, fits.loc[~fit_ok, ["participant", "model"]].to_numpy().tolist()))
            pairs = blocks[["participant", "model"]].to_numpy().tolist()
            ok = pd.Series([tuple(pm) not in failed for pm in pairs], index=blocks.index)
    return _tidy(blocks, score, "bic", _block_keys(blocks), ok)


def _units(tidy: pd.DataFrame, by: list[str], by_group: bool):
    """Yield (labels, matrix DataFrame participant x model, note) for every comparison to run."""
    models = list(pd.unique(tidy["model"]))
    sets = [(ALL, tidy)]
    if by_group:
        grouped = tidy[tidy["group"].notna()]
        sets += [(str(g), part) for g, part in grouped.groupby("group", sort=True)]
    for group, part in sets:
        parts = part.groupby(by, sort=True) if by else [((), part)]
        for key, unit in parts:
            key = key if isinstance(key, tuple) else (key,)
            wide = unit.pivot_table(index="participant", columns="model", values="log_evidence",
                                    aggfunc="first", dropna=False).reindex(columns=models)
            bad = unit.loc[unit["log_evidence"].isna(), "participant"].unique().tolist()
            bad += wide.index[wide.isna().any(axis=1)].difference(bad).tolist()
            note = ""
            if bad:
                note = f"left out (unusable evidence): {', '.join(map(str, sorted(set(bad), key=str)))}"
                warnings.warn(f"model selection, group {group} {dict(zip(by, key))}: {note}", stacklevel=3)
            yield {"group": group, **dict(zip(by, key))}, wide.dropna(axis=0, how="any"), note


def _select_rows(tidy: pd.DataFrame, by: list[str], by_group: bool, families_spec, **options) -> pd.DataFrame:
    rows = []
    criterion = tidy["criterion"].iloc[0] if len(tidy) else "bic"
    for labels, wide, note in _units(tidy, by, by_group):
        models = list(wide.columns)
        spec = None
        if families_spec is not None:
            spec = families_spec(models) if callable(families_spec) else families_spec
            names = list(spec)
            members = [m for name in names for m in spec[name]]
            outside = [m for m in models if m not in members]
            if outside:
                note = "; ".join(filter(None, [note, f"not in any family: {', '.join(outside)}"]))
            wide, models = wide[[m for m in models if m in members]], [m for m in models if m in members]
        else:
            names = models
        base = {**labels, "n_participants": len(wide), "criterion": criterion}
        result = None
        if len(wide):
            if spec is None:
                result = rfx_bms(wide.to_numpy(), **options)
                vb = result
            else:
                result = family_bms(wide.to_numpy(), spec, models, **options)
                vb = result.models
            if not vb.converged:
                note = "; ".join(filter(None, [note, f"variational scheme did not converge in {vb.n_iter} iterations"]))
                result = None
        elif not note:
            note = "no participants"
        for i, name in enumerate(names):
            row = {**base, ("family" if spec is not None else "model"): name}
            if spec is not None:
                row["models"] = ";".join(spec[name])
            if result is None:
                row.update(alpha=np.nan, expected_freq=np.nan, exceedance=np.nan,
                           protected_exceedance=np.nan, bor=np.nan)
            else:
                row.update(alpha=result.alpha[i], expected_freq=result.expected_freq[i],
                           exceedance=result.exceedance[i],
                           protected_exceedance=result.protected_exceedance[i], bor=result.bor)
            row["note"] = note
            rows.append(row)
    first = ["group", *by, "family" if families_spec is not None else "model"]
    frame = pd.DataFrame(rows)
    rest = ["expected_freq", "exceedance", "protected_exceedance", "bor", "alpha",
            "n_participants", "criterion"] + (["models"] if families_spec is not None else []) + ["note"]
    return frame.reindex(columns=first + rest)


def selection(fits: pd.DataFrame, *, by_group: bool = True, criterion: str = "bic", **options) -> pd.DataFrame:
    """Return random-effects model selection over participants, for everyone and per group.

    Columns group (``all`` for everyone, then each group when the table has
    one), model, expected_freq, exceedance, protected_exceedance, bor, alpha,
    n_participants, criterion, note; see :func:`rfx_bms` (Stephan et al., 2009;
    Rigoux et al., 2014). ``options`` go to :func:`rfx_bms` (e.g. ``alpha0``).
    """
    return _select_rows(log_evidence_table(fits, criterion), [], by_group, None, **options)


def selection_blocks(blocks: pd.DataFrame, fits: pd.DataFrame | None = None, *, by_group: bool = True,
                     **options) -> pd.DataFrame:
    """Return :func:`selection` for every block, from the per-block -BIC/2.

    Columns of :func:`selection` plus session (when ``blocks`` has one) and
    block; evidence as in :func:`block_log_evidence_table` (``fits`` checks
    convergence of the whole-session fits).
    """
    return _select_rows(block_log_evidence_table(blocks, fits), _block_keys(blocks), by_group, None,
                        **options)


def families(fits: pd.DataFrame, families: Mapping[str, Sequence[str]] | None = None, *,
             by_group: bool = True, criterion: str = "bic", **options) -> pd.DataFrame:
    """Return family-level model selection (Penny et al., 2010), for everyone and per group.

    ``families`` maps names to model ids (default :func:`default_families`).
    Columns group, family, expected_freq, exceedance, protected_exceedance,
    bor, alpha, n_participants, criterion, models (";"-joined), note.
    """
    return _select_rows(log_evidence_table(fits, criterion), [], by_group,
                        families or default_families, **options)


def families_blocks(blocks: pd.DataFrame, families: Mapping[str, Sequence[str]] | None = None,
                    fits: pd.DataFrame | None = None, *, by_group: bool = True, **options) -> pd.DataFrame:
    """Return :func:`families` for every block, from the per-block -BIC/2 (columns as :func:`selection_blocks`)."""
    return _select_rows(block_log_evidence_table(blocks, fits), _block_keys(blocks), by_group,
                        families or default_families, **options)


def winners(fits: pd.DataFrame, blocks: pd.DataFrame | None = None) -> pd.DataFrame:
    """Return each participant's best model by BIC, for the whole data and every block.

    Columns participant, group, session (only when ``blocks`` has one), block
    (``all`` for the whole data, else the block number as a string, so the
    column has one type; session likewise), best_model, criterion ("bic"),
    delta_bic (BIC of the runner-up minus BIC of the best; NaN with one usable
    model), clear (delta_bic >= 2, 'positive' evidence after Raftery, 1995;
    false whenever a model was left out), runner_up, n_models, note. Per-block
    BIC as in :func:`block_log_evidence_table`.
    """
    keys = _block_keys(blocks) if blocks is not None else ["block"]
    tables = [log_evidence_table(fits, "bic").assign(**{k: ALL for k in keys})]
    if blocks is not None:
        per_block = block_log_evidence_table(blocks, fits)
        tables.append(per_block.assign(**{k: per_block[k].map(block_label) for k in keys}))
    tidy = pd.concat(tables, ignore_index=True)
    tidy["bic"] = -2.0 * tidy["log_evidence"]
    rows = []
    for labels, unit in tidy.groupby(["participant", *keys], sort=False):
        usable = unit[unit["bic"].notna()].sort_values("bic", kind="stable")
        left_out = unit.loc[unit["bic"].isna(), "model"].tolist()
        best = usable.iloc[0] if len(usable) else None
        runner = usable.iloc[1] if len(usable) > 1 else None
        delta = runner["bic"] - best["bic"] if runner is not None else np.nan
        rows.append({
            **dict(zip(["participant", *keys], labels)), "group": unit["group"].iloc[0],
            "best_model": best["model"] if best is not None else None, "criterion": "bic",
            "delta_bic": delta, "clear": bool(delta >= CLEAR_DELTA_BIC and not left_out),
            "runner_up": runner["model"] if runner is not None else None, "n_models": len(usable),
            "note": f"left out (unusable fit): {', '.join(left_out)}" if left_out else "",
        })
    columns = ["participant", "group", *keys, "best_model", "criterion", "delta_bic", "clear",
               "runner_up", "n_models", "note"]
    return pd.DataFrame(rows, columns=columns)


def _leader(table: pd.DataFrame, label: str) -> tuple[str, float] | None:
    ok = table.dropna(subset=["protected_exceedance"])
    if ok.empty:
        return None
    top = ok.loc[ok["protected_exceedance"].idxmax()]
    return str(top[label]), float(top["protected_exceedance"])


def summary_text(winners: pd.DataFrame, selection: pd.DataFrame,
                 selection_blocks: pd.DataFrame | None = None, families: pd.DataFrame | None = None) -> str:
    """Return a short plain-words console summary of the comparison.

    Per group: the model with the highest protected exceedance probability,
    called clear when it is at least 0.95 (common practice), and the family
    ahead when ``families`` is given; then, per block, the model with the
    highest protected exceedance in that block (when ``selection_blocks`` is
    given) and how many participants' own BIC winner it is.
    """
    lines = []
    for group, part in selection.groupby("group", sort=False):
        n = int(part["n_participants"].iloc[0])
        lead = _leader(part, "model")
        if lead is None:
            note = part["note"].iloc[0]
            lines.append(f"group {group}: no model selection ({note or 'no usable evidence'})")
            continue
        model, pxp = lead
        verdict = "clear winner" if pxp >= CLEAR_PXP else "no clear winner; ahead"
        bor = part["bor"].iloc[0]
        lines.append(f"group {group} ({n} participants): {verdict}: {model} "
                     f"(protected exceedance {pxp:.2f}, omnibus risk {bor:.2f})")
        if families is not None:
            fam = _leader(families[families["group"] == group], "family")
            if fam is not None:
                lines.append(f"  family ahead: {fam[0]} (protected exceedance {fam[1]:.2f})")
        mine = winners if group == ALL else winners[winners["group"].astype("string") == group]
        per_block = mine[mine["block"] != ALL]
        keys = [k for k in ("session", "block") if k in mine.columns
                and (k == "block" or per_block[k].nunique() > 1)]
        shift = []
        for labels, wb in per_block.groupby(keys, sort=False):
            labels = labels if isinstance(labels, tuple) else (labels,)
            where = " ".join(f"{k} {v}" for k, v in zip(keys, labels))
            model_b = None
            if selection_blocks is not None:
                sb = selection_blocks[selection_blocks["group"] == group]
                for k, v in zip(keys, labels):
                    sb = sb[sb[k].map(block_label) == v]
                top = _leader(sb, "model")
                model_b = top[0] if top else None
            elif wb["best_model"].notna().any():
                model_b = wb["best_model"].mode().iloc[0]
            if model_b is None:
                shift.append(f"{where}: none")
                continue
            k = int((wb["best_model"] == model_b).sum())
            shift.append(f"{where}: {model_b} ({k}/{len(wb)} best)")
        if shift:
            lines.append("  by block: " + "; ".join(shift))
    return "\n".join(lines)
