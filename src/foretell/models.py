"""The model registry: model identifiers -> learner, context depth and free parameters."""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np
import pandas as pd

from foretell.errors import UsageError
from foretell.learners import Counting, Source, TaskCounting, TreeMixture
from foretell.learners.mixture import MAX_TREE_DEPTH
from foretell.params import CHOICE_PARAMS, DEFAULT_ALPHA, LEARNER_PARAMS, PARAMS, Param
from foretell.tasks import Task

FAMILIES = ("shallow", "deep")
"""Model families: learners that use at most one symbol of the past, and those that use more."""
SHALLOW_MAX_DEPTH = 1


@dataclass(frozen=True)
class ModelSpec:
    """A candidate model: learner factory, context depth, family and free parameters.

    Attributes
    ----------
    model_id : str
        The canonical id (``count-2``, ``mix-4``, ...).
    depth : int
        The deepest context the learner uses (the warm-up it needs).
    free : tuple of str
        The fitted parameters: inv_temp and lapse first, then any of leak and alpha.
    tunable : tuple of str
        The learner parameters the factory accepts.
    defaults : tuple of (name, value)
        The learner values used when they are not fitted.
    factory : callable
        Returns the learner for given tunable values.
    family : str or None
        "shallow" (depth <= 1), "deep" (depth >= 2) or None for the oracle
        ``source``, which learns nothing.
    signature : tuple
        What the learner computes: two specs with equal signatures and equal
        free parameters make identical predictions on every sequence (e.g.
        count-task on a memoryless task is count-0; :func:`lookalikes`).
    """

    model_id: str
    depth: int
    free: tuple[str, ...]
    tunable: tuple[str, ...]
    defaults: tuple[tuple[str, float], ...]
    factory: Callable[..., Any] = field(compare=False, repr=False)
    family: str | None = None
    signature: tuple = ()

    def learner(self, **values: float) -> Any:
        """Return the learner with ``values`` for its tunable parameters (defaults otherwise)."""
        kwargs = dict(self.defaults)
        kwargs.update({k: v for k, v in values.items() if k in self.tunable})
        return self.factory(**kwargs)

    @property
    def params(self) -> tuple[Param, ...]:
        """Return the specifications (bounds, starts, scale) of the free parameters."""
        return tuple(PARAMS[name] for name in self.free)


_COUNT = re.compile(r"count-(\d+)(-leak)?")
_MIX = re.compile(r"mix-(\d+)")
MAX_MODEL_DEPTH = MAX_TREE_DEPTH
"""The deepest context a model may use: the tree mixture's limit, and the counting learners' too."""
_FORMS = "count-K, count-K-leak, count-task, mix-D, source (K, D whole numbers)"


def parse_model(model_id: str, task: Task, free: Iterable[str] = ()) -> ModelSpec:
    """Return the specification of one model identifier for ``task``.

    Parameters
    ----------
    model_id : str
        ``count-k`` (Dirichlet counting on the last k symbols), ``count-k-leak``
        (the same with the leak fitted in [0, 0.95]), ``count-task`` (counting
        on the task's own contexts), ``mix-D`` (Bayesian context-tree mixture of
        depth D) or ``source`` (the task's true probabilities); read
        case-insensitively (:func:`normalise_model_id`).
    task : Task
    free : iterable of str
        Adds ``leak`` and/or ``alpha`` to the fitted parameters of every
        learner that has them (the mixture has no leak, the source neither).

    Returns
    -------
    ModelSpec

    Raises
    ------
    UsageError
        For an unknown id, a depth beyond :data:`MAX_MODEL_DEPTH`, a model that
        needs the task's source when the task gives none, or an unknown freed parameter.

    Examples
    --------
    >>> from foretell.tasks import load_task
    >>> parse_model("Count-02", load_task("tide-gauge")).model_id
    'count-2'
    """
    extra = _check_free(free)
    model_id = normalise_model_id(model_id)
    fixed_leak = {"leak": 0.0}
    if (match := _COUNT.fullmatch(model_id)) is not None:
        depth, leaky = int(match.group(1)), match.group(2) is not None
        factory, tunable, defaults = partial(Counting, depth=depth), LEARNER_PARAMS, fixed_leak
        extra = extra + ("leak",) if leaky else extra
        signature: tuple = ("count", depth)
    elif model_id == "count-task":
        if not task.has_source:
            raise UsageError(f"model 'count-task' counts on the task's own contexts, and task "
                             f"{task.name!r} gives none")
        depth, factory = task.max_depth, partial(TaskCounting, task)
        tunable, defaults = LEARNER_PARAMS, fixed_leak
        full = len(task.contexts) == task.n_symbols ** depth and all(len(c) == depth for c in task.contexts)
        signature = ("count", depth) if full else ("count-task", task.contexts)
    elif (match := _MIX.fullmatch(model_id)) is not None:
        depth = int(match.group(1))
        factory, tunable, defaults = partial(TreeMixture, max_depth=depth), ("alpha",), {}
        signature = ("mix", depth)
    elif model_id == "source":
        if not task.has_source:
            raise UsageError(f"model 'source' needs the task's source probabilities, and task "
                             f"{task.name!r} gives none")
        depth, factory, tunable, defaults = task.max_depth, partial(Source, task), (), {}
        signature = ("source",)
    else:
        raise UsageError(f"unknown model {model_id!r}; expected one of {_FORMS}")
    if depth > MAX_MODEL_DEPTH:
        raise UsageError(f"model {model_id!r} looks {depth} symbols back; foretell's learners "
                         f"look at most {MAX_MODEL_DEPTH} back")
    defaults = {"alpha": DEFAULT_ALPHA, **defaults} if "alpha" in tunable else defaults
    learner_free = tuple(p for p in LEARNER_PARAMS if p in extra and p in tunable)
    family = None if model_id == "source" else \
        ("shallow" if depth <= SHALLOW_MAX_DEPTH else "deep")
    return ModelSpec(model_id, depth, CHOICE_PARAMS + learner_free, tunable,
                     tuple(sorted(defaults.items())), factory, family, signature)


def normalise_model_id(model_id: str) -> str:
    """Return the canonical spelling of a model id: stray spaces and case dropped, leading zeros too.

    Parameters
    ----------
    model_id : str

    Returns
    -------
    str

    Examples
    --------
    >>> normalise_model_id(" Count-01-Leak")
    'count-1-leak'
    """
    text = str(model_id).strip().lower()
    if (match := _COUNT.fullmatch(text)) is not None:
        return f"count-{int(match.group(1))}{match.group(2) or ''}"
    if (match := _MIX.fullmatch(text)) is not None:
        return f"mix-{int(match.group(1))}"
    return text


def model_specs(models: Sequence[str | ModelSpec] | None, task: Task,
                free: Iterable[str] = ()) -> list[ModelSpec]:
    """Return the specifications of ``models``.

    Parameters
    ----------
    models : sequence of str or ModelSpec, or None
        Identifiers or specs; None: :func:`default_models`.
    task : Task
    free : iterable of str
        As :func:`parse_model`.

    Returns
    -------
    list of ModelSpec

    Raises
    ------
    UsageError
        For no models, an unknown id, or a model listed twice (after normalising).
    """
    ids = default_models(task) if models is None else list(models)
    if not ids:
        raise UsageError("no models to fit")
    specs = [m if isinstance(m, ModelSpec) else parse_model(m, task, free) for m in ids]
    seen = [s.model_id for s in specs]
    if len(set(seen)) != len(seen):
        twice = sorted({s for s in seen if seen.count(s) > 1})
        raise UsageError(f"models listed twice (ids are compared after normalising, e.g. "
                         f"count-01 is count-1): {', '.join(twice)}")
    return specs


def default_warmup(task: Task) -> int:
    """Return the warm-up of the default model set: its largest context depth.

    Parameters
    ----------
    task : Task

    Returns
    -------
    int
        The unscored trials at the start of each session when the default
        set (:func:`default_models`) is fitted.
    """
    return max(parse_model(m, task).depth for m in default_models(task))


def default_models(task: Task) -> list[str]:
    """Return the default model set for ``task``.

    Parameters
    ----------
    task : Task

    Returns
    -------
    list of str
        count-0 ... count-K with K = max(task.max_depth + 1, 3) (within the
        learners' limit), count-0-leak, count-1-leak, count-task, mix-K and
        source; count-task and source only when the task gives its source.
    """
    k = min(max(task.max_depth + 1, 3), MAX_MODEL_DEPTH)
    return ([f"count-{d}" for d in range(k + 1)] + ["count-0-leak", "count-1-leak"]
            + (["count-task"] if task.has_source else []) + [f"mix-{k}"]
            + (["source"] if task.has_source else []))


def _check_free(free: Iterable[str]) -> tuple[str, ...]:
    """Return ``free`` as a tuple after checking every name is a learner parameter."""
    names = (free,) if isinstance(free, str) else tuple(free)
    unknown = [p for p in names if p not in LEARNER_PARAMS]
    if unknown:
        raise UsageError(f"cannot free {unknown}: only {', '.join(LEARNER_PARAMS)} can be freed "
                         "(inv_temp and lapse are always fitted)")
    return names


def lookalikes(specs: Sequence[ModelSpec], predictions: pd.DataFrame | None = None,
               tol: float = 1e-12) -> list[tuple[str, ...]]:
    """Return the sets of models that cannot be told apart, each in the order of ``specs``.

    Models that make identical predictions would split their evidence
    between them; pass the sets as ``merge`` to the comparisons
    (:mod:`foretell.compare`), which keep the first model of each set and
    name the others in ``note``.

    Parameters
    ----------
    specs : sequence of ModelSpec
    predictions : pandas.DataFrame, optional
        One row per trial and model: participant, session, block, trial,
        model, p_<symbol>.
    tol : float, default 1e-12
        Largest difference of two predictions called equal.

    Returns
    -------
    list of tuple of str
        Sets of two or more models, ordered by their first model. Two models
        are look-alikes when they have the same free parameters and either
        the same :attr:`ModelSpec.signature` (identical predictions on every
        sequence by construction, e.g. ``count-task`` on a memoryless task and
        ``count-0``) or, as a safety net, the same trials and every p_<symbol>
        within ``tol`` in ``predictions``; sets are closed under both relations.

    Raises
    ------
    UsageError
        For predictions without p_<symbol> columns or trial keys.
    """
    ids = [s.model_id for s in specs]
    sets = Partition(ids)
    pairs = [(i, j) for i in range(len(specs)) for j in range(i + 1, len(specs))
             if specs[i].free == specs[j].free]
    for i, j in pairs:
        if specs[i].signature and specs[i].signature == specs[j].signature:
            sets.join(ids[i], ids[j])
    if predictions is not None and len(predictions):
        columns = sorted(c for c in predictions.columns if c.startswith("p_"))
        keys = [c for c in ("participant", "session", "block", "trial") if c in predictions.columns]
        if not columns or not keys:
            raise UsageError("predictions need p_<symbol> columns and participant, session, block, trial")
        tables = {m: part.sort_values(keys).set_index(keys)[columns]
                  for m, part in predictions.groupby("model", sort=False) if m in ids}
        for i, j in pairs:
            a, b = tables.get(ids[i]), tables.get(ids[j])
            if sets.same(ids[i], ids[j]) or a is None or b is None or not a.index.equals(b.index):
                continue
            if np.allclose(a.to_numpy(float), b.to_numpy(float), rtol=0.0, atol=tol, equal_nan=True):
                sets.join(ids[i], ids[j])
    return sets.sets()


class Partition:
    """Model ids joined into sets (union-find): each set is closed under every join made.

    Parameters
    ----------
    ids : sequence of str
        The models, in the order their sets list them (the first of a set is the one kept).
    """

    def __init__(self, ids: Sequence[str]) -> None:
        self._order = {m: i for i, m in enumerate(dict.fromkeys(ids))}
        self._parent = {m: m for m in self._order}

    def _root(self, model: str) -> str:
        while self._parent[model] != model:
            self._parent[model] = self._parent[self._parent[model]]
            model = self._parent[model]
        return model

    def join(self, a: str, b: str) -> None:
        """Put ``a`` and ``b`` (and their sets) in one set."""
        first, second = sorted((self._root(a), self._root(b)), key=self._order.__getitem__)
        self._parent[second] = first

    def same(self, a: str, b: str) -> bool:
        """Return whether ``a`` and ``b`` are in one set."""
        return self._root(a) == self._root(b)

    def sets(self) -> list[tuple[str, ...]]:
        """Return the sets of two or more models, each and all in the order of ``ids``."""
        members: dict[str, list[str]] = {}
        for model in self._order:
            members.setdefault(self._root(model), []).append(model)
        return [tuple(m) for m in members.values() if len(m) > 1]


def lookalike_note(kept: str, others: Sequence[str]) -> str:
    """Return the words that say ``others`` were left out as identical to ``kept``.

    Parameters
    ----------
    kept : str
    others : sequence of str

    Returns
    -------
    str

    Examples
    --------
    >>> lookalike_note("count-0", ["count-task"])
    'count-task left out: identical to count-0 on this task'
    """
    return f"{', '.join(others)} left out: identical to {kept} on this task"
