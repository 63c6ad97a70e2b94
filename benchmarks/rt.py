"""Benchmark of the RT analyses: per-participant fits for 10 models, and one hierarchical model.

40 simulated participants x 1,000 trials (5 blocks of 200) of the lantern-relay
task, RTs from the simulator's law (driven by a depth-1 learner's entropy).

1. The per-participant path (regressors, OLS + Newey-West + Huber for every
   participant x model, per-block fits, summed-BIC ranking) for the 10 default
   models, against a straightforward loop of statsmodels fits (OLS with HAC
   and RLM with HuberT per participant x model) on the same regressors.
   Target: < 3 s for the foretell path.
2. One hierarchical model (count-1), 2 chains x 1,000 draws after 1,000
   tuning: wall time including compilation, peak memory, diagnostics, the
   parameterisation chosen. Target: < 120 s, < 4 GB, the default Gate passed.
3. Few blocks: 20 participants x 4 blocks of 100 trials, count-0 against
   count-1, 4 chains x 1,000 draws: PSIS-LOO alone (the plain reference) and
   with exact refits of the units whose Pareto k is above 0.7; wall time, the
   refits made, and whether the comparison is called.

Run once, by hand, on a quiet machine: PYTHONPATH=src python benchmarks/rt.py
"""

from __future__ import annotations

import os
import resource
import time
import warnings

import numpy as np
import pandas as pd
import statsmodels.api as sm

from foretell.logs import validate_log
from foretell.models import default_models, model_specs
from foretell.regressors import regressors
from foretell.steps.measures import analyse_rt, newey_west_lags
from foretell.simulate import simulate_participants
from foretell.tasks import load_task

TARGET_S = 3.0
TARGET_BAYES_S = 120.0
TARGET_BAYES_MB = 4096.0


def study():
    task = load_task("tasks/lantern-relay.toml")
    frame, _ = simulate_participants(task, 40, 5, models=["count-1"], seed=1, block_length=200)
    return validate_log(frame, task), task


def statsmodels_loop(log, table, models) -> float:
    """Return the seconds a plain loop of statsmodels OLS-HAC and RLM fits takes on the same data."""
    frame = log.frame
    entropy = {key: rows["entropy"].to_numpy()  # split before the clock starts
               for key, rows in table.groupby(["participant", "model"], sort=False, observed=True)}
    start = time.perf_counter()
    for pid, rows in frame.groupby("participant", sort=False):
        for model in models:
            h = entropy[(pid, model)]
            ok = rows["rt_ok"].to_numpy() & np.isfinite(h)
            ok[: 4] = False
            order = rows.groupby(["session", "block"]).ngroup().to_numpy()
            X = sm.add_constant(np.column_stack([h[ok], order[ok]]))
            y = np.log(rows["rt"].to_numpy()[ok])
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                sm.OLS(y, X).fit(cov_type="HAC", cov_kwds={"maxlags": newey_west_lags(len(y))})
                sm.RLM(y, X, M=sm.robust.norms.HuberT()).fit()
    return time.perf_counter() - start


def main() -> None:
    log, task = study()
    models = default_models(task)
    print(f"load average (1, 5, 15 min): {', '.join(f'{v:.2f}' for v in os.getloadavg())}")
    print(f"data: {log.frame['participant'].nunique()} participants x "
          f"{len(log.frame) // log.frame['participant'].nunique()} trials; models: {len(models)}")

    leaky = [s.model_id for s in model_specs(models, task) if "leak" in s.free]
    leaks = pd.DataFrame([{"participant": p, "model": m, "leak": 0.1}  # leaky models only
                          for p in log.participants for m in leaky])
    print(f"leak 0.1 given for {', '.join(leaky)}; the other models keep leak 0")
    start = time.perf_counter()
    table = regressors(log, task, models, fits=leaks)
    t_reg = time.perf_counter() - start
    start = time.perf_counter()
    result = analyse_rt(log, task, models, fits=leaks, bayes=False)
    t_path = time.perf_counter() - start
    t_loop = statsmodels_loop(log, table, models)
    start = time.perf_counter()
    analyse_rt(log, task, models, bayes=False)
    t_profile = time.perf_counter() - start
    print(f"regressors alone (10 models, leaks given): {t_reg:.2f} s")
    print(f"per-participant path, leaks given (regressors + fits + blocks + ranking): {t_path:.2f} s "
          f"(target < {TARGET_S:g} s: {'pass' if t_path < TARGET_S else 'FAIL'})")
    t_fits = t_path - t_reg
    fits_text = (f"{t_fits:.2f} s, ratio {t_loop / t_fits:.1f}x" if t_fits > 0.05 * t_path
                 else "below the timing noise of the two runs")
    print(f"  statsmodels loop (OLS-HAC + RLM, {len(models) * 40} fits, regressors given): "
          f"{t_loop:.2f} s; foretell fits after the regressors: {fits_text}; statsmodels loop / "
          f"whole foretell path (regressors included): {t_loop / t_path:.1f}x")
    print(f"per-participant path with the leak profiled on the grid: {t_profile:.2f} s")
    print(f"summed-BIC winner: {result.compare['model'].iloc[0]}")

    print(f"load average before the hierarchical model: {os.getloadavg()[0]:.2f}")
    start = time.perf_counter()
    bayes = analyse_rt(log, task, ["count-1"], draws=1000, tune=1000, chains=2, seed=0,
                       progress=False)
    t_bayes = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"hierarchical model (count-1, 2 chains x 1,000 draws, 1,000 tuning): {t_bayes:.1f} s "
          f"including compilation; peak memory of the process {peak:.0f} MB (targets < "
          f"{TARGET_BAYES_S:g} s, < {TARGET_BAYES_MB:g} MB: "
          f"{'pass' if t_bayes < TARGET_BAYES_S and peak < TARGET_BAYES_MB else 'FAIL'})")
    print(bayes.diagnostics.to_string(index=False))
    for note in bayes.notes:
        if "hierarchical" in note or "ELPD" in note or "sampler said" in note:
            print(note)


def few_blocks() -> None:
    """Section 3: the comparison on four blocks per participant, without and with exact refits."""
    task = load_task("tasks/lantern-relay.toml")
    frame, _ = simulate_participants(task, 20, 4, models=["count-1"], seed=3, block_length=100)
    log = validate_log(frame, task)
    print(f"\nfew blocks: 20 participants x 4 blocks of 100 trials; load {os.getloadavg()[0]:.2f}")
    times = {}
    for refits in (0, 10):
        start = time.perf_counter()
        result = analyse_rt(log, task, ["count-0", "count-1"], draws=1000, tune=1000, chains=4,
                            seed=0, n_jobs=2, refits=refits, progress=False)
        times[refits] = time.perf_counter() - start
        diag = result.diagnostics.set_index("model")
        top = result.compare.iloc[0]
        per_model = "; ".join(f"{m} {int(r.loo_refits)} refits, largest k {r.pareto_k_max:.2f}"
                              for m, r in diag.iterrows())
        print(f"  refits <= {refits:>2}: {times[refits]:.1f} s; {per_model}; "
              f"called: {bool(result.compare['called'].all())}; first {top['model']} "
              f"(d_elpd of the second {result.compare['d_elpd'].iloc[1]:.1f} +- "
              f"{result.compare['dse'].iloc[1]:.1f})")
    print(f"  time with refits / PSIS-LOO alone: {times[10] / times[0]:.2f}x")


if __name__ == "__main__":
    main()
    few_blocks()
