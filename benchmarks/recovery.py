"""Benchmark of foretell.steps.design.recover against the fitting it cannot avoid (run by hand).

40 simulated participants x 3 models (count-0, count-1, count-2) x 3 trial
counts (120, 360, 600; blocks of 120) on the lantern-relay task. The
reference is the fitter alone (:func:`foretell.fitting.participants.fit_participants`, the
same options) on the same simulated participants, one call per cell: the
ratio says how much the recovery layer (simulation, validation, credit,
random-effects group check, tables) adds. Target: the whole recovery in about
a minute on a 2-core machine.

    PYTHONPATH=src python benchmarks/recovery.py [--n-jobs 2] [--participants 40]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from foretell.fitting.participants import fit_participants
from foretell.logs import validate_log
from foretell.steps.design import DEFAULT_RANGES, _Drawer, _Plan, _simulate, recover
from foretell.tasks import load_task

MODELS = ["count-0", "count-1", "count-2"]
TRIALS = [120, 360, 600]
TARGET_S = 60.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n-jobs", type=int, default=2)
    parser.add_argument("--participants", type=int, default=40)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    task = load_task("tasks/lantern-relay.toml")

    start = time.perf_counter()
    result = recover(task, MODELS, n_participants=args.participants, trials=TRIALS, seed=args.seed,
                     n_jobs=args.n_jobs, progress=False)
    whole = time.perf_counter() - start

    plan = _Plan.make(task, MODELS, False)
    fitting = 0.0
    for t in TRIALS:
        for i, g in enumerate(plan.labels):
            sim, fit_seq, _ = np.random.SeedSequence(args.seed, spawn_key=(t, i)).spawn(3)
            drawer = _Drawer(g, "leak" in plan.specs[g].free, DEFAULT_RANGES, None)
            log, _ = _simulate(task, drawer, args.participants, t, sim)
            validated = validate_log(log, task)
            start = time.perf_counter()
            fit_participants(validated, task, [plan.specs[m] for m in plan.labels],
                             seed=int(fit_seq.generate_state(1)[0]), n_jobs=args.n_jobs, cv=False,
                             per_block=False, progress=False)
            fitting += time.perf_counter() - start

    n_fits = args.participants * len(MODELS) * len(TRIALS)
    print(f"recovery: {args.participants} participants x {len(MODELS)} models x {len(TRIALS)} trial "
          f"counts ({n_fits} simulated participants, each fitted with {len(MODELS)} models), "
          f"n_jobs={args.n_jobs}")
    print(f"  recover():             {whole:7.1f} s  (target about {TARGET_S:.0f} s: "
          f"{'met' if whole <= TARGET_S else 'missed'})")
    print(f"  fitter alone (ref.):   {fitting:7.1f} s")
    print(f"  ratio recover / fitter {whole / fitting:7.2f}")
    print()
    print(result.answer)


if __name__ == "__main__":
    main()
