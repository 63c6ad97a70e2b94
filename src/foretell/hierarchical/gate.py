"""The diagnostics gate a posterior passes before anything rests on it: R-hat, bulk ESS, divergences, Pareto k."""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass

import arviz as az
import numpy as np

from foretell.hierarchical.loo import pareto_k
from foretell.hierarchical.sampling import quiet


@dataclass(frozen=True)
class Gate:
    """Limits a posterior must meet before what rests on it is called.

    Attributes
    ----------
    rhat_max : float, default 1.01
        Largest rank-normalised split R-hat of any parameter (Vehtari et
        al., 2021, recommend 1.01).
    ess_bulk_per_chain : float, default 100
        Smallest bulk ESS of any parameter, per chain (ibid.: 100 per chain).
    max_divergences : int, default 0
        Most divergent transitions.
    pareto_k_max : float, default 0.7
        Largest PSIS Pareto k of any leave-one-out unit, checked where models
        are compared by PSIS-LOO (Vehtari, Gelman & Gabry, 2017: 0.7).
    full_chains, full_draws : int, default 4 and 1000
        A posterior with fewer chains or fewer draws per chain may pass, but
        what rests on it is provisional.

    References
    ----------
    Vehtari, A., Gelman, A., & Gabry, J. (2017). Practical Bayesian model
    evaluation using leave-one-out cross-validation and WAIC. Stat. Comput.
    27, 1413-1432.
    Vehtari, A., Gelman, A., Simpson, D., Carpenter, B., & Bürkner, P.-C.
    (2021). Rank-normalization, folding, and localization: an improved R-hat
    for assessing convergence of MCMC. Bayesian Anal. 16, 667-718.
    """

    rhat_max: float = 1.01
    ess_bulk_per_chain: float = 100.0
    max_divergences: int = 0
    pareto_k_max: float = 0.7
    full_chains: int = 4
    full_draws: int = 1000

    def settings(self) -> dict[str, float]:
        """Return the limits as a JSON-ready mapping (for a result's settings)."""
        return {k: (v if math.isfinite(v) else None) for k, v in asdict(self).items()}


@dataclass(frozen=True)
class Diagnostics:
    """What the gate found for one posterior: worst values, verdict and reasons.

    Attributes
    ----------
    sampler : str
    chains, draws : int
        Chains, and draws per chain.
    rhat_max, ess_bulk_min : float
        The worst R-hat and bulk ESS over the checked parameters.
    divergences : int
    pareto_k_max : float
        The largest Pareto k (NaN without a pointwise log-likelihood).
    ok : bool
        Every limit met.
    provisional : bool
        Fewer chains or draws than the gate's full run.
    reasons : tuple of str
        What failed, in words.
    """

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
    (Vehtari et al., 2021), the worst over ``var_names``; divergences are
    summed over chains. Pareto k is checked only when ``loo`` is given (the
    posterior is compared by PSIS-LOO) and the gate's limit is finite;
    otherwise it is reported, from PSIS-LOO over the ``log_likelihood``
    group when there is one (Vehtari, Gelman & Gabry, 2017), NaN when not.
    A failed limit reads with enough decimals to differ from the limit
    ("R-hat 1.0104 > 1.01", "bulk ESS 138 < 200 (100 per chain × 2 chains)").

    Parameters
    ----------
    idata : arviz.InferenceData
        The posterior (with ``sample_stats`` for divergences).
    sampler : str
        The sampler's name, reported.
    gate : Gate, default Gate()
        The limits.
    var_names : sequence of str, optional
        The parameters checked; default every posterior variable.
    loo : arviz.ELPDData, optional
        The pointwise PSIS-LOO by which the posterior is compared.

    Returns
    -------
    Diagnostics

    References
    ----------
    See :class:`Gate`.
    """
    post = idata.posterior
    chains, draws = int(post.sizes["chain"]), int(post.sizes["draw"])
    names = list(var_names) if var_names is not None else list(post.data_vars)
    with quiet():
        rhat = az.rhat(idata, var_names=names, method="rank")
        ess = az.ess(idata, var_names=names, method="bulk")
    rhat_max = _worst(rhat, np.nanmax)
    ess_min = _worst(ess, np.nanmin)
    divergences = int(idata.sample_stats["diverging"].sum()) if "sample_stats" in idata else 0
    if loo is not None:
        k_max = float(np.max(loo.pareto_k))
    else:
        k_max = float(pareto_k(idata).max()) if "log_likelihood" in idata else math.nan
    reasons = []
    if not rhat_max <= gate.rhat_max:
        reasons.append(f"R-hat {_beside(rhat_max, gate.rhat_max, 3)} > {gate.rhat_max:g}")
    ess_needed = gate.ess_bulk_per_chain * chains
    if not ess_min >= ess_needed:
        reasons.append(f"bulk ESS {_beside(ess_min, ess_needed, 0)} < {ess_needed:g} "
                       f"({gate.ess_bulk_per_chain:g} per chain × {chains} chains)")
    if divergences > gate.max_divergences:
        reasons.append(f"{divergences} divergent transitions")
    if loo is not None and math.isfinite(gate.pareto_k_max) and not k_max <= gate.pareto_k_max:
        reasons.append(f"Pareto k {_beside(k_max, gate.pareto_k_max, 2)} > {gate.pareto_k_max:g}"
                       if math.isfinite(k_max) else "no pointwise log-likelihood for PSIS-LOO")
    provisional = chains < gate.full_chains or draws < gate.full_draws
    return Diagnostics(sampler, chains, draws, float(rhat_max), float(ess_min), divergences,
                       float(k_max), not reasons, provisional, tuple(reasons))


def _beside(value: float, limit: float, decimals: int) -> str:
    """Return ``value`` with at least ``decimals`` decimals, more until it does not read as ``limit``."""
    if not math.isfinite(value):
        return str(value)
    for places in range(decimals, decimals + 8):
        if round(value, places) != limit:
            break
    return f"{value:.{places}f}"


def _worst(dataset: object, reduce: Callable[[np.ndarray], float]) -> float:
    """Return the worst value over every variable of an ArviZ diagnostic dataset (NaN if none)."""
    values = [np.asarray(v).ravel() for v in dataset.data_vars.values()]
    values = [v for v in values if v.size]
    if not values:
        return math.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return float(reduce(np.concatenate(values)))
