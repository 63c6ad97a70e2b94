"""Benchmark of the hierarchical group model of the groups step (run by hand).

40 simulated participants (two groups of 20: count-0 and count-2 learners) x
10 blocks of 100 trials of the lantern-relay task; the binomial model of
optimal_rate with categorical blocks, participant random intercepts and
block slopes, 4 chains x 1,000 draws after 1,000 tuning steps, timed from
building the model to the diagnostics (compilation included, in a fresh
process). The plain reference is the same model written in the textbook
coordinates (cell means plus participant deviations, u_i ~ Normal(0, sd),
centred), sampled with the same settings; the ratio compared is bulk ESS
per second of the worst parameter. Targets: foretell's fit under 60 s on a
2-core machine, passing the diagnostics gate.

``--null-datasets N`` adds a study of N null datasets (two groups of the
same learners with the same parameter ranges, 12 + 12 participants x 6
blocks of 80 trials; the hierarchical model of optimal_rate at ``--draws``
per chain): how many datasets have some per-block HDI excluding 0
(unadjusted), a joint summary interval excluding 0, or a Holm-corrected
permutation p below 0.05.

    PYTHONPATH=src python benchmarks/groups.py [--jobs 2] [--skip-reference] [--null-datasets 12 [--draws 1000]]
"""

from __future__ import annotations

import argparse
import time

from foretell.curves import learning_curves
from foretell.hierarchical.gate import diagnose
from foretell.hierarchical.group_model import fit_group_model, model_data
from foretell.hierarchical.sampling import sample
from foretell.logs import validate_log
from foretell.simulate import simulate_participants
from foretell.steps.contrasts import permutation_effects
from foretell.steps.groups import compare_groups
from foretell.tasks import load_task

N_PARTICIPANTS, N_BLOCKS, BLOCK = 40, 10, 100
TARGET_SECONDS = 60.0
NULL_PARTICIPANTS, NULL_BLOCKS, NULL_BLOCK = 24, 6, 80


def plain_model(data):
    """Return the reference: eta = cell[g, b] + u_i + v_i t_b with u, v centred deviations."""
    import pymc as pm

    obs_group = data.group[data.participant]
    t = data.position[data.block]
    with pm.Model() as model:
        cell = pm.Normal("cell", 0.0, 1.5, shape=(len(data.groups), len(data.units)))
        sd_u, sd_v = pm.HalfNormal("sd_intercept", 1.0), pm.HalfNormal("sd_block_slope", 1.0)
        u = pm.Normal("u", 0.0, sd_u, shape=len(data.participants))
        v = pm.Normal("v", 0.0, sd_v, shape=len(data.participants))
        eta = cell[obs_group, data.block] + u[data.participant] + v[data.participant] * t
        pm.Binomial("y", n=data.n, logit_p=eta, observed=data.y)
    return model


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=2, help="chains in parallel (n_jobs)")
    parser.add_argument("--skip-reference", action="store_true")
    parser.add_argument("--null-datasets", type=int, default=0, help="null-groups datasets to study (0: none)")
    parser.add_argument("--draws", type=int, default=1000, help="draws per chain of the null-groups study")
    args = parser.parse_args()
    if args.null_datasets:
        null_study(args.null_datasets, args.draws, args.jobs)
        return
    task = load_task("tasks/lantern-relay.toml")
    raw, _ = simulate_participants(task, N_PARTICIPANTS, N_BLOCKS, groups={"A": ["count-0"], "B": ["count-2"]},
                                   seed=0, block_length=BLOCK)
    log = validate_log(raw, task)
    t0 = time.perf_counter()
    curves = learning_curves(log, task, ["accuracy", "optimal_rate", "median_rt", "depth"])
    t_curves = time.perf_counter() - t0
    t0 = time.perf_counter()
    permutation_effects(curves, [("B", "A")], seed=0)
    t_perm = time.perf_counter() - t0
    data = model_data(curves, "optimal_rate", ["A", "B"], kind="binomial")
    t0 = time.perf_counter()
    fit = fit_group_model(data, [("B", "A")], seed=1, cores=args.jobs)
    t_fit = time.perf_counter() - t0
    d = fit.diagnostics
    print(f"curves (accuracy, optimal_rate, median_rt, depth): {t_curves:.1f} s; "
          f"permutation tests ({len(curves['block'].unique())} blocks x 4 metrics): {t_perm:.1f} s")
    print(f"foretell group model: {t_fit:.1f} s ({fit.parameterisation}: {fit.parameterisation_reason}); "
          f"R-hat {d.rhat_max:.3f}, bulk ESS {d.ess_bulk_min:.0f}, divergences {d.divergences}, "
          f"gate {'passed' if d.ok else 'failed: ' + '; '.join(d.reasons)}")
    print(f"target: under {TARGET_SECONDS:.0f} s and passing the gate: "
          f"{'PASS' if t_fit < TARGET_SECONDS and d.ok else 'FAIL'}")
    if not args.skip_reference:
        t0 = time.perf_counter()
        idata, sampler, _ = sample(plain_model(data), draws=1000, tune=1000, chains=4, seed=1, cores=args.jobs)
        ref = diagnose(idata, sampler)
        t_ref = time.perf_counter() - t0
        ratio = (d.ess_bulk_min / t_fit) / (ref.ess_bulk_min / t_ref)
        print(f"plain coordinates: {t_ref:.1f} s, R-hat {ref.rhat_max:.3f}, bulk ESS {ref.ess_bulk_min:.0f}; "
              f"worst-parameter ESS per second, foretell / plain: {ratio:.1f}x")
    t0 = time.perf_counter()
    compare_groups(log, task, models=["count-0", "count-2"], metrics=["optimal_rate"], seed=2, n_jobs=args.jobs)
    print(f"compare_groups (optimal_rate only; count-0 and count-2 fitted first): {time.perf_counter() - t0:.1f} s")


def null_study(n_datasets: int, draws: int, jobs: int) -> None:
    """Print, over null datasets, how often the per-block HDIs, the joint summary and Holm's tests see a difference."""
    task = load_task("tasks/lantern-relay.toml")
    same = ["count-1", "count-2"]
    counts = {"per-block HDI (unadjusted)": 0, "joint summary interval": 0, "Holm-corrected permutation p": 0}
    not_called = 0
    start = time.perf_counter()
    for k in range(n_datasets):
        raw, _ = simulate_participants(task, NULL_PARTICIPANTS, NULL_BLOCKS, groups={"A": same, "B": same},
                                       seed=100 + k, block_length=NULL_BLOCK)
        res = compare_groups(validate_log(raw, task), task, models=["count-1"], metrics=["optimal_rate"], seed=k,
                             n_jobs=jobs, draws=draws, tune=draws, progress=False)
        effects, joint = res.group_effects, res.group_joint
        called = bool(effects["called"].fillna(False).all())
        not_called += not called
        outside = (effects["hdi95_low"] > 0) | (effects["hdi95_high"] < 0)
        counts["per-block HDI (unadjusted)"] += bool(called and outside.any())
        counts["joint summary interval"] += bool(((joint["low"] > 0) | (joint["high"] < 0)).any())
        counts["Holm-corrected permutation p"] += bool((effects["perm_p_holm"] < 0.05).any())
    print(f"null groups: {n_datasets} datasets of {NULL_PARTICIPANTS // 2} + {NULL_PARTICIPANTS // 2} participants x "
          f"{NULL_BLOCKS} blocks of {NULL_BLOCK} trials (optimal_rate; {draws} draws per chain): "
          f"{time.perf_counter() - start:.0f} s; {not_called} models not called")
    for what, n in counts.items():
        print(f"  datasets where the {what} sees a difference: {n} of {n_datasets}")


if __name__ == "__main__":
    main()
