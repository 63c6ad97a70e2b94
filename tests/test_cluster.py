"""Jobs on a Dask cluster give the same tables as local jobs, and batching never changes a result."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from foretell.cli.main import main
from foretell.cluster import batches, job_backend, job_count
from foretell.errors import UsageError
from foretell.fitting.participants import fit_participants
from foretell.logs import validate_log
from foretell.steps.measures import analyze_rt
from foretell.simulate import simulate_participants
from foretell.tasks import load_task

distributed = pytest.importorskip("distributed")


def test_dask_backend_gives_the_local_tables() -> None:
    task = load_task("tide-gauge")
    frame, _ = simulate_participants(task, 4, 2, models=["count-0", "count-1"], seed=2, block_length=40)
    log = validate_log(frame, task)
    models = ["count-0", "count-1"]
    local = fit_participants(log, task, models, seed=1, n_jobs=2)
    with _cluster() as cluster:
        with job_backend("dask", cluster.scheduler_address):
            remote = fit_participants(log, task, models, seed=1, n_jobs=2)
        assert _ran_there(cluster, "_fit_chunk")
    for name in ("fits", "blocks", "predictions"):
        pd.testing.assert_frame_equal(getattr(local, name), getattr(remote, name))


def test_rt_per_participant_path_on_dask_gives_the_local_tables() -> None:
    task = load_task("tide-gauge")
    frame, _ = simulate_participants(task, 5, 2, models=["count-0", "count-1"], seed=2, block_length=40)
    log = validate_log(frame, task)
    models = ["count-0", "count-1", "count-1-leak", "mix-3"]  # the leak is profiled in the jobs
    local = analyze_rt(log, task, models=models, bayes=False)
    with _cluster() as cluster:
        with job_backend("dask", cluster.scheduler_address):
            remote = analyze_rt(log, task, models=models, bayes=False, n_jobs=2)
        assert _ran_there(cluster, "_participant_path")
    for name, table in local.tables().items():
        pd.testing.assert_frame_equal(table, remote.tables()[name])
    assert local.notes == remote.notes


def test_a_cluster_spreads_jobs_over_all_its_workers() -> None:
    assert job_count(1) == 1
    with _cluster() as cluster:
        with job_backend("dask", cluster.scheduler_address):
            assert job_count(1) == job_count(-1) == 2
    assert job_count(1) == 1


def _cluster() -> distributed.LocalCluster:
    """Return a two-worker cluster in this process (threads): enough to send jobs through Dask."""
    return distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                    dashboard_address=None)


def _ran_there(cluster: distributed.LocalCluster, function: str) -> bool:
    """Return whether the cluster's scheduler ran joblib batches of ``function``."""
    return any(function in prefix for prefix in cluster.scheduler.task_prefixes)


@pytest.mark.parametrize("sizes, workers, most, expected", [
    ([5, 5, 5, 5], 2, 100, [(0, 2), (2, 4)]),
    ([5, 5, 5, 5], 1, 10, [(0, 2), (2, 4)]),  # more batches when one would exceed `most`
    ([1, 1], 8, 100, [(0, 1), (1, 2)]),  # never more batches than participants
    ([50, 1, 1, 1], 2, 100, [(0, 1), (1, 4)]),
    ([], 2, 100, []),
])
def test_batches_are_consecutive_and_cover_everyone(sizes, workers, most, expected) -> None:
    assert batches(sizes, workers, most) == expected


@pytest.mark.parametrize("backend, scheduler, message", [
    ("spark", None, "backend must be"), ("dask", None, "address"), ("local", "tcp://x:1", "only used"),
    ("dask", "tcp://127.0.0.1:9", "cannot reach"),
])
def test_bad_backend_settings_are_usage_errors(backend, scheduler, message) -> None:
    with pytest.raises(UsageError, match=message):
        with job_backend(backend, scheduler, timeout=2):
            pass


def test_a_scheduler_without_workers_is_a_usage_error_with_cli_advice() -> None:
    from distributed import LocalCluster

    with LocalCluster(n_workers=0, processes=False, dashboard_address=None) as cluster:
        with pytest.raises(UsageError, match=r"has no workers: start one .* with: dask worker ") as caught:
            with job_backend("dask", cluster.scheduler_address, timeout=1):
                pass
    assert "\\n" not in str(caught.value) and "=" not in str(caught.value)


@pytest.mark.parametrize("args, function, outputs", [
    (["rt", "--models", "count-0,count-1,count-1-leak", "--no-bayes"], "_participant_path",
     ["rt_fits.csv", "rt_compare.csv", "rt_blocks.csv", "regressors.csv"]),
    (["analyze", "--models", "count-0,count-1", "--skip", "rt,groups,events,report"], "_fit_chunk",
     ["fit/fits.csv", "fit/blocks.csv", "fit/trials.csv", "fit/winners.csv"]),
])
def test_commands_on_a_cluster_write_the_local_tables(args: list[str], function: str,
                                                      outputs: list[str], tmp_path: Path) -> None:
    frame, _ = simulate_participants(load_task("tide-gauge"), 4, 2, models=["count-1"], seed=6,
                                     block_length=40)
    log = tmp_path / "study.csv"
    frame.assign(rt=frame["rt"].round(3)).to_csv(log, index=False)
    common = [args[0], str(log), "--task", "tide-gauge", *args[1:]]
    assert main([*common, "--jobs", "2", "--out", str(tmp_path / "here")]) == 0
    with _cluster() as cluster:  # --jobs 1: on a cluster every worker is used anyway
        assert main([*common, "--jobs", "1", "--out", str(tmp_path / "there"), "--backend", "dask",
                     "--scheduler", cluster.scheduler_address]) == 0
        assert _ran_there(cluster, function)
    for name in outputs:
        assert (tmp_path / "here" / name).read_bytes() == (tmp_path / "there" / name).read_bytes()


@pytest.mark.parametrize("command", ["fit", "rt", "analyze"])
def test_backend_options_are_checked_by_every_command_that_takes_them(
        command: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = tmp_path / "log.csv"
    log.write_text("participant,block,trial,stimulus,response,rt\n"
                   + "".join(f"p01,1,{t},up,down,0.4\n" for t in range(1, 30)))
    args = [command, str(log), "--task", "tide-gauge", "--out", str(tmp_path / "out")]
    assert main([*args, "--backend", "dask"]) == 2
    assert "scheduler's address" in capsys.readouterr().err
    assert main([*args, "--scheduler", "tcp://127.0.0.1:9"]) == 2
    assert "only used with the dask backend" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()
