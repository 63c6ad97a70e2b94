"""Analyse the embedded demo study from Python: the same job as `foretell demo`, step by step.

    python examples/analyse_demo.py [--jobs 2]

The demo is an invented lantern-relay experiment (simulated participants in
two groups); see foretell/demo.py.
"""

from __future__ import annotations

import argparse

import foretell
from foretell.demo import demo_log, demo_task, demo_truth, recovery_text
from foretell.learners import TreeMixture
from foretell.logs import log_summary, validate_log


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=2)
    args = parser.parse_args()

    task = demo_task()
    print(task.describe(), end="\n\n")

    log = validate_log(demo_log(), task, source="demo_log.csv")
    print(log_summary(log).tail(3).to_string(index=False), end="\n\n")

    # how deep the ideal learner looks as it learns the first participant's sequence
    first = log.frame[log.frame["participant"] == log.participants[0]]
    depth = TreeMixture(max_depth=4).mean_depth(first["stimulus_idx"].to_numpy(), task.n_symbols)
    per_block = first.assign(depth=depth).groupby("block")["depth"].mean()
    print("ideal learner's mean context depth per block:",
          ", ".join(f"{b}: {d:.2f}" for b, d in per_block.items()), end="\n\n")

    result = foretell.fit(log, task, seed=0, n_jobs=args.jobs)
    print(result.summary, end="\n\n")
    print(recovery_text(result.winners, demo_truth()), end="\n\n")

    rested = result.context_agreement.query("group == 'rested' and block == 'all'")
    print("how the rested group's response trees treat the source contexts:")
    print(rested.groupby("source_context")["status"].value_counts().unstack(fill_value=0))


if __name__ == "__main__":
    main()
