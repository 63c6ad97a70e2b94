"""PSIS-LOO of foretell's posteriors, exact leave-one-out refits where it fails, and the ELPD comparison."""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Iterable, Mapping
from typing import TYPE_CHECKING

import arviz as az
import numpy as np
import pandas as pd
from scipy.special import logsumexp

from foretell.hierarchical.sampling import quiet

if TYPE_CHECKING:
    from foretell.hierarchical.gate import Diagnostics, Gate

ELPD_COLUMNS = ("model", "rank", "elpd_loo", "elpd_loo_se", "elpd_diff", "elpd_diff_se", "p_loo", "stacking_weight",
                "called", "evidence", "provisional")
ELPD_MARGIN = 4.0
"""A difference in ELPD is evidence only above 4 (Sivula, Magnusson & Vehtari, 2020: below it the
normal approximation of its uncertainty is unreliable)."""
ELPD_SE_FACTOR = 2.0
"""... and only when it exceeds this many standard errors of the difference (ibid.)."""


def psis_loo(idata: az.InferenceData) -> az.ELPDData:
    """Return ArviZ's pointwise PSIS-LOO of the ``log_likelihood`` group, on the log scale.

    Parameters
    ----------
    idata : arviz.InferenceData

    Returns
    -------
    arviz.ELPDData

    References
    ----------
    Vehtari, A., Gelman, A., & Gabry, J. (2017). Practical Bayesian model
    evaluation using leave-one-out cross-validation and WAIC. Stat. Comput.
    27, 1413-1432.
    """
    with quiet():
        return az.loo(idata, pointwise=True, scale="log")


def pareto_k(idata: az.InferenceData) -> np.ndarray:
    """Return the PSIS Pareto k of every leave-one-out unit of the ``log_likelihood`` group.

    Parameters
    ----------
    idata : arviz.InferenceData

    Returns
    -------
    numpy.ndarray
    """
    return np.asarray(psis_loo(idata).pareto_k).ravel()


def exact_units(loo: az.ELPDData, held_out: Mapping[int, np.ndarray]) -> az.ELPDData:
    """Return ``loo`` with the PSIS estimates of some units replaced by exact leave-one-out ones.

    ``held_out[u]`` is unit u's log-likelihood at every draw of the
    posterior refitted without u; its exact term is
    elpd_u = log (1/S) sum_s p(y_u | theta_s^(-u)). Then elpd_loo = sum_u
    elpd_u, se = sqrt(n var(elpd_u)) and p_loo = lppd - elpd_loo, lppd that
    of the full posterior (the same update as ArviZ's ``reloo``). The
    refitted units' Pareto k is set to 0: no importance sampling was done
    for them. ``loo`` itself is left as it was.

    Parameters
    ----------
    loo : arviz.ELPDData
        Pointwise PSIS-LOO on the log scale (:func:`psis_loo`).
    held_out : mapping of int to numpy.ndarray
        Unit index -> its log-likelihood draws under the refit.

    Returns
    -------
    arviz.ELPDData

    References
    ----------
    Vehtari, A., Gelman, A., & Gabry, J. (2017): refit where Pareto k > 0.7.
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


class RefitWrapper(ABC):
    """How to refit a model without one leave-one-out unit, for :func:`exact_refits`.

    The idea of ArviZ's ``SamplingWrapper`` (Kumar et al., 2019), reduced to
    what foretell needs: a model says how to leave a unit out, how to sample
    on what remains (and whether that posterior passes its gate), and how to
    score the unit under it; :func:`exact_refits` does the rest, for every
    model alike.
    """

    @abstractmethod
    def sel_observations(self, unit: int) -> tuple[object, object]:
        """Return (the data without ``unit``, the data that scores ``unit``).

        Parameters
        ----------
        unit : int
            Index of the leave-one-out unit.

        Returns
        -------
        (object, object)
        """

    @abstractmethod
    def sample(self, data: object, unit: int) -> tuple[az.InferenceData, tuple[str, ...]]:
        """Return (the posterior on ``data``, the gate's reasons to reject it; empty when it passes).

        Parameters
        ----------
        data : object
            The first item of :meth:`sel_observations`.
        unit : int
            The unit left out (e.g. to key the sampler's seed by it).

        Returns
        -------
        (arviz.InferenceData, tuple of str)
        """

    @abstractmethod
    def log_likelihood_i(self, excluded: object, posterior: az.InferenceData, unit: int) -> np.ndarray:
        """Return the left-out unit's log-likelihood at every draw of ``posterior``.

        Parameters
        ----------
        excluded : object
            The second item of :meth:`sel_observations`.
        posterior : arviz.InferenceData
            From :meth:`sample`.
        unit : int

        Returns
        -------
        numpy.ndarray
            One value per draw (any shape).
        """


def exact_refits(loo: az.ELPDData, wrapper: RefitWrapper, units: Iterable[int]
                 ) -> tuple[az.ELPDData, dict[int, tuple[str, ...]]]:
    """Return (``loo`` with exact terms for ``units``, the gate's reasons per refit that failed it).

    One refit per unit through ``wrapper``; the estimate is updated by
    :func:`exact_units`.

    Parameters
    ----------
    loo : arviz.ELPDData
        Pointwise PSIS-LOO of the full posterior.
    wrapper : RefitWrapper
        The model's refit recipe.
    units : iterable of int
        Indices of the units to refit (those whose Pareto k is too high).

    Returns
    -------
    (arviz.ELPDData, dict of int to tuple of str)

    References
    ----------
    Vehtari, A., Gelman, A., & Gabry, J. (2017). Practical Bayesian model
    evaluation using leave-one-out cross-validation and WAIC. Stat. Comput.
    27, 1413-1432.
    """
    held_out: dict[int, np.ndarray] = {}
    failed: dict[int, tuple[str, ...]] = {}
    for u in (int(v) for v in units):
        kept, excluded = wrapper.sel_observations(u)
        posterior, reasons = wrapper.sample(kept, u)
        held_out[u] = wrapper.log_likelihood_i(excluded, posterior, u)
        if reasons:
            failed[u] = tuple(reasons)
    return exact_units(loo, held_out), failed


def compare_loo(loos: Mapping[str, az.ELPDData], diagnostics: Mapping[str, "Diagnostics"], gate: "Gate", *,
                clusters: np.ndarray | None = None, baseline: str | None = None) -> tuple[pd.DataFrame, list[str]]:
    """Return (comparison table, notes) of models by PSIS-LOO expected log predictive density.

    Only the models whose posterior passes the gate are compared; the
    others are rows without numbers, ``evidence`` "left-out", and named in
    the notes. ELPD sums the leave-one-out units; its standard error, and
    that of each difference to the first model, are computed over
    ``clusters`` (the independent units, e.g. participants: the units'
    terms summed within each, se = sqrt(C var(cluster sums)), as ArviZ does
    over units). The first model is called only when it is ahead of every
    other compared model by more than :data:`ELPD_MARGIN` and more than
    :data:`ELPD_SE_FACTOR` standard errors of the difference (Sivula,
    Magnusson & Vehtari, 2020), and, with a ``baseline``, when the baseline
    passed the gate. ``evidence``: "first", "distinct" (the first is ahead
    of it by that rule) or "indistinct" (the models cannot be told apart).
    ``provisional`` is True with the call when any compared posterior had
    fewer chains or draws than ``gate``'s full run. Weights: ArviZ's
    stacking weights over the compared models (Yao et al., 2018).

    Parameters
    ----------
    loos : mapping of str to arviz.ELPDData
        Model id -> pointwise PSIS-LOO (:func:`psis_loo`, with exact terms from :func:`exact_refits`).
    diagnostics : mapping of str to Diagnostics
        Model id -> what the gate found.
    gate : Gate
        The gate (its full run decides ``provisional``).
    clusters : numpy.ndarray of int, optional
        Each unit's cluster; default every unit its own.
    baseline : str, optional
        The model a called model must beat (it must pass the gate).

    Returns
    -------
    (pandas.DataFrame, list of str)
        Columns :data:`ELPD_COLUMNS`: model, rank (1 = highest elpd_loo),
        elpd_loo, elpd_loo_se, elpd_diff (elpd_loo - the first's, <= 0),
        elpd_diff_se, p_loo, stacking_weight, called (True on the called
        model's row), evidence, provisional.

    References
    ----------
    Vehtari, A., Gelman, A., & Gabry, J. (2017), op. cit.
    Sivula, T., Magnusson, M., & Vehtari, A. (2020). Uncertainty in Bayesian
    leave-one-out cross-validation based model comparison. arXiv:2008.10296.
    Yao, Y., Vehtari, A., Simpson, D., & Gelman, A. (2018). Using stacking to
    average Bayesian predictive distributions. Bayesian Anal. 13, 917-1007.
    """
    passed = {m: loo for m, loo in loos.items() if diagnostics[m].ok}
    failed = [m for m in loos if m not in passed]
    notes = [f"left out of the ELPD comparison, failed the gate: {m} ({', '.join(diagnostics[m].reasons)})"
             for m in failed]
    empty = pd.DataFrame({"model": failed, "evidence": "left-out", "called": False, "provisional": False},
                         columns=ELPD_COLUMNS)
    if len(passed) < 2:
        return empty, notes + [f"no ELPD comparison: {len(passed)} model(s) passed the gate, two are needed"]
    with quiet():
        weights = az.compare(dict(passed), ic="loo", scale="log")["weight"]
    pointwise = {m: np.asarray(loo.loo_i, dtype=float).ravel() for m, loo in passed.items()}
    n_units = len(next(iter(pointwise.values())))
    owner = np.arange(n_units) if clusters is None else np.asarray(clusters, dtype=np.int64)
    sums = {m: np.bincount(owner, v) for m, v in pointwise.items()}
    n_clusters = len(next(iter(sums.values())))
    elpd = pd.Series({m: v.sum() for m, v in sums.items()}).sort_values(ascending=False, kind="stable")
    first = elpd.index[0]
    diff = {m: sums[m] - sums[first] for m in elpd.index}
    d_elpd = np.array([diff[m].sum() for m in elpd.index])
    dse = np.array([math.sqrt(n_clusters * np.var(diff[m])) for m in elpd.index])
    distinct = (-d_elpd > ELPD_MARGIN) & (-d_elpd > ELPD_SE_FACTOR * dse)
    missing = baseline is not None and baseline not in passed
    called = bool(distinct[1:].all()) and not missing
    provisional = called and any(diagnostics[m].provisional for m in passed)
    table = pd.DataFrame({
        "model": elpd.index, "rank": np.arange(1, len(elpd) + 1), "elpd_loo": elpd.to_numpy(),
        "elpd_loo_se": [math.sqrt(n_clusters * np.var(sums[m])) for m in elpd.index], "elpd_diff": d_elpd,
        "elpd_diff_se": dse, "p_loo": [float(passed[m].p_loo) for m in elpd.index],
        "stacking_weight": weights.reindex(elpd.index).to_numpy(),
        "called": [called and i == 0 for i in range(len(elpd))],
        "evidence": ["first"] + ["distinct" if d else "indistinct" for d in distinct[1:]],
        "provisional": provisional})
    notes.append(_elpd_words(table, n_clusters, called, missing, baseline))
    if provisional:
        notes.append("ELPD comparison provisional: fewer chains or draws than the full run "
                     f"({gate.full_chains} chains x {gate.full_draws} draws)")
    return pd.concat([table, empty], ignore_index=True)[list(ELPD_COLUMNS)], notes


def _elpd_words(table: pd.DataFrame, n_clusters: int, called: bool, missing: bool, baseline: str | None) -> str:
    """Return the sentence that says what the ELPD comparison calls, with the rule behind it."""
    first = table["model"].iloc[0]
    rule = (f"|elpd_diff| > {ELPD_MARGIN:g} and > {ELPD_SE_FACTOR:g} SE, SE over {n_clusters} participants "
            "(Sivula, Magnusson & Vehtari, 2020)")
    if missing:
        return (f"ELPD comparison not called: the baseline {baseline} failed the gate, so no model can be shown "
                f"to beat it; {first} ranks first of those compared")
    if called:
        runner = table.iloc[1]
        return (f"ELPD comparison called: {first} ahead of every other model ({rule}); the next, "
                f"{runner['model']}, by {-runner['elpd_diff']:.1f} +- {runner['elpd_diff_se']:.1f}")
    alike = table.loc[table["evidence"] == "indistinct", "model"].tolist()
    return (f"ELPD comparison not called: {first} cannot be told apart from {', '.join(alike)} ({rule})")
