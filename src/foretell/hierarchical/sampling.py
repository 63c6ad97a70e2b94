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
from collections import OrderedDict
from collections.abc import Callable, Hashable, Iterator, Mapping, Sequence

import arviz as az
import numpy as np

from foretell.errors import UsageError
from foretell.validation import check_count, check_n_jobs

TARGET_ACCEPTS = (0.95, 0.99)
"""NUTS' target acceptance, and the next one tried while a posterior has divergent transitions.

0.95 rather than PyMC's 0.8 already, as hierarchical models often need; 0.99
is as small a step as is useful before the divergences say the model's
geometry, not the step, is the problem (Betancourt, 2017)."""


STRUCTURES_KEPT = 8
"""Compiled model structures kept per process (the least recently used is dropped beyond this)."""


def sampler_name() -> str:
    """Return the NUTS implementation :func:`sample` uses: "nutpie" when it can be imported, else "pymc".

    nutpie (a dependency of foretell) compiles a model once and samples
    its chains in parallel; PyMC's own NUTS is the fallback, and every
    result names the sampler that ran.

    Returns
    -------
    str
    """
    return "nutpie" if importlib.util.find_spec("nutpie") is not None else "pymc"


class Structure:
    """A PyMC model whose data enter through ``pm.Data`` containers, compiled at most once for nutpie.

    One structure serves every data set of the same shape: :func:`sample`
    hands it new data (nutpie's ``with_data``, or ``pymc.set_data`` for
    PyMC's NUTS) instead of building and compiling a model again. PyTensor
    keeps what it compiles in its on-disk cache, so a second process
    compiles less again.

    Parameters
    ----------
    model : pymc.Model
        The model, its data in ``pm.Data`` containers.
    """

    def __init__(self, model: object) -> None:
        self.model = model
        self._compiled = None
        self._expand = None

    def compiled(self) -> object:
        """Return the model compiled for nutpie (compiled on the first call only).

        nutpie keeps the unconstrained values only (``var_names=[]``):
        compiling its own function of the other variables costs as much as
        the log density again, in code no cache keeps; :meth:`expanded`
        computes them instead.
        """
        if self._compiled is None:
            import nutpie

            with quiet():
                self._compiled = nutpie.compile_pymc_model(self.model, var_names=[])
        return self._compiled

    def expanded(self, raw: object, data: Mapping[str, object]) -> object:
        """Return the posterior of the :meth:`kept` variables from nutpie's unconstrained draws ``raw``.

        One PyTensor function of the model's value variables (compiled once,
        in PyTensor's on-disk cache) gives the constrained values and the
        deterministics at every draw, on ``data``.

        Parameters
        ----------
        raw : xarray.Dataset
            nutpie's posterior of the value variables.
        data : mapping of str to array-like
            The values of the ``pm.Data`` containers the draws were sampled on.

        Returns
        -------
        xarray.Dataset
        """
        import pymc as pm

        if self._expand is None:
            with quiet():
                self._expand = self.model.compile_fn(self.model.unobserved_value_vars, inputs=self.model.value_vars,
                                                     point_fn=False, on_unused_input="ignore")
        if data:
            pm.set_data(data, model=self.model)
        names = [v.name for v in self.model.unobserved_value_vars]
        keep = set(self.kept())
        inputs = [raw[v.name].to_numpy() for v in self.model.value_vars]
        chains, draws = inputs[0].shape[:2]
        values: dict[str, list] = {n: [] for n in names if n in keep}
        for c in range(chains):
            for d in range(draws):
                for name, value in zip(names, self._expand(*[x[c, d] for x in inputs])):
                    if name in keep:
                        values[name].append(value)
        arrays = {n: np.reshape(v, (chains, draws, *np.shape(v[0]))) for n, v in values.items()}
        dims = {n: list(self.model.named_vars_to_dims[n]) for n in arrays if n in self.model.named_vars_to_dims}
        return az.from_dict(posterior=arrays, coords=dict(self.model.coords), dims=dims).posterior

    def kept(self) -> list[str]:
        """Return the variables a posterior keeps: the model's random variables and deterministics by name."""
        return [v.name for v in (*self.model.free_RVs, *self.model.deterministics)]


_STRUCTURES: OrderedDict[Hashable, Structure] = OrderedDict()


def structure(key: Hashable, build: Callable[[], object]) -> Structure:
    """Return the :class:`Structure` of ``key``, built by ``build()`` only when this process has none yet.

    Parameters
    ----------
    key : hashable
        Everything that fixes the model's graph and shapes (not its data).
    build : callable
        Returns the PyMC model of that structure, data in ``pm.Data``.

    Returns
    -------
    Structure
    """
    if key in _STRUCTURES:
        _STRUCTURES.move_to_end(key)
        return _STRUCTURES[key]
    _STRUCTURES[key] = made = Structure(build())
    while len(_STRUCTURES) > STRUCTURES_KEPT:
        _STRUCTURES.popitem(last=False)
    return made


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
           target_accept: float | Sequence[float] = TARGET_ACCEPTS, cores: int = 1, progress: bool = False,
           data: Mapping[str, object] | None = None) -> tuple[az.InferenceData, str, list[str]]:
    """Return (posterior, sampler name, messages) of NUTS on a PyMC ``model``, on ``data`` when given.

    nutpie when installed, PyMC's own NUTS otherwise (:func:`sampler_name`).
    A :class:`Structure` is compiled once and sampled on every ``data``
    handed to it; a bare PyMC model is compiled for this call.
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
    model : Structure or pymc.Model
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
    data : mapping of str to array-like, optional
        New values of the model's ``pm.Data`` containers, by name.

    Returns
    -------
    (arviz.InferenceData, str, list of str)
        The posterior keeps the model's named variables (not nutpie's
        unconstrained copies).

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
    shared = model if isinstance(model, Structure) else Structure(model)
    messages = [] if which == "nutpie" else ["nutpie is not available: PyMC's own NUTS sampled instead (slower)"]
    for step, accept in enumerate(ladder):
        idata, caught = _nuts(shared, dict(data or {}), draws=draws, tune=tune, chains=chains,
                              cores=min(cores, chains), seed=int(seed), target_accept=accept, sampler=which,
                              progress=bool(progress))
        messages += caught
        divergent = int(idata.sample_stats["diverging"].sum()) if "sample_stats" in idata else 0
        if not divergent or step == len(ladder) - 1:
            break
        messages.append(f"{divergent} divergent transitions at target acceptance {accept:g}: sampled again at "
                        f"{ladder[step + 1]:g}")
    if "sample_stats" in idata:
        idata.sample_stats.attrs["target_accept"] = accept
    return idata, which, list(dict.fromkeys(messages))


def _nuts(shared: Structure, data: dict[str, object], *, draws: int, tune: int, chains: int, cores: int,
          seed: int, target_accept: float, sampler: str, progress: bool) -> tuple[az.InferenceData, list[str]]:
    """Return (posterior, warnings) of one NUTS run; an interruption is raised again (see :func:`sample`)."""
    import pymc as pm

    with _interruptions() as stopped, quiet() as caught:
        try:
            if sampler == "nutpie":
                import nutpie

                compiled = shared.compiled()
                logp_data = {k: v for k, v in data.items() if k in compiled.shared_data}  # the log density's own
                raw = nutpie.sample(compiled.with_data(**logp_data) if logp_data else compiled, draws=draws,
                                    tune=tune, chains=chains, cores=cores, seed=seed, target_accept=target_accept,
                                    progress_bar=progress, save_warmup=False)
                idata = az.InferenceData(posterior=shared.expanded(raw.posterior, data),
                                         sample_stats=raw.sample_stats)
            else:
                with shared.model:
                    if data:
                        pm.set_data(data)
                    idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores, random_seed=seed,
                                      target_accept=target_accept, nuts_sampler="pymc", progressbar=progress,
                                      compute_convergence_checks=False)
        except Exception:
            if stopped:  # the sampler failed on the chains the interruption cut short
                raise stopped[0] from None
            raise
    if stopped:
        raise stopped[0]
    got_chains, got_draws = int(idata.posterior.sizes["chain"]), int(idata.posterior.sizes["draw"])
    if (got_chains, got_draws) != (chains, draws):
        raise KeyboardInterrupt(f"sampling stopped early: {got_chains} chains x {got_draws} draws "
                                f"of {chains} x {draws}")
    kept = [v for v in shared.kept() if v in idata.posterior]
    groups = {"posterior": idata.posterior[kept]}
    if "sample_stats" in idata:
        groups["sample_stats"] = idata.sample_stats
    return az.InferenceData(**groups), caught
