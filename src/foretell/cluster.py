"""Where independent jobs run: this machine (joblib's processes) or an existing Dask cluster.

Participants (and recovery cells) are independent, and each draws its random
numbers from its own child of the seed, so the tables do not depend on where
or in which order the jobs ran. ``backend="dask"`` sends the same joblib jobs
to a running ``dask.distributed`` scheduler through joblib's Dask backend
(the optional extra ``foretell[dask]``).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from contextvars import ContextVar

import joblib
from joblib import effective_n_jobs
from joblib.externals.loky import get_reusable_executor
import numpy as np

from .errors import UsageError

BACKENDS = ("local", "dask")
CONNECT_TIMEOUT_S = 20
_ON_CLUSTER: ContextVar[bool] = ContextVar("on_cluster", default=False)


@contextmanager
def job_backend(backend: str = "local", scheduler: str | None = None, *,
                timeout: float = CONNECT_TIMEOUT_S) -> Iterator[None]:
    """Run the enclosed joblib work locally (``"local"``) or on the Dask scheduler at ``scheduler``.

    ``scheduler`` is the scheduler's address, e.g. ``tcp://10.0.0.5:8786``, or
    a ``distributed.LocalCluster`` (tests); ``timeout`` bounds the connection
    attempt in seconds. The client is closed on exit.
    """
    if backend not in BACKENDS:
        raise UsageError(f"backend must be one of {', '.join(BACKENDS)}, got {backend!r}")
    if backend == "local":
        if scheduler is not None:
            raise UsageError("a scheduler address is only used with the dask backend")
        yield
        return
    try:
        from distributed import Client
    except ImportError:
        raise UsageError("the dask backend needs the optional extra: pip install 'foretell[dask]'") from None
    if scheduler is None or (isinstance(scheduler, str) and not scheduler.strip()):
        raise UsageError("the dask backend needs the scheduler's address, e.g. --scheduler tcp://host:8786")
    try:
        client = Client(scheduler, timeout=timeout)
    except (OSError, TimeoutError, ValueError) as err:
        raise UsageError(f"cannot reach the Dask scheduler at {scheduler}: {err}") from None
    _check_workers(client, scheduler, timeout)
    token = _ON_CLUSTER.set(True)
    try:
        with client, joblib.parallel_config(backend="dask"):
            yield
    finally:
        _ON_CLUSTER.reset(token)


def _check_workers(client: object, scheduler: object, timeout: float) -> None:
    """Raise UsageError (after closing ``client``) when the scheduler has no worker within ``timeout`` seconds."""
    try:
        client.wait_for_workers(1, timeout=timeout)
    except (OSError, TimeoutError):
        client.close()
        where = scheduler if isinstance(scheduler, str) else "the cluster"
        raise UsageError(f"the Dask scheduler at {where} has no workers: start one on each machine "
                         f"of the cluster with: dask worker {where}") from None


def job_count(n_jobs: int) -> int:
    """Return how many workers the jobs are spread over.

    Inside ``job_backend("dask", ...)``: every worker of the cluster
    (``n_jobs`` is then ignored); elsewhere joblib's count for ``n_jobs`` on
    this machine (-1: all cores).
    """
    return int(effective_n_jobs(-1 if _ON_CLUSTER.get() else n_jobs))


@contextmanager
def workers_stopped(n_jobs: int) -> Iterator[None]:
    """Kill joblib's local worker processes when the enclosed work fails or is interrupted.

    KeyboardInterrupt (SIGTERM in the CLI) included, so that no worker
    outlives the run; ``n_jobs`` 1 runs in this process and has none.
    """
    try:
        yield
    except BaseException:
        if int(n_jobs) != 1:
            get_reusable_executor().shutdown(wait=False, kill_workers=True)
        raise


def batches(sizes: Sequence[int], workers: int, most: int) -> list[tuple[int, int]]:
    """Return consecutive (start, stop) ranges of items (participants) with about equal summed sizes (trials).

    One range per worker, more when a range would sum to over ``most``, never
    more ranges than items. The ranges depend on the data and ``workers``
    only; callers whose results do not depend on the batching (every
    participant's result computed on its own) give the same tables however
    the work is split.
    """
    sizes = np.asarray(sizes, dtype=np.int64)
    if not len(sizes):
        return []
    total = int(sizes.sum())
    n = min(len(sizes), max(-(-total // int(most)), int(workers), 1))
    # cut after the first item whose running total reaches each target (a large first item alone)
    edges = np.searchsorted(np.cumsum(sizes), np.linspace(0, total, n + 1)[1:-1], side="left") + 1
    bounds = np.unique(np.r_[0, edges, len(sizes)])
    return [(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]
