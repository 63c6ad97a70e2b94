"""Centred or non-centred participant effects: one rule, from the strength of each participant's data."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

from foretell.errors import UsageError

PARAMETERISATIONS = ("centred", "non-centred")
STRENGTH_RATIO = 0.5
""":func:`choose_by_strength` picks the centred form when the mean standard error of the
participants' estimates is below this fraction of the between-participant spread tau.

At mean SE = tau / 2 a participant's likelihood is four times as precise as
the population distribution, so the data rather than the prior pin each
participant down: the regime where the centred form samples well and the
non-centred one has the inverted funnel (Betancourt & Girolami, 2015)."""


def choose_by_strength(estimates: np.ndarray, std_errors: np.ndarray, group_of: np.ndarray | None = None,
                       requested: str = "auto") -> tuple[str, str]:
    """Return (parameterisation, reason) of one hierarchical parameter by the strength of the data.

    The between-participant spread by the method of moments:
    tau^2 = max(s^2 - mean(se_i^2), 0), s^2 the pooled within-group variance
    of the participants' separate estimates (squared deviations from the
    group means, over N - G); "auto" gives "centred" when
    mean(se_i) < :data:`STRENGTH_RATIO` x tau, "non-centred" otherwise.
    Centred: theta_i ~ Normal(mu, tau); non-centred: theta_i = mu + tau z_i,
    z_i ~ Normal(0, 1). Participants without a finite estimate or standard
    error are left out; with no more participants than groups tau is
    unknown and the form non-centred.

    Parameters
    ----------
    estimates, std_errors : numpy.ndarray, shape (N,)
        The participants' separate (e.g. least-squares) estimates of the
        parameter, and their standard errors.
    group_of : numpy.ndarray of int, shape (N,), optional
        The participants' group indices (the population mean is per group).
    requested : {"auto", "centred", "non-centred"}
        "centred" or "non-centred" are kept as they are.

    Returns
    -------
    (str, str)
        The form, and why in words.

    Raises
    ------
    UsageError
        For another ``requested``.

    References
    ----------
    Betancourt, M., & Girolami, M. (2015). Hamiltonian Monte Carlo for
    hierarchical models. In Current Trends in Bayesian Methodology with
    Applications, 79-101.
    Papaspiliopoulos, O., Roberts, G. O., & Sköld, M. (2007). A general
    framework for the parametrization of hierarchical models. Stat. Sci. 22,
    59-73.
    """
    if requested in PARAMETERISATIONS:
        return requested, "requested"
    if requested != "auto":
        raise UsageError(f"parameterisation must be 'auto', 'centred' or 'non-centred', got {requested!r}")
    est = np.asarray(estimates, dtype=float)
    se = np.asarray(std_errors, dtype=float)
    groups = np.zeros(len(est), np.int64) if group_of is None else np.asarray(group_of, np.int64)
    ok = np.isfinite(est) & np.isfinite(se)
    est, se, groups = est[ok], se[ok], groups[ok]
    n_groups = len(np.unique(groups))
    if len(est) <= n_groups:
        return "non-centred", (f"auto: {len(est)} participants with an estimate, too few to "
                               "estimate the spread between participants")
    means = np.bincount(groups, est) / np.maximum(np.bincount(groups), 1)
    spread2 = float(((est - means[groups]) ** 2).sum() / (len(est) - n_groups))
    tau = math.sqrt(max(spread2 - float(np.mean(se * se)), 0.0))
    mean_se = float(np.mean(se))
    centred = mean_se < STRENGTH_RATIO * tau
    return ("centred" if centred else "non-centred"), (
        f"auto: mean SE {mean_se:.3g} {'<' if centred else '>='} {STRENGTH_RATIO:g} x tau "
        f"{tau:.3g} (method of moments over {len(est)} participants)")


def requested_forms(parameterisation: str | Mapping[str, str], parameters: Sequence[str]) -> dict[str, str]:
    """Return {parameter: "auto", "centred" or "non-centred"} from one form for all or a mapping.

    Parameters
    ----------
    parameterisation : str or mapping of str to str
        One of "auto", "centred", "non-centred" for every parameter, or a
        mapping of some of ``parameters`` to one of them (the others "auto").
    parameters : sequence of str
        The model's hierarchical parameters.

    Returns
    -------
    dict of str to str

    Raises
    ------
    UsageError
        For an unknown form or parameter.
    """
    allowed = ("auto", *PARAMETERISATIONS)
    given = dict(parameterisation) if isinstance(parameterisation, Mapping) \
        else dict.fromkeys(parameters, parameterisation)
    if set(given) - set(parameters) or any(v not in allowed for v in given.values()):
        raise UsageError(f"parameterisation must be one of {', '.join(allowed)}, or a mapping of "
                         f"{' and '.join(parameters)} to one of them; got {parameterisation!r}")
    return {name: given.get(name, "auto") for name in parameters}


def form_weight(form: str) -> float:
    """Return the weight of :func:`partial_level` that gives ``form``: 1.0 centred, 0.0 non-centred.

    Parameters
    ----------
    form : {"centred", "non-centred"}

    Returns
    -------
    float
    """
    return 1.0 if form == "centred" else 0.0


def partial_level(name: str, mu, tau, weight, **dims: object):
    """Return participant-level values theta ~ Normal(mu, tau), centred or not as the data ``weight`` says.

    The partially non-centred form: theta_raw ~ Normal(w mu, tau^w) is
    sampled and theta = mu + tau^(1 - w) (theta_raw - w mu) kept; w = 1 is
    the centred form (theta_raw = theta), w = 0 the non-centred one
    (theta_raw = z ~ Normal(0, 1)). With w a ``pm.Data`` value, both forms
    share one compiled model (Papaspiliopoulos, Roberts & Sköld, 2007;
    Gorinova, Moore & Hoffman, 2020).

    Parameters
    ----------
    name : str
        The kept variable; the sampled one is ``<name>_raw``.
    mu, tau : tensor-like
        The population mean (broadcasting against the values) and spread.
    weight : tensor-like
        w, 1.0 or 0.0 (:func:`form_weight`).
    **dims
        ``dims=`` or ``shape=`` of the values.

    Returns
    -------
    pytensor.tensor.TensorVariable

    References
    ----------
    Papaspiliopoulos, O., Roberts, G. O., & Sköld, M. (2007), op. cit.
    Gorinova, M., Moore, D., & Hoffman, M. (2020). Automatic
    reparameterisation of probabilistic programs. ICML, PMLR 119, 3648-3657.
    """
    import pymc as pm

    raw = pm.Normal(f"{name}_raw", weight * mu, tau ** weight, **dims)
    return pm.Deterministic(name, mu + tau ** (1.0 - weight) * (raw - weight * mu),
                            **{k: v for k, v in dims.items() if k == "dims"})
