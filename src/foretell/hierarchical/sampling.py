"""NUTS sampling of foretell's PyMC models: the sampler, its cores, its warnings, and interruptions."""

from __future__ import annotations

import contextlib
import importlib.util
import logging
import numbers
import os
import signal
import threading
import warnings
from collections.abc import Iterator, Sequence

import arviz as az

from foretell.errors import UsageError
from foretell.validation import check_count, check_n_jobs

TARGET_ACCEPTS = (0.95, 0.99)
"""NUTS' target acceptance, and the next one tried while a posterior has divergent transitions.

0.95 rather than PyMC's 0.8 already, as hierarchical models often need; 0.99
is as small a step as is useful before the divergences say the model's
geometry, not the step, is the problem (Betancourt, 2017)."""


def sampler_name() -> str:
    """Return the NUTS implementation :func:`sample` uses: "nutpie" when installed, else "pymc".

    Returns
    -------
    str
    """
    return "nutpie" if importlib.util.find_spec("nutpie") is not None else "pymc"


def sampling_cores(chains: int, n_jobs: int) -> int:
    """Return how many chains run in parallel: ``n_jobs`` read as joblib does, at most ``chains``.

    A positive ``n_jobs`` is a count; -1 means every core, -2 every core but
    one, and so on (as in joblib). Chains are seeded one by one, so the draws
    do not depend on this number.

    Parameters
    ----------
    chains : int
        Chains to sample.
    n_jobs : int
        The step's ``n_jobs``.

    Returns
    -------
    int
        Between 1 and ``chains``.

    Raises
    ------
    UsageError
        For ``n_jobs`` = 0 or a non-integer, and ``chains`` below 1.

    Examples
    --------
    >>> sampling_cores(4, 2)
    2
    >>> sampling_cores(2, 8)
    2
    """
    chains = check_count("chains", chains, 1)
    n_jobs = check_n_jobs(n_jobs)
    available = n_jobs if n_jobs > 0 else (os.cpu_count() or 1) + 1 + n_jobs
    return max(1, min(chains, available))


@contextlib.contextmanager
def quiet() -> Iterator[list[str]]:
    """Yield a list that collects the warnings PyMC, PyTensor and ArviZ raise, instead of showing them.

    Their log messages below ERROR are silenced for the duration; the list
    holds the first line of each distinct warning once the block ends.

    Yields
    ------
    list of str
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


@contextlib.contextmanager
def _interruptions() -> Iterator[list[BaseException]]:
    """Yield a list that records the KeyboardInterrupt (or subclass) a SIGINT or SIGTERM handler raises.

    PyMC catches KeyboardInterrupt and returns the chains cut short; this
    keeps the exception, so that the interruption can win afterwards. Only
    Python-level handlers of the main thread are wrapped (and restored).
    """
    caught: list[BaseException] = []
    if threading.current_thread() is not threading.main_thread():
        yield caught
        return
    previous = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}

    def keep(handler):
        def wrapped(signum, frame):
            try:
                handler(signum, frame)
            except BaseException as exc:
                caught.append(exc)
                raise
        return wrapped

    wrapped = {s: h for s, h in previous.items() if callable(h)}
    for s, h in wrapped.items():
        signal.signal(s, keep(h))
    try:
        yield caught
    finally:
        for s, h in wrapped.items():
            signal.signal(s, h)


def sample(model: object, *, draws: int, tune: int, chains: int, seed: int,
           target_accept: float | Sequence[float] = TARGET_ACCEPTS, cores: int = 1, progress: bool = False
           ) -> tuple[az.InferenceData, str, list[str]]:
    """Return (posterior, sampler name, messages) of NUTS on a PyMC ``model``.

    nutpie when installed, PyMC's own NUTS otherwise (:func:`sampler_name`).
    A posterior with divergent transitions is sampled again at the next
    target acceptance of ``target_accept`` (smaller steps: divergences
    flag regions the sampler's step size is too large for; Betancourt,
    2017), and the last one is returned with ``target_accept`` in the
    attributes of its ``sample_stats``; a message says what was tried.
    The samplers' warnings are collected (:func:`quiet`), not shown.
    Interruption wins: PyMC answers Ctrl-C (or SIGTERM) by returning the
    chains cut short, so when a signal arrived, or the posterior has fewer
    chains or draws than asked, the interruption is raised again instead of
    a short posterior being returned.

    Parameters
    ----------
    model : pymc.Model
        The model to sample.
    draws, tune : int
        Draws per chain kept (>= 1), and tuning steps before them (>= 0).
    chains : int
        Chains, at least 2 (R-hat compares chains; Vehtari et al., 2021).
    seed : int
        The sampler's seed (:func:`foretell.validation.child_int`).
    target_accept : float or sequence of float, default :data:`TARGET_ACCEPTS`
        NUTS' target acceptance, or the ones to try in turn while the
        posterior has divergent transitions.
    cores : int, default 1
        Chains run in parallel (:func:`sampling_cores`).
    progress : bool, default False
        Show the sampler's progress bar.

    Returns
    -------
    (arviz.InferenceData, str, list of str)

    Raises
    ------
    UsageError
        For counts, or target acceptances, out of range.
    KeyboardInterrupt
        When sampling was interrupted (the signal's own exception when one
        was caught, so SIGTERM stays SIGTERM).

    References
    ----------
    Hoffman, M. D., & Gelman, A. (2014). The No-U-Turn sampler. J. Mach.
    Learn. Res. 15, 1593-1623.
    Betancourt, M. (2017). A conceptual introduction to Hamiltonian Monte
    Carlo. arXiv:1701.02434, section 6.2 (divergences).
    """
    draws = check_count("draws", draws, 1)
    tune = check_count("tune", tune, 0)
    chains = check_count("chains", chains, 2)
    cores = check_count("cores", cores, 1)
    ladder = (float(target_accept),) if isinstance(target_accept, numbers.Real) else tuple(map(float, target_accept))
    if not ladder or not all(0.0 < a < 1.0 for a in ladder):
        raise UsageError(f"target_accept must be between 0 and 1 (one value or several to try in turn), "
                         f"got {target_accept!r}")
    which = sampler_name()
    messages: list[str] = []
    for step, accept in enumerate(ladder):
        idata, caught = _nuts(model, draws=draws, tune=tune, chains=chains, cores=min(cores, chains),
                              seed=int(seed), target_accept=accept, sampler=which, progress=bool(progress))
        messages += caught
        divergent = int(idata.sample_stats["diverging"].sum()) if "sample_stats" in idata else 0
        if not divergent or step == len(ladder) - 1:
            break
        messages.append(f"{divergent} divergent transitions at target acceptance {accept:g}: sampled again at "
                        f"{ladder[step + 1]:g}")
    if "sample_stats" in idata:
        idata.sample_stats.attrs["target_accept"] = accept
    return idata, which, list(dict.fromkeys(messages))


def _nuts(model: object, *, draws: int, tune: int, chains: int, cores: int, seed: int, target_accept: float,
          sampler: str, progress: bool) -> tuple[az.InferenceData, list[str]]:
    """Return (posterior, warnings) of one NUTS run; an interruption is raised again (see :func:`sample`)."""
    import pymc as pm

    with _interruptions() as stopped, quiet() as caught, model:
        try:
            idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores, random_seed=seed,
                              target_accept=target_accept, nuts_sampler=sampler, progressbar=progress,
                              compute_convergence_checks=False)
        except Exception:
            if stopped:  # PyMC failed on the chains the interruption cut short
                raise stopped[0] from None
            raise
    if stopped:
        raise stopped[0]
    got_chains, got_draws = int(idata.posterior.sizes["chain"]), int(idata.posterior.sizes["draw"])
    if (got_chains, got_draws) != (chains, draws):
        raise KeyboardInterrupt(f"sampling stopped early: {got_chains} chains x {got_draws} draws "
                                f"of {chains} x {draws}")
    return idata, caught
