"""Benchmark of the RT analyses: speed of the per-participant path and the hierarchical models, and null calibration.

40 simulated participants x 1,000 trials (5 blocks of 200) of the lantern-relay
task, RTs from the simulator's law (driven by a depth-1 learner's entropy).

1. The per-participant path (regressors, AR(1) GLS with HAC at Andrews' lag and
   Huber for every participant x model and the baseline, per-block fits,
   random-effects selection) for the 10 default models, against a
   straightforward loop of statsmodels fits (OLS with HAC and RLM with HuberT
   per participant x model) on the same regressors. Target: < 6 s for the
   foretell path with the leak held (3 s before the baseline model, the AR(1)
   GLS and the random-effects selections joined the path).
2. One hierarchical model (count-1) and the baseline, 2 chains x 1,000 draws
   after 1,000 tuning: wall time including compilation, peak memory,
   diagnostics. Target: < 240 s, < 4 GB, the default Gate passed.
3. Few blocks: 20 participants x 4 blocks of 100 trials, count-0 against
   count-1 and the baseline, 4 chains x 1,000 draws: PSIS-LOO alone and with
   exact refits of the units whose Pareto k is above 0.7.
4. Null calibration: 16 participants x 600 trials (5 blocks of 120), guesses
   from count-1, count-2 and mix-4 learners, RTs that follow no learner
   (a power-law practice curve, AR(1) drift with phi 0.9 or 0.5, white noise);
   per learner, the share of participants whose 95% slope interval excludes 0
   (nominal 5%), and how many datasets call a learner. Then RTs that do follow
   a learner (RTLaw, 0.25 log units per bit): how often the generator is called.
5. A reaction design, the leak chosen on held-out blocks: white-noise RTs and RTs driven by a leak-free
   depth-1 learner's surprise over a practice curve; the chosen leak, the interval level and power, the call.

Run once, by hand, on a quiet machine: PYTHONPATH=src python benchmarks/rt.py [--sections calibration]
"""

from __future__ import annotations

import math
import os
import resource
import time
import warnings

import numpy as np
import pandas as pd
import statsmodels.api as sm

from foretell.logs import validate_log
from foretell.models import default_models
from foretell.regressors import regressors
from foretell.simulate import ParticipantSpec, RTLaw, simulate_participants
from foretell.stats.regression import newey_west_lags
from foretell.steps.measures import analyze_rt
from foretell.tasks import Task, load_task

TARGET_S = 6.0
TARGET_BAYES_S = 240.0
TARGET_BAYES_MB = 4096.0
NULL_DATASETS = 5
TRUE_DATASETS = 4


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
          f"{len(log.frame) // log.frame['participant'].nunique()} trials; models: {len(models)} and the baseline")

    print("leak held at 0.1 in every model that has one (fixed=)")
    start = time.perf_counter()
    table = regressors(log, task, models, fixed={"leak": 0.1})
    t_reg = time.perf_counter() - start
    start = time.perf_counter()
    result = analyze_rt(log, task, models=models, fixed={"leak": 0.1}, bayes=False)
    t_path = time.perf_counter() - start
    t_loop = statsmodels_loop(log, table, models)
    start = time.perf_counter()
    analyze_rt(log, task, models=models, bayes=False)
    t_guess = time.perf_counter() - start
    print(f"regressors alone (10 models, leak held): {t_reg:.2f} s")
    print(f"per-participant path, leak held (regressors + fits + blocks + random-effects selection): {t_path:.2f} s "
          f"(target < {TARGET_S:g} s: {'pass' if t_path < TARGET_S else 'FAIL'})")
    print(f"  statsmodels loop (plain OLS-HAC + RLM, {len(models) * 40} fits, regressors given): {t_loop:.2f} s; "
          f"statsmodels loop / whole foretell path (regressors, baseline, GLS, selection included): "
          f"{t_loop / t_path:.1f}x")
    print(f"per-participant path with the leaks fitted to the guesses: {t_guess:.2f} s")
    print(f"random-effects call: {result.verdict()}")

    print(f"load average before the hierarchical models: {os.getloadavg()[0]:.2f}")
    start = time.perf_counter()
    bayes = analyze_rt(log, task, models=["count-1"], draws=1000, tune=1000, chains=2, seed=0, progress=False)
    t_bayes = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"hierarchical models (count-1 and the baseline, 2 chains x 1,000 draws, 1,000 tuning): {t_bayes:.1f} s "
          f"including compilation; peak memory of the process {peak:.0f} MB (targets < "
          f"{TARGET_BAYES_S:g} s, < {TARGET_BAYES_MB:g} MB: "
          f"{'pass' if t_bayes < TARGET_BAYES_S and peak < TARGET_BAYES_MB else 'FAIL'})")
    print(bayes.diagnostics.drop(columns=["form_reason"]).to_string(index=False))
    print(bayes.population.to_string(index=False))
    for note in bayes.notes:
        if "ELPD" in note or "sampler said" in note:
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
        result = analyze_rt(log, task, models=["count-0", "count-1"], draws=1000, tune=1000, chains=4,
                            seed=0, n_jobs=2, refits=refits, loo=True, progress=False)
        times[refits] = time.perf_counter() - start
        diag = result.diagnostics.set_index("model")
        top = result.compare.iloc[0]
        per_model = "; ".join(f"{m} {int(r.loo_refits)} refits, largest k {r.pareto_k_max:.2f}"
                              for m, r in diag.iterrows())
        called = top["model"] if top["called"] else "nothing"
        print(f"  refits <= {refits:>2}: {times[refits]:.1f} s; {per_model}; called: {called} (first "
              f"{top['model']}; elpd_diff of the second {result.compare['elpd_diff'].iloc[1]:.1f} +- "
              f"{result.compare['elpd_diff_se'].iloc[1]:.1f})")
    print(f"  time with refits / PSIS-LOO alone: {times[10] / times[0]:.2f}x")


def null_log_rt(kind: str, n: int, rng: np.random.Generator) -> np.ndarray:
    """Return log RTs that follow no learner: power-law practice, AR(1) drift ("ar0.9", "ar0.5"), or white noise."""
    if kind == "practice":  # RT = A + B t^-c (Newell & Rosenbloom, 1981), log-normal noise
        t = np.arange(1, n + 1)
        a, b, c = 0.45 * math.exp(rng.normal(0, 0.1)), 0.6 * math.exp(rng.normal(0, 0.2)), 0.35 + 0.1 * rng.random()
        return np.log(a + b * t ** -c) + 0.25 * rng.normal(size=n)
    if kind.startswith("ar"):
        phi = float(kind[2:])
        e = np.empty(n)
        e[0] = rng.normal(0, 0.25)
        for i in range(1, n):
            e[i] = phi * e[i - 1] + rng.normal(0, 0.25 * math.sqrt(1 - phi * phi))
        return math.log(0.6) + e
    return math.log(0.6) + 0.25 * rng.normal(size=n)


def calibration() -> None:
    """Section 4: interval level and calls on RTs that follow no learner, and calls on RTs that follow one."""
    task = load_task("tasks/lantern-relay.toml")
    print(f"\nnull calibration: {NULL_DATASETS} datasets x 16 participants x 600 trials per structure, default "
          f"models; share of participants whose 95% slope interval excludes 0 (nominal 0.05); load "
          f"{os.getloadavg()[0]:.2f}")
    for kind in ("practice", "ar0.9", "ar0.5", "white"):
        start = time.perf_counter()
        excluded, calls = [], []
        for seed in range(NULL_DATASETS):
            frame, _ = simulate_participants(task, 16, 5, models=["count-1", "count-2", "mix-4"], seed=seed,
                                             block_length=120)
            rng = np.random.default_rng(seed + 1000)
            frame["rt"] = np.concatenate([np.exp(null_log_rt(kind, len(rows), rng))
                                          for _, rows in frame.groupby("participant", sort=False)])
            result = analyze_rt(validate_log(frame, task), task, bayes=False, seed=seed)
            fits = result.fits[result.fits["slope_low"].notna()]
            excluded.append(fits.assign(out=(fits["slope_low"] > 0) | (fits["slope_high"] < 0)))
            calls.append(result.verdict())
        rates = pd.concat(excluded).groupby("model", sort=False)["out"].mean()
        print(f"  {kind:>8}: " + ", ".join(f"{m} {r:.3f}" for m, r in rates.items())
              + f"; worst {rates.max():.3f}; learner called in {sum(c is not None for c in calls)} of "
              f"{len(calls)} ({', '.join(str(c) for c in calls)}); {time.perf_counter() - start:.0f} s")
    print(f"true effects: {TRUE_DATASETS} datasets x 16 participants x 600 trials per generator, models count-0, "
          "count-1, count-2, mix-4")
    for generator in ("count-1", "count-2", "mix-4"):
        calls = []
        for seed in range(TRUE_DATASETS):
            spec = ParticipantSpec(generator, rt=RTLaw(per_bit=0.25))
            frame, _ = simulate_participants(task, 16, 5, models=[spec], seed=seed, block_length=120)
            result = analyze_rt(validate_log(frame, task), task, models=["count-0", "count-1", "count-2", "mix-4"],
                                bayes=False, seed=seed)
            calls.append(result.verdict())
        print(f"  {generator}: called in {sum(c == generator for c in calls)} of {len(calls)} "
              f"({', '.join(map(str, calls))})")


def reaction_calibration() -> None:
    """Section 5: a reaction design whose leak is chosen on held-out blocks: white-noise RTs, and RTs driven by
    a leak-free depth-1 learner's surprise on top of practice; the leak chosen, the interval, the call."""
    task = Task.from_dict({"name": "chain", "symbols": ["a", "b", "c"], "response": "reaction",
                           "contexts": [{"past": [s], "next": {t: (0.8 if t == s else 0.1) for t in "abc"}}
                                        for s in "abc"]})
    print(f"\nreaction design (leak chosen on held-out blocks): {NULL_DATASETS} datasets x 12 participants x 400 "
          f"trials per kind, models count-0, count-1, count-1-leak; load {os.getloadavg()[0]:.2f}")
    for kind in ("white", "count-1"):
        start, rows, calls = time.perf_counter(), [], []
        for seed in range(NULL_DATASETS):
            rng = np.random.default_rng(seed + 2000)
            parts = []
            for i in range(12):
                x = task.sample(400, seed=rng)
                response = np.where(rng.random(400) < 0.04, (x + 1) % 3, x)
                parts.append(pd.DataFrame({"participant": f"s{i + 1:02d}", "block": np.arange(400) // 100 + 1,
                                           "trial": np.arange(1, 401), "stimulus": np.array(task.symbols)[x],
                                           "response": np.array(task.symbols)[response], "rt": 0.4}))
            frame = pd.concat(parts, ignore_index=True)
            drive = 0.0
            if kind == "count-1":
                drive = 0.08 * np.nan_to_num(regressors(validate_log(frame, task), task, ["count-1"])["surprise"])
            frame["rt"] = np.exp(math.log(0.5) + drive - 0.1 * np.log(frame["trial"]) + 0.2 * rng.normal(size=len(frame)))
            result = analyze_rt(validate_log(frame, task), task, models=["count-0", "count-1", "count-1-leak"],
                                bayes=False, seed=seed)
            rows.append(result.fits[result.fits["model"] != "none"])
            calls.append(result.verdict())
        fits = pd.concat(rows)
        out = ((fits["slope_low"] > 0) | (fits["slope_high"] < 0)).groupby(fits["model"], sort=False).mean()
        leak = fits.loc[fits["model"] == "count-1-leak", "leak"]
        print(f"  {kind:>8} RTs: interval excludes 0: " + ", ".join(f"{m} {r:.3f}" for m, r in out.items())
              + f"; count-1-leak's chosen leak median {leak.median():.2f} (share >= 0.5: {(leak >= 0.5).mean():.2f}); "
              f"called: {', '.join(map(str, calls))}; {time.perf_counter() - start:.0f} s")


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(description="Speed and null calibration of the RT analyses.")
    parser.add_argument("--sections", default="speed,blocks,calibration,reaction",
                        help="comma-separated sections to run: speed (1-2), blocks (3), calibration (4), reaction (5)")
    chosen = set(parser.parse_args().sections.split(","))
    for name, section in (("speed", main), ("blocks", few_blocks), ("calibration", calibration),
                          ("reaction", reaction_calibration)):
        if name in chosen:
            section()
