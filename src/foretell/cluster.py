"""Where independent jobs run: this machine (joblib's processes) or an existing Dask cluster.

Participants (and recovery cells) are independent, and each draws its random
numbers from its own child of the seed, so the tables do not depend on where
or in which order the jobs ran. ``backend="dask"`` sends the same joblib jobs
to a running ``dask.distributed`` scheduler through joblib's Dask backend
(the optional extra ``foretell[dask]``).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

import joblib

from .errors import UsageError

BACKENDS = ("local", "dask")
CONNECT_TIMEOUT_S = 20


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
    with client, joblib.parallel_config(backend="dask"):
        yield
