"""Shared helpers of foretell's Bayesian models: the sampler, the diagnostics gate, LOO comparison.

Every hierarchical model in foretell is sampled through :func:`sample`,
checked by :func:`diagnose` against a :class:`Gate`, and compared by
:func:`compare_loo`, which calls a winner only when every model passed.
"""

from __future__ import annotations

import contextlib
import importlib.util
import logging
import math
import warnings
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import logsumexp

from foretell.errors import UsageError

with warnings.catch_warnings():  # ArviZ announces a refactor on import
    warnings.simplefilter("ignore")
    import arviz as az

PARAMETERISATIONS = ("centred", "non-centred")
CENTRED_MIN_OBS = 500
"""Observations per participant from which :func:`choose_parameterisation` picks the centred form.

A rule on trial counts alone; it ignores how far apart the participants
are, so it can pick the centred form where the spread is near zero and the
centred form has a funnel. :func:`choose_by_strength` decides from the data."""
STRENGTH_RATIO = 0.5
""":func:`choose_by_strength` picks the centred form when the mean standard error of the
participants' estimates is below this fraction of the between-participant spread tau.

At mean SE = tau / 2 a participant's likelihood is four times as precise as
the population distribution, so the data rather than the prior pin each
participant down: the regime where the centred form samples well and the
non-centred one has the inverted funnel (Betancourt & Girolami, 2015)."""


def sampler_name() -> str:
    """Return the NUTS implementation :func:`sample` uses: "nutpie" when installed, else "pymc"."""
    return "nutpie" if importlib.util.find_spec("nutpie") is not None else "pymc"


def choose_parameterisation(n_obs: Sequence[int], requested: str = "auto") -> tuple[str, str]:
    """Return (parameterisation, reason) of a hierarchical model.

    ``requested`` "centred" or "non-centred" is kept; "auto" gives "centred"
    when every participant has at least :data:`CENTRED_MIN_OBS` observations,
    "non-centred" otherwise (Betancourt & Girolami, 2015).
    """
    if requested in PARAMETERISATIONS:
        return requested, "requested"
    if requested != "auto":
        raise UsageError(f"parameterisation must be 'auto', 'centred' or 'non-centred', "
                         f"got {requested!r}")
    fewest = int(min(n_obs)) if len(n_obs) else 0
    if fewest >= CENTRED_MIN_OBS:
        return "centred", f"auto: every participant has >= {CENTRED_MIN_OBS} observations"
    return "non-centred", (f"auto: a participant has {fewest} observations "
                           f"(< {CENTRED_MIN_OBS})")


def choose_by_strength(estimates: np.ndarray, std_errors: np.ndarray,
                       group_of: np.ndarray | None = None, requested: str = "auto"
                       ) -> tuple[str, str]:
    """Return (parameterisation, reason) of one hierarchical parameter by the strength of the data.

    ``estimates`` and ``std_errors`` are the participants' separate (e.g.
    per-participant least-squares) estimates of the parameter and their
    standard errors; ``group_of`` the participants' group indices (the
    population mean is per group). The between-participant spread by the
    method of moments: tau^2 = max(s^2 - mean(se_i^2), 0), s^2 the pooled
    within-group variance of the estimates (sum of squared deviations from
    the group means over N - G); "auto" gives "centred" when mean(se_i) <
    :data:`STRENGTH_RATIO` x tau, "non-centred" otherwise (Betancourt &
    Girolami, 2015). Participants without a finite estimate or standard
    error are left out; with fewer than one more participant than groups tau
    is unknown and the form non-centred. ``requested`` "centred" or
    "non-centred" is kept.
    """
    if requested in PARAMETERISATIONS:
        return requested, "requested"
    if requested != "auto":
        raise UsageError(f"parameterisation must be 'auto', 'centred' or 'non-centred', "
                         f"got {requested!r}")
    est = np.asarray(estimates, dtype=float)
    se = np.asarray(std_errors, dtype=float)
    groups = np.zeros(len(est), np.int64) if group_of is None else np.asarray(group_of, np.int64)
    ok = np.isfinite(est) & np.isfinite(se)
    est, se, groups = est[ok], se[ok], groups[ok]
    n_groups = len(np.unique(groups))
    if len(est) <= n_groups:
        return "non-centred", (f"auto: {len(est)} participants with an estimate, too few to "
                               "estimate the spread between participants")
    means = np.bincount(groups, est) / np.bincount(groups)
    spread2 = float(((est - means[groups]) ** 2).sum() / (len(est) - n_groups))
    tau = math.sqrt(max(spread2 - float(np.mean(se * se)), 0.0))
    mean_se = float(np.mean(se))
    centred = mean_se < STRENGTH_RATIO * tau
    return ("centred" if centred else "non-centred"), (
        f"auto: mean SE {mean_se:.3g} {'<' if centred else '>='} {STRENGTH_RATIO:g} x tau "
        f"{tau:.3g} (method of moments over {len(est)} participants)")


@contextlib.contextmanager
def quiet() -> Iterator[list[str]]:
    """Yield a list that collects the warnings PyMC, PyTensor and ArviZ raise, instead of showing them.

    Their log messages below ERROR are silenced for the duration.
    """
    names = ("pymc", "pytensor", "arviz")
    levels = {n: logging.getLogger(n).level for n in names}
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as records:
        warnings.simplefilter("always")
        for n in names:
            logging.getLogger(n).setLevel(logging.ERROR)
        try:
            yield caught
        finally:
            for n, level in levels.items():
                logging.getLogger(n).setLevel(level)
            caught.extend(dict.fromkeys(str(r.message).strip().splitlines()[0]
                                        for r in records if str(r.message).strip()))


def sample(model: object, *, draws: int, tune: int, chains: int, seed: int,
           target_accept: float = 0.95, cores: int = 1, progress: bool = False
           ) -> tuple[az.InferenceData, str, list[str]]:
    """Return (posterior, sampler name, messages) of NUTS on a PyMC ``model``.

    nutpie when installed, PyMC's own NUTS otherwise (:func:`sampler_name`);
    ``target_accept`` 0.95 by default (few divergences on hierarchical
    models at the cost of smaller steps). ``messages`` are the samplers'
    warnings, collected rather than shown.
    """
    import pymc as pm

    for name, value, low in (("draws", draws, 1), ("tune", tune, 0), ("chains", chains, 1),
                             ("cores", cores, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise UsageError(f"{name} must be a whole number >= {low}, got {value!r}")
    which = sampler_name()
    with quiet() as caught, model:
        idata = pm.sample(draws=int(draws), tune=int(tune), chains=int(chains),
                          cores=min(int(cores), int(chains)), random_seed=int(seed),
                          target_accept=target_accept, nuts_sampler=which,
                          progressbar=bool(progress), compute_convergence_checks=False)
    return idata, which, caught


@dataclass(frozen=True)
class Gate:
    """Limits a posterior must meet before its model may be compared.

    Rank-normalised split R-hat <= ``rhat_max`` for every parameter (Vehtari
    et al., 2021, recommend 1.01); bulk ESS >= ``ess_bulk_per_chain`` times
    the number of chains (ibid.: 100 per chain); at most ``max_divergences``
    divergent transitions; Pareto k <= ``pareto_k_max`` for every
    leave-one-out unit (Vehtari, Gelman & Gabry, 2017: 0.7). A posterior with
    fewer than ``full_chains`` chains or ``full_draws`` draws per chain may
    pass, but what rests on it is provisional.
    """

    rhat_max: float = 1.01
    ess_bulk_per_chain: float = 100.0
    max_divergences: int = 0
    pareto_k_max: float = 0.7
    full_chains: int = 4
    full_draws: int = 1000


@dataclass(frozen=True)
class Diagnostics:
    """What the gate found for one posterior: worst values, verdict and reasons."""

    sampler: str
    chains: int
    draws: int
    rhat_max: float
    ess_bulk_min: float
    divergences: int
    pareto_k_max: float
    ok: bool
    provisional: bool
    reasons: tuple[str, ...]

    def row(self) -> dict[str, object]:
        """Return the diagnostics as one table row (reasons joined by '; ')."""
        return {"sampler": self.sampler, "chains": self.chains, "draws": self.draws,
                "rhat_max": self.rhat_max, "ess_bulk_min": self.ess_bulk_min,
                "divergences": self.divergences, "pareto_k_max": self.pareto_k_max,
                "ok": self.ok, "provisional": self.provisional, "reasons": "; ".join(self.reasons)}


def diagnose(idata: az.InferenceData, sampler: str, gate: Gate = Gate(),
             var_names: Sequence[str] | None = None, loo: az.ELPDData | None = None) -> Diagnostics:
    """Return the :class:`Diagnostics` of a posterior against ``gate``.

    R-hat is ArviZ's rank-normalised split R-hat and ESS its bulk ESS
    (Vehtari et al., 2021), the worst over ``var_names`` (default: every
    posterior variable); divergences are summed over chains; Pareto k is the
    largest of ``loo`` (default: PSIS-LOO over the ``log_likelihood`` group;
    Vehtari, Gelman & Gabry, 2017), NaN when the posterior has none. A gate
    with an infinite ``pareto_k_max`` does not check it.
    """
    post = idata.posterior
    chains, draws = int(post.sizes["chain"]), int(post.sizes["draw"])
    names = list(var_names) if var_names is not None else list(post.data_vars)
    with quiet():
        rhat = az.rhat(idata, var_names=names, method="rank")
        ess = az.ess(idata, var_names=names, method="bulk")
    rhat_max = _worst(rhat, np.nanmax, chains)
    ess_min = _worst(ess, np.nanmin, chains)
    divergences = int(idata.sample_stats["diverging"].sum()) if "sample_stats" in idata else 0
    if loo is not None:
        k_max = float(np.max(loo.pareto_k))
    else:
        k_max = pareto_k(idata).max() if "log_likelihood" in idata else math.nan
    reasons = []
    if not rhat_max <= gate.rhat_max:
        reasons.append(f"R-hat {rhat_max:.3f} > {gate.rhat_max:g}")
    if not ess_min >= gate.ess_bulk_per_chain * chains:
        reasons.append(f"bulk ESS {ess_min:.0f} < {gate.ess_bulk_per_chain:g} x {chains} chains")
    if divergences > gate.max_divergences:
        reasons.append(f"{divergences} divergent transitions")
    if math.isfinite(gate.pareto_k_max) and not k_max <= gate.pareto_k_max:
        reasons.append(f"Pareto k {k_max:.2f} > {gate.pareto_k_max:g}" if math.isfinite(k_max)
                       else "no pointwise log-likelihood for PSIS-LOO")
    provisional = chains < gate.full_chains or draws < gate.full_draws
    return Diagnostics(sampler, chains, draws, float(rhat_max), float(ess_min), divergences,
                       float(k_max), not reasons, provisional, tuple(reasons))


def pareto_k(idata: az.InferenceData) -> np.ndarray:
    """Return the PSIS Pareto k of every leave-one-out unit of the ``log_likelihood`` group."""
    return np.asarray(psis_loo(idata).pareto_k).ravel()


def psis_loo(idata: az.InferenceData) -> az.ELPDData:
    """Return ArviZ's pointwise PSIS-LOO of the ``log_likelihood`` group, on the log scale."""
    with quiet():
        return az.loo(idata, pointwise=True, scale="log")


def exact_units(loo: az.ELPDData, held_out: Mapping[int, np.ndarray]) -> az.ELPDData:
    """Return ``loo`` with the PSIS estimates of some units replaced by exact leave-one-out ones.

    ``held_out[u]``: unit u's log-likelihood at every draw of the posterior
    refitted without u; its exact term is elpd_u = log (1/S) sum_s p(y_u |
    theta_s^(-u)). Then elpd_loo = sum_u elpd_u, se = sqrt(n var(elpd_u)) and
    p_loo = lppd - elpd_loo, lppd that of the full posterior (Vehtari, Gelman &
    Gabry, 2017: refit where Pareto k > 0.7; the same update as ArviZ's
    ``reloo``). The refitted units' Pareto k is set to 0: no importance
    sampling was done for them.
    """
    out = loo.copy()
    loo_i = np.asarray(loo.loo_i, dtype=float).copy()
    k = np.asarray(loo.pareto_k, dtype=float).copy()
    for u, ll in held_out.items():
        ll = np.asarray(ll, dtype=float).ravel()
        loo_i[u] = logsumexp(ll) - math.log(len(ll))
        k[u] = 0.0
    lppd = float(loo.p_loo) + float(loo.elpd_loo)
    out["loo_i"] = loo.loo_i.copy(data=loo_i)
    out["pareto_k"] = loo.pareto_k.copy(data=k)
    out["elpd_loo"] = float(loo_i.sum())
    out["se"] = float(math.sqrt(len(loo_i) * np.var(loo_i)))
    out["p_loo"] = lppd - float(loo_i.sum())
    return out


def _worst(dataset: object, reduce: object, chains: int) -> float:
    """Return the worst value over every variable of an ArviZ diagnostic dataset (NaN if none)."""
    values = [np.asarray(v).ravel() for v in dataset.data_vars.values()]
    values = [v for v in values if v.size]
    if not values:
        return math.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return float(reduce(np.concatenate(values)))


COMPARE_COLUMNS = ("model", "rank", "elpd", "se", "d_elpd", "dse", "p_loo", "weight", "called",
                   "provisional")


def compare_loo(idatas: Mapping[str, az.InferenceData | az.ELPDData],
                diagnostics: Mapping[str, Diagnostics],
                gate: Gate = Gate()) -> tuple[pd.DataFrame, list[str]]:
    """Return (comparison table, notes) of models by PSIS-LOO expected log predictive density.

    ``idatas``: posteriors (PSIS-LOO over their ``log_likelihood`` group) or
    their LOO results (e.g. with exact refits, :func:`exact_units`).
    Columns: model, rank (1 = highest elpd), elpd (elpd_loo, log scale, over
    the leave-one-out units), se, d_elpd (difference to the
    best: elpd - best elpd, <= 0), dse (its standard error), p_loo, weight (stacking weights; Yao et
    al., 2018), called, provisional. ArviZ's ``compare`` (Vehtari, Gelman &
    Gabry, 2017). ``called`` is True on every row only when every model's
    diagnostics passed; then ``provisional`` is True when any posterior had
    fewer chains or draws than ``gate``'s full run. Otherwise the ranking is
    shown but not called, and the notes say why.
    """
    failed = {m: d for m, d in diagnostics.items() if not d.ok}
    notes: list[str] = []
    if len(idatas) < 2:
        table = pd.DataFrame(columns=COMPARE_COLUMNS)
        return table, ["the ELPD comparison needs at least two models"]
    with quiet():
        cmp = az.compare(dict(idatas), ic="loo", scale="log")
    called = not failed
    provisional = called and any(d.provisional for d in diagnostics.values())
    table = pd.DataFrame({
        "model": cmp.index.astype(str), "rank": cmp["rank"].to_numpy(int) + 1,
        "elpd": cmp["elpd_loo"].to_numpy(float), "se": cmp["se"].to_numpy(float),
        "d_elpd": -cmp["elpd_diff"].to_numpy(float), "dse": cmp["dse"].to_numpy(float),
        "p_loo": cmp["p_loo"].to_numpy(float), "weight": cmp["weight"].to_numpy(float),
        "called": called, "provisional": provisional})
    if failed:
        notes.append("ELPD comparison not called: " + "; ".join(
            f"{m}: {', '.join(d.reasons)}" for m, d in failed.items()))
    elif provisional:
        notes.append("ELPD comparison provisional: fewer chains or draws than the full run "
                     f"({gate.full_chains} chains x {gate.full_draws} draws)")
    return table, notes
