"""A whole study from Python: load a log, fit, compare, reaction times, groups, figures.

    python examples/whole_study.py [--out study-figures] [--bayes]

Uses the embedded demo log (an invented lantern-relay experiment) written to a
CSV first, as a lab's own log would be; every step is a library call, and the
figures are saved as PNG files for a paper. Without --bayes the hierarchical
models are skipped (summed BIC and permutation tests only), so it runs in
about a minute.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import foretell
from foretell.demo import demo_log
from foretell.plots import figure_png
from foretell.plots.report import winners_heatmap


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="study-figures", help="folder for the PNG figures")
    parser.add_argument("--bayes", action="store_true", help="also sample the hierarchical models")
    parser.add_argument("--jobs", type=int, default=2)
    args = parser.parse_args()

    with tempfile.TemporaryDirectory() as folder:  # a lab's log on disk
        path = Path(folder) / "relay_study.csv"
        demo_log().to_csv(path, index=False)
        task = foretell.load_task("lantern-relay")
        log = foretell.load_log(path, task)

    for warning in log.warnings:
        print("warning:", warning)
    result = foretell.fit(log, task, seed=0, n_jobs=args.jobs)
    print(result.summary, end="\n\n")

    rt = foretell.analyze_rt(log, task, fit=result, models=["count-0", "count-1", "count-2", "mix-4"],
                             bayes=args.bayes, draws=500, chains=2)
    print(rt.compare[["model", "rank", "criterion", "bic_sum", "elpd", "called"]].to_string(index=False))
    print(*rt.notes, sep="\n", end="\n\n")

    groups = foretell.compare_groups(log, task, fit=result, bayes=args.bayes, draws=500, chains=2)
    effects = groups.group_effects.query("metric == 'optimal_rate'")
    print(effects[["contrast", "block", "observed_diff", "perm_p_holm"]].to_string(index=False))
    print(*groups.notes, sep="\n", end="\n\n")

    out = Path(args.out)
    out.mkdir(exist_ok=True)
    figures = {"winners": winners_heatmap(result.winners), **groups.figures()}
    for name, fig in figures.items():
        (out / f"{name}.png").write_bytes(figure_png(fig))
    print(f"{len(figures)} figures written to {out}/")


if __name__ == "__main__":
    main()
