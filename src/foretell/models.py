"""The model registry: model identifiers -> learner, context depth and free parameters."""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from functools import partial
from typing import Any

from foretell.errors import UsageError
from foretell.learners import Counting, Source, TaskCounting, TreeMixture
from foretell.params import CHOICE_PARAMS, DEFAULT_ALPHA, LEARNER_PARAMS, PARAMS, Param
from foretell.tasks import Task

@dataclass(frozen=True)
class ModelSpec:
    """A candidate model: learner factory, context depth, free parameters.

    ``free`` lists the fitted parameters (inv_temp and lapse first, then any
    of leak and alpha); ``tunable`` the learner parameters the factory
    accepts; ``defaults`` the learner values used when they are not fitted.
    """

    model_id: str
    depth: int
    free: tuple[str, ...]
    tunable: tuple[str, ...]
    defaults: tuple[tuple[str, float], ...]
    factory: Callable[..., Any] = field(compare=False, repr=False)

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
_FORMS = "count-K, count-K-leak, count-task, mix-D, source (K, D whole numbers)"


def parse_model(model_id: str, task: Task, free: Iterable[str] = ()) -> ModelSpec:
    """Return the specification of one model identifier for ``task``.

    Identifiers: ``count-k`` (Dirichlet counting on the last k symbols),
    ``count-k-leak`` (the same with the leak fitted in [0, 0.95]),
    ``count-task`` (counting on the task's own contexts), ``mix-D`` (Bayesian
    context-tree mixture of depth D) and ``source`` (the task's true
    probabilities). ``free`` adds ``leak`` and/or ``alpha`` to the fitted
    parameters of every learner that has them (the mixture has no leak, the
    source neither).
    """
    extra = _check_free(free)
    fixed_leak = {"leak": 0.0}
    if (match := _COUNT.fullmatch(model_id)) is not None:
        depth, leaky = int(match.group(1)), match.group(2) is not None
        factory, tunable, defaults = partial(Counting, depth=depth), LEARNER_PARAMS, fixed_leak
        extra = extra + ("leak",) if leaky else extra
    elif model_id == "count-task":
        depth, factory = task.max_depth, partial(TaskCounting, task)
        tunable, defaults = LEARNER_PARAMS, fixed_leak
    elif (match := _MIX.fullmatch(model_id)) is not None:
        depth = int(match.group(1))
        factory, tunable, defaults = partial(TreeMixture, max_depth=depth), ("alpha",), {}
    elif model_id == "source":
        depth, factory, tunable, defaults = task.max_depth, partial(Source, task), (), {}
    else:
        raise UsageError(f"unknown model {model_id!r}; expected one of {_FORMS}")
    defaults = {"alpha": DEFAULT_ALPHA, **defaults} if "alpha" in tunable else defaults
    learner_free = tuple(p for p in LEARNER_PARAMS if p in extra and p in tunable)
    return ModelSpec(model_id, depth, CHOICE_PARAMS + learner_free, tunable,
                     tuple(sorted(defaults.items())), factory)


def model_specs(models: Sequence[str | ModelSpec] | None, task: Task,
                free: Iterable[str] = ()) -> list[ModelSpec]:
    """Return the specifications of ``models`` (identifiers or specs; None = :func:`default_models`)."""
    ids = default_models(task) if models is None else list(models)
    if not ids:
        raise UsageError("no models to fit")
    specs = [m if isinstance(m, ModelSpec) else parse_model(m, task, free) for m in ids]
    seen = [s.model_id for s in specs]
    if len(set(seen)) != len(seen):
        raise UsageError(f"models listed twice: {sorted({s for s in seen if seen.count(s) > 1})}")
    return specs


def default_models(task: Task) -> list[str]:
    """Return the default model set for ``task``.

    count-0 ... count-K with K = max(task.max_depth + 1, 3), count-0-leak,
    count-1-leak, count-task, mix-K and source.
    """
    k = max(task.max_depth + 1, 3)
    return ([f"count-{d}" for d in range(k + 1)]
            + ["count-0-leak", "count-1-leak", "count-task", f"mix-{k}", "source"])


def _check_free(free: Iterable[str]) -> tuple[str, ...]:
    """Return ``free`` as a tuple after checking every name is a learner parameter."""
    names = (free,) if isinstance(free, str) else tuple(free)
    unknown = [p for p in names if p not in LEARNER_PARAMS]
    if unknown:
        raise UsageError(f"cannot free {unknown}: only {', '.join(LEARNER_PARAMS)} can be freed "
                         "(inv_temp and lapse are always fitted)")
    return names
