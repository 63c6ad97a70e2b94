"""Benchmark of the Bayesian steps against one hand-built hierarchical model of log RT (run by hand, once).

The reference, timed in the same process: a centred PyMC model of log RT
with participant intercepts and slopes on a depth-1 learner's entropy,
written plainly over the trials (a_i ~ Normal(mu_a, tau_a), b_i ~
Normal(mu_b, tau_b), log RT ~ Normal(a_i + b_i h_t, sigma)), 2 chains x
1,000 draws after 1,000 tuning, sampled with nutpie, compilation included.

1. The rt step on 40 participants x 1,000 trials (5 blocks of 200) of the
   lantern-relay task with the default learner models and draws (4 chains x
   1,000): the models the random-effects selection leaves in play and the
   baseline, on one compiled model. Target: at most 1.0x the reference,
   every sampled model passing the gate.
2. The same call again in the same process: compilations counted (target
   none) and the time saved.
3. ``foretell analyze`` on the demo study (28 x 600) with default settings
   (``--analyze``). Target: at most 3x the reference, every Bayesian part
   passing the gate.
Peak memory of the process after each (target under 2 GB).

    PYTHONPATH=src python benchmarks/bayes.py [--participants 40] [--blocks 5] [--block-length 200] [--analyze]
"""

from __future__ import annotations

import argparse
import os
import resource
import time

import numpy as np

from foretell.demo import demo_log, demo_task
from foretell.hierarchical.gate import diagnose
from foretell.logs import validate_log
from foretell.models import model_specs
from foretell.regressors import regressors
from foretell.simulate import simulate_participants
from foretell.steps.measures import analyze_rt
from foretell.steps.whole import analyze
from foretell.tasks import load_task

TARGET_RT = 1.0
TARGET_ANALYZE = 3.0
TARGET_MB = 2048.0


def peak_mb() -> float:
    """Return the process's peak resident memory in MB."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def reference(log, task) -> tuple[float, str]:
    """Return (seconds, gate verdict) of the hand-built centred model of log RT, compiled and sampled with nutpie."""
    import nutpie
    import pymc as pm

    table = regressors(log, task, model_specs(["count-1"], task))
    frame = log.frame.assign(entropy=table["entropy"].to_numpy())
    rows = frame[frame["rt_ok"].astype(bool) & np.isfinite(frame["entropy"])]
    person = rows["participant"].astype("category").cat.codes.to_numpy().astype(np.int64)
    n_people = int(person.max()) + 1
    h, y = rows["entropy"].to_numpy(float), np.log(rows["rt"].to_numpy(float))
    start = time.perf_counter()
    with pm.Model() as model:
        mu_a, tau_a = pm.Normal("mu_a", -0.5, 1.0), pm.HalfNormal("tau_a", 1.0)
        mu_b, tau_b = pm.Normal("mu_b", 0.0, 1.0), pm.HalfNormal("tau_b", 1.0)
        a = pm.Normal("a", mu_a, tau_a, shape=n_people)
        b = pm.Normal("b", mu_b, tau_b, shape=n_people)
        pm.Normal("y", a[person] + b[person] * h, pm.HalfNormal("sigma", 1.0), observed=y)
    idata = nutpie.sample(nutpie.compile_pymc_model(model), draws=1000, tune=1000, chains=2, cores=2, seed=1,
                          progress_bar=False)
    seconds = time.perf_counter() - start
    verdict = diagnose(idata, "nutpie", var_names=["mu_a", "tau_a", "mu_b", "tau_b", "sigma", "a", "b"])
    return seconds, ("passes the gate" if verdict.ok else f"fails the gate ({'; '.join(verdict.reasons)})")


class Compilations:
    """Count nutpie's compilations while in the block."""

    def __enter__(self):
        import nutpie

        self.count, self._real = 0, nutpie.compile_pymc_model

        def counting(*args, **options):
            self.count += 1
            return self._real(*args, **options)

        nutpie.compile_pymc_model = counting
        return self

    def __exit__(self, *exc):
        import nutpie

        nutpie.compile_pymc_model = self._real


def gate_words(table) -> str:
    """Return how many rows of a diagnostics table pass the gate, and which fail."""
    failed = table.loc[~table["ok"].astype(bool)]
    label = "model" if "model" in table.columns else "metric"
    return (f"{int(table['ok'].sum())} of {len(table)} pass the gate"
            + (f"; failing: {', '.join(f'{getattr(r, label)} ({r.reasons})' for r in failed.itertuples())}"
               if len(failed) else ""))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--participants", type=int, default=40)
    parser.add_argument("--blocks", type=int, default=5)
    parser.add_argument("--block-length", type=int, default=200)
    parser.add_argument("--analyze", action="store_true", help="also time foretell analyze on the demo study")
    args = parser.parse_args()
    task = load_task("tasks/lantern-relay.toml")
    frame, _ = simulate_participants(task, args.participants, args.blocks, models=["count-1"], seed=1,
                                     block_length=args.block_length)
    log = validate_log(frame, task)
    print(f"load average (1, 5, 15 min): {', '.join(f'{v:.2f}' for v in os.getloadavg())}; "
          f"{args.participants} participants x {args.blocks * args.block_length} trials")
    t_ref, verdict = reference(log, task)
    print(f"reference (hand-built centred model of log RT, 2 chains x 1,000 draws, nutpie, compilation included): "
          f"{t_ref:.1f} s; {verdict}; peak {peak_mb():.0f} MB")
    runs = []
    for label in ("first run", "second run, same process"):
        with Compilations() as compiled:
            start = time.perf_counter()
            result = analyze_rt(log, task, seed=0, n_jobs=2, progress=False)
            runs.append(time.perf_counter() - start)
        print(f"rt step, {label} (default models and draws): {runs[-1]:.1f} s = {runs[-1] / t_ref:.2f}x the "
              f"reference (target <= {TARGET_RT:g}x); {compiled.count} compilation(s); "
              f"{gate_words(result.diagnostics)}; peak {peak_mb():.0f} MB (target < {TARGET_MB:g})")
    print(f"second run: {runs[0] - runs[1]:.1f} s saved by compiling nothing")
    print(next(n for n in result.notes if n.startswith("hierarchical models sampled")))
    if args.analyze:
        print(f"load average before analyze: {os.getloadavg()[0]:.2f}")
        start = time.perf_counter()
        whole = analyze(demo_log(), demo_task(), seed=0, n_jobs=2, progress=False)
        t_all = time.perf_counter() - start
        print(f"foretell analyze on the demo study (28 x 600), defaults: {t_all:.1f} s = {t_all / t_ref:.2f}x the "
              f"reference (target <= {TARGET_ANALYZE:g}x); peak {peak_mb():.0f} MB")
        for folder, table in (("rt", "rt_diagnostics"), ("groups", "group_diagnostics")):
            step = whole.steps.get(folder)
            if step is not None:
                print(f"  {folder}: {gate_words(step.tables()[table])}")


if __name__ == "__main__":
    main()
