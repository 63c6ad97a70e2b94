"""Scale: many long sessions on one machine, and the same participants on a two-worker Dask cluster.

Run by hand (PYTHONPATH=src python benchmarks/scale.py [--participants 200] [--trials 1000,2500,5000]).
Prints, for each session length, the wall time of foretell.fitting.participants.fit_participants with the default
models (CV and per-block refits included), the time per 1,000 trials and the peak resident memory of
the process tree; then the same participants on a distributed.LocalCluster with two workers against
local joblib with two processes (the ratio, and whether the tables are identical), and the same for
the per-participant path of foretell.steps.measures.analyze_rt (regressors, leak profiles, OLS/Huber fits), with
one local process as the plain reference. The load average is printed beside every figure: the
ratios move with what else the machine runs.
"""

from __future__ import annotations

import argparse
import os
import resource
import time

import pandas as pd

from foretell.cluster import job_backend
from foretell.fitting.participants import fit_participants
from foretell.logs import validate_log
from foretell.steps.measures import analyze_rt
from foretell.simulate import simulate_participants
from foretell.tasks import load_task


def peak_mb() -> float:
    """Return the peak resident memory of this process and its finished children, in MB."""
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return max(own, children) / 1024


BLOCKS = 10
"""Blocks per session, the same at every length: leave-one-block-out CV and per-block refits cost
O(blocks x trials), so a fixed number of blocks is what makes time linear in trials."""


def study(task, n_participants: int, n_trials: int, seed: int = 1):
    """Return a validated simulated study: one session of n_trials in BLOCKS blocks per participant."""
    frame, _ = simulate_participants(task, n_participants, BLOCKS,
                                     models=["count-0", "count-1", "count-2", "mix-3"],
                                     seed=seed, block_length=max(n_trials // BLOCKS, 1))
    return validate_log(frame, task)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--participants", type=int, default=200)
    parser.add_argument("--trials", default="1000,2500,5000")
    parser.add_argument("--cluster-trials", type=int, default=500)
    args = parser.parse_args()
    task = load_task("tide-gauge")
    print(f"{args.participants} participants, {BLOCKS} blocks each, default models, CV and per-block "
          "refits, n_jobs=2")
    print(f"{'trials':>7} {'wall s':>8} {'s per 1,000 trials':>19} {'peak MB':>8} {'load':>5}")
    for n_trials in (int(t) for t in args.trials.split(",")):
        log = study(task, args.participants, n_trials)
        start = time.perf_counter()
        fit_participants(log, task, seed=0, n_jobs=2, progress=False)
        wall = time.perf_counter() - start
        per_k = wall / (args.participants * n_trials / 1000)
        print(f"{n_trials:>7} {wall:>8.1f} {per_k:>19.4f} {peak_mb():>8.0f} {os.getloadavg()[0]:>5.1f}")

    import distributed

    log = study(task, args.participants, args.cluster_trials, seed=2)
    start = time.perf_counter()
    local = fit_participants(log, task, seed=0, n_jobs=2, progress=False)
    local_s = time.perf_counter() - start
    start = time.perf_counter()
    serial_rt = analyze_rt(log, task, bayes=False)
    serial_rt_s = time.perf_counter() - start
    start = time.perf_counter()
    local_rt = analyze_rt(log, task, bayes=False, n_jobs=2)
    local_rt_s = time.perf_counter() - start
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster:
        start = time.perf_counter()
        with job_backend("dask", cluster.scheduler_address):
            remote = fit_participants(log, task, seed=0, progress=False)
        cluster_s = time.perf_counter() - start
        start = time.perf_counter()
        with job_backend("dask", cluster.scheduler_address):
            remote_rt = analyze_rt(log, task, bayes=False)
        cluster_rt_s = time.perf_counter() - start
    same = all(getattr(local, name).equals(getattr(remote, name)) for name in ("fits", "blocks", "predictions"))
    same_rt = all(serial_rt.tables()[name].equals(other.tables()[name])
                  for other in (local_rt, remote_rt) for name in serial_rt.tables())
    print(f"\n{args.participants} participants x {args.cluster_trials} trials, load {os.getloadavg()[0]:.1f}")
    print(f"fit: local joblib (2 processes) {local_s:.1f} s, LocalCluster (2 workers) {cluster_s:.1f} s, "
          f"ratio {cluster_s / local_s:.2f}; tables identical: {same}")
    print(f"rt per-participant path: one process {serial_rt_s:.1f} s, local joblib (2 processes) "
          f"{local_rt_s:.1f} s (ratio {local_rt_s / serial_rt_s:.2f}), LocalCluster (2 workers) "
          f"{cluster_rt_s:.1f} s (ratio {cluster_rt_s / serial_rt_s:.2f}); tables identical: {same_rt}")

if __name__ == "__main__":
    pd.set_option("display.width", 120)
    main()
