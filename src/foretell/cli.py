"""The command line: parse, call the library, print, exit (0 ok, 1 bad input, 2 usage)."""

from __future__ import annotations

import argparse
import sys
from typing import Sequence

from .errors import ForetellError, InputError, UsageError

EXAMPLES = """\
examples:
  foretell demo                                   # the whole job on the embedded demo data
  foretell task tasks/lantern-relay.toml          # a task's contexts and entropy rate
  foretell check session.csv --task tasks/lantern-relay.toml
  foretell fit session.csv --task tasks/lantern-relay.toml --out results/
"""


def _parse_map(pairs: Sequence[str]) -> dict[str, str]:
    """Return {canonical: theirs} from 'canonical=theirs' strings."""
    out: dict[str, str] = {}
    for pair in pairs:
        canonical, sep, theirs = pair.partition("=")
        if not sep or not canonical.strip() or not theirs.strip():
            raise UsageError(f"--map expects canonical=theirs (e.g. response=guess), got {pair!r}")
        out[canonical.strip()] = theirs.strip()
    return out


def _jobs(text: str) -> int:
    """Return a joblib n_jobs value: a positive count, or -1 for all cores (-2 all but one, ...)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value == 0:
        raise argparse.ArgumentTypeError("0 jobs cannot run anything: give 1, 2, ... or -1 for all cores")
    return value


def _csv_list(text: str | None) -> list[str] | None:
    return None if text is None else [t.strip() for t in text.split(",") if t.strip()]


def _add_log_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("log", help="response log (CSV, TSV or Parquet), one row per trial")
    p.add_argument("--task", required=True, help="task file (TOML) describing the stimulus source")
    p.add_argument("--map", action="append", default=[], metavar="CANONICAL=THEIRS",
                   help="use the lab's own column name for a canonical column (repeatable)")
    p.add_argument("--rt-unit", choices=("s", "ms"), default="s", help="unit of the rt column")
    p.add_argument("--fix-labels", action="store_true",
                   help="strip stray spaces and match letter case of symbol labels (reported)")


def _add_fit_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--models", help="comma-separated model ids (default: the task's default set)")
    p.add_argument("--free", default="", help="extra free learner parameters: leak, alpha or leak,alpha")
    p.add_argument("--seed", type=int, default=0, help="seed of the optimiser's random starts")
    p.add_argument("--starts", type=int, default=3, help="optimiser starts per fit")
    p.add_argument("--jobs", type=_jobs, default=1, help="participants fitted in parallel (-1: all cores)")
    p.add_argument("--force", action="store_true", help="replace a non-empty output directory")


def build_parser() -> argparse.ArgumentParser:
    """Return the argument parser of the ``foretell`` command."""
    parser = argparse.ArgumentParser(
        prog="foretell", formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Analyse guess-the-next-symbol experiments: which past context explains "
                    "each participant's guesses, block by block.",
        epilog=EXAMPLES)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def command(name: str, help_: str, *examples: str) -> argparse.ArgumentParser:
        return sub.add_parser(name, help=help_, formatter_class=argparse.RawDescriptionHelpFormatter,
                              epilog="examples:\n" + "".join(f"  {e}\n" for e in examples))

    p = command("demo", "fit the embedded demo study and print the summary",
                "foretell demo", "foretell demo --out demo-results/ --jobs 2")
    p.add_argument("--out", help="also write the result tables to this directory")
    p.add_argument("--jobs", type=_jobs, default=-1,
                   help="participants fitted in parallel (default -1: all cores)")
    p.add_argument("--force", action="store_true", help="replace a non-empty output directory")

    p = command("task", "describe a task file: contexts, probabilities, entropy rate",
                "foretell task tasks/tide-gauge.toml")
    p.add_argument("task", help="task file (TOML)")

    p = command("check", "validate a response log against its task and summarise it",
                "foretell check s01.csv --task tasks/lantern-relay.toml",
                "foretell check lab.tsv --task t.toml --map response=guess --map rt=RT --rt-unit ms")
    _add_log_options(p)
    _add_screen_options(p)

    p = command("fit", "fit every learner model per participant and compare them",
                "foretell fit study.csv --task tasks/lantern-relay.toml --out results/",
                "foretell fit study.csv --task t.toml --out r/ --models count-0,count-1,mix-3 "
                "--free leak --jobs 2")
    _add_log_options(p)
    _add_screen_options(p)
    p.add_argument("--out", required=True, help="directory for the result tables (CSV)")
    _add_fit_options(p)
    return parser


def _add_screen_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rt-floor", type=float, default=None,
                   help="flag guesses faster than this many seconds for RT analyses (default 0.15)")
    p.add_argument("--rt-ceiling", type=float, default=None,
                   help="flag guesses slower than this many seconds for RT analyses (default 3)")
    p.add_argument("--rt-mad", type=float, default=None, metavar="K",
                   help="also flag log-RTs more than K median absolute deviations from the "
                        "participant's median")


def _load(args: argparse.Namespace):
    from .logs import RTScreen, load_log
    from .tasks import load_task

    task = load_task(args.task)
    defaults = RTScreen()
    screen = RTScreen(
        floor=defaults.floor if getattr(args, "rt_floor", None) is None else args.rt_floor,
        ceiling=defaults.ceiling if getattr(args, "rt_ceiling", None) is None else args.rt_ceiling,
        mad_k=getattr(args, "rt_mad", None))
    log = load_log(args.log, task, columns=_parse_map(args.map), rt_unit=args.rt_unit,
                   fix_labels=args.fix_labels, screen=screen)
    return task, log


def _cmd_task(args: argparse.Namespace) -> int:
    from .tasks import load_task

    print(load_task(args.task).describe())
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    from .logs import log_summary

    _, log = _load(args)
    print(log_summary(log).to_string(index=False, na_rep=""))
    print(str(log.screen))
    for warning in log.warnings:
        print(f"warning: {warning}", file=sys.stderr)
    return 0


def _run_fit(task, log, args: argparse.Namespace, out: str | None):
    """Return the analysis of ``log`` after printing its summary (and writing it to ``out``)."""
    from .analysis import fit
    from .outputs import check_output_dir, write_tables

    if out:
        check_output_dir(out, force=args.force)
    result = fit(log, task, models=_csv_list(getattr(args, "models", None)),
                 free=tuple(_csv_list(getattr(args, "free", "")) or ()),
                 seed=getattr(args, "seed", 0), n_starts=getattr(args, "starts", 3),
                 n_jobs=args.jobs, progress=sys.stderr.isatty())
    if out:
        path = write_tables(out, result.tables(), texts={"summary.txt": result.summary},
                            force=args.force)
        print(f"tables written to {path}/", file=sys.stderr)
    print(result.summary)
    return result


def _cmd_fit(args: argparse.Namespace) -> int:
    task, log = _load(args)
    _run_fit(task, log, args, args.out)
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo import demo_log, demo_task, demo_truth, recovery_text

    task = demo_task()
    print(f"demo study: task {task.name!r} ({', '.join(task.symbols)}); simulated participants, "
          "fitted with the default model set", file=sys.stderr)
    result = _run_fit(task, demo_log(), args, args.out)
    print()
    print(recovery_text(result.winners, demo_truth()))
    return 0


COMMANDS = {"demo": _cmd_demo, "task": _cmd_task, "check": _cmd_check, "fit": _cmd_fit}


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``foretell`` command; return its exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return COMMANDS[args.command](args)
    except InputError as err:
        for problem in err.problems:
            print(f"error: {problem}", file=sys.stderr)
        return 1
    except UsageError as err:
        print(f"foretell {args.command}: {err}", file=sys.stderr)
        return 2
    except ForetellError as err:
        print(f"error: {err}", file=sys.stderr)
        return 1
    except OSError as err:  # a file the checks above could not foresee (disk full, permissions)
        print(f"error: {err.filename or ''}: {err.strerror or err}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
