"""Jobs on a Dask cluster give the same tables as local jobs."""

from __future__ import annotations

import pandas as pd
import pytest

from foretell.cluster import job_backend
from foretell.errors import UsageError
from foretell.fitting import fit_participants
from foretell.logs import validate_log
from foretell.simulate import simulate_participants
from foretell.tasks import load_task

distributed = pytest.importorskip("distributed")


def test_dask_backend_gives_the_local_tables() -> None:
    task = load_task("tide-gauge")
    frame, _ = simulate_participants(task, 4, 2, models=["count-0", "count-1"], seed=2, block_length=40)
    log = validate_log(frame, task)
    models = ["count-0", "count-1"]
    local = fit_participants(log, task, models, seed=1, n_jobs=2)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        with job_backend("dask", cluster.scheduler_address):
            remote = fit_participants(log, task, models, seed=1, n_jobs=2)
    for name in ("fits", "blocks", "predictions"):
        pd.testing.assert_frame_equal(getattr(local, name), getattr(remote, name))


@pytest.mark.parametrize("backend, scheduler, message", [
    ("spark", None, "backend must be"), ("dask", None, "address"), ("local", "tcp://x:1", "only used"),
    ("dask", "tcp://127.0.0.1:9", "cannot reach"),
])
def test_bad_backend_settings_are_usage_errors(backend, scheduler, message) -> None:
    with pytest.raises(UsageError, match=message):
        with job_backend(backend, scheduler, timeout=2):
            pass
