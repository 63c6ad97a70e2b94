"""Regenerate foretell's embedded demo study to CSV files.

    python examples/make_demo_data.py OUT_DIR [--seed S] [--force]

writes OUT_DIR/demo_log.csv and OUT_DIR/demo_truth.csv. With the default seed
the files equal the ones shipped in src/foretell/data/. Existing files are
refused unless --force.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from foretell.demo import DEMO_SEED, make_demo_data


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Regenerate the demo study's log and truth table.")
    parser.add_argument("out_dir", type=Path, help="folder for demo_log.csv and demo_truth.csv")
    parser.add_argument("--seed", type=int, default=DEMO_SEED, help=f"default {DEMO_SEED}")
    parser.add_argument("--force", action="store_true", help="overwrite existing files")
    args = parser.parse_args(argv)
    targets = {name: args.out_dir / f"{name}.csv" for name in ("demo_log", "demo_truth")}
    existing = [str(p) for p in targets.values() if p.exists()]
    if existing and not args.force:
        print(f"error: {', '.join(existing)} exist; pass --force to overwrite", file=sys.stderr)
        return 2
    log, truth = make_demo_data(seed=args.seed)
    args.out_dir.mkdir(parents=True, exist_ok=True)
    log.to_csv(targets["demo_log"], index=False)
    truth.to_csv(targets["demo_truth"], index=False)
    print(f"wrote {targets['demo_log']} ({len(log)} trials, {log.participant.nunique()} "
          f"participants) and {targets['demo_truth']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
