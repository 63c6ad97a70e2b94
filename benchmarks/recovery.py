"""Benchmark of foretell.steps.design.recover against the fitting it cannot avoid (run by hand).

40 simulated participants x 3 models (count-0, count-1, count-2) x 3 trial
counts (120, 360, 600; blocks of 120) on the lantern-relay task. The
reference is the fitter alone (:func:`foretell.fitting.participants.fit_participants`, the
same options) on the same simulated participants, one call per cell: the
ratio says how much the recovery layer (simulation, validation, credit,
random-effects group check, tables) adds. Target: the whole recovery in about
a minute on a 2-core machine.

``--rt`` runs the RT design check instead (:func:`foretell.steps.design_rt.recover_rt`)
at realistic sizes: ``--rt-datasets`` datasets (default 40) of ``--participants``
participants (give 20 for a typical study) per process and trial count, the
same models and trial counts, an RT effect of ``--rt-effect`` ms per bit, and
prints the power and false-positive table, the time, and the answer.

    PYTHONPATH=src python benchmarks/recovery.py [--n-jobs 2] [--participants 40] [--rt [--rt-datasets 40]
                                                 [--rt-effect 40]]
"""

from __future__ import annotations

import argparse
import time

from foretell.fitting.participants import fit_participants
from foretell.logs import validate_log
from foretell.simulate import DEFAULT_RANGES, SpecDrawer
from foretell.steps.design import _Plan, _simulate, recover
from foretell.steps.design_rt import recover_rt
from foretell.tasks import load_task
from foretell.validation import child_int

MODELS = ["count-0", "count-1", "count-2"]
TRIALS = [120, 360, 600]
TARGET_S = 60.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n-jobs", type=int, default=2)
    parser.add_argument("--participants", type=int, default=40)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--rt", action="store_true", help="run the RT design check instead")
    parser.add_argument("--rt-datasets", type=int, default=40)
    parser.add_argument("--rt-effect", type=float, default=40.0, help="ms per bit (default 40)")
    args = parser.parse_args()
    task = load_task("tasks/lantern-relay.toml")
    if args.rt:
        rt_check(task, args)
        return

    start = time.perf_counter()
    result = recover(task, models=MODELS, n_participants=args.participants, trial_counts=TRIALS,
                     seed=args.seed, n_jobs=args.n_jobs, progress=False)
    whole = time.perf_counter() - start

    plan = _Plan.make(task, MODELS, False)
    fitting = 0.0
    for t in TRIALS:
        for g in plan.labels:
            drawer = SpecDrawer(g, "leak" in plan.specs[g].free, DEFAULT_RANGES, None)
            log, _ = _simulate(task, drawer, args.participants, t, args.seed)
            validated = validate_log(log, task)
            start = time.perf_counter()
            fit_participants(validated, task, [plan.specs[m] for m in plan.labels],
                             seed=child_int(args.seed, "fit", t, g), n_jobs=args.n_jobs, cv=False,
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


def rt_check(task, args: argparse.Namespace) -> None:
    """Print the RT design check's power and false positives at realistic sizes, and its time."""
    start = time.perf_counter()
    result = recover_rt(task, models=MODELS, n_participants=args.participants, trial_counts=TRIALS,
                        n_datasets=args.rt_datasets, effect=args.rt_effect / 1000, seed=args.seed,
                        n_jobs=args.n_jobs, progress=False)
    print(f"RT design check: {args.rt_datasets} datasets x {args.participants} participants x "
          f"{len(MODELS) + 2} processes x {len(TRIALS)} trial counts, {args.rt_effect:g} ms per bit, "
          f"n_jobs={args.n_jobs}: "
          f"{time.perf_counter() - start:.0f} s")
    print(result.rt_rates.to_string(index=False))
    print()
    print(result.answer)


if __name__ == "__main__":
    main()
