"""The command line: parse, call the library, print, exit (0 ok, 1 bad input, 2 usage, 130/143 interrupted)."""

from __future__ import annotations

import argparse
import signal
import sys
import time
from dataclasses import replace
from pathlib import Path
from typing import Callable, Sequence

from .. import __version__
from ..errors import ForetellError, InputError, UsageError, printable

EXAMPLES = """\
examples:
  foretell demo                                   # the whole job on the embedded demo data
  foretell task lantern-relay                     # a shipped task: contexts and entropy rate
  foretell check session.csv --task lantern-relay
  foretell fit session.csv --task lantern-relay --out results/
"""
TRIALS_CHOICES = ("best", "all", "none")
DEMO_OUT = "foretell-demo"


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


def _count(low: int) -> Callable[[str], int]:
    """Return an argparse type accepting whole numbers >= ``low``."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if value < low:
            raise argparse.ArgumentTypeError(f"expected a whole number >= {low}, got {value}")
        return value
    return parse


def _csv_list(text: str | None) -> list[str] | None:
    return None if text is None else [t.strip() for t in text.split(",") if t.strip()]


def _add_log_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("log", help="response log (CSV, TSV or Parquet), one row per trial")
    p.add_argument("--task", required=True,
                   help="task file (TOML) describing the stimulus source, or the name of a "
                        "task shipped with foretell (e.g. lantern-relay)")
    p.add_argument("--map", action="append", default=[], metavar="CANONICAL=THEIRS",
                   help="use the lab's own column name for a canonical column (repeatable)")
    p.add_argument("--rt-unit", choices=("s", "ms"), default="s", help="unit of the rt column")
    p.add_argument("--fix-labels", action="store_true",
                   help="strip stray spaces and match letter case of symbol labels (reported)")


def _add_screen_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rt-floor", type=float, default=None,
                   help="flag responses faster than this many seconds (default 0.15)")
    p.add_argument("--rt-ceiling", type=float, default=None,
                   help="flag responses slower than this many seconds (default 3)")
    p.add_argument("--rt-mad", type=float, default=None, metavar="K",
                   help="also flag log-RTs more than K median absolute deviations from the "
                        "participant's median")


def _add_fit_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--models", help="comma-separated model ids (default: the task's default set; "
                                    "see the list below)")
    p.add_argument("--free", default="", help="extra free learner parameters: leak, alpha or leak,alpha")
    p.add_argument("--seed", type=_count(0), default=0, help="seed of the optimiser's random starts (>= 0)")
    p.add_argument("--starts", type=_count(1), default=3, help="optimiser starts per fit")
    p.add_argument("--jobs", type=_jobs, default=1, help="participants fitted in parallel (-1: all cores)")
    p.add_argument("--trials", choices=TRIALS_CHOICES, default="best",
                   help="rows of trials.csv: each participant's winning model (best, the default), "
                        "every model (all: large), or no trials.csv (none)")
    _add_force(p)


def _add_force(p: argparse.ArgumentParser) -> None:
    p.add_argument("--force", action="store_true",
                   help="replace an output folder that foretell wrote before")


def _add_sampling_options(p: argparse.ArgumentParser, *, min_chains: int, seed_help: str,
                          jobs_help: str) -> None:
    """Add --bayes/--no-bayes, --draws, --chains, --seed and --jobs (the Bayesian steps' options)."""
    p.add_argument("--bayes", action=argparse.BooleanOptionalAction, default=True,
                   help="fit the hierarchical Bayesian models (default: yes)")
    p.add_argument("--draws", type=_count(10), default=1000, help="posterior draws per chain")
    p.add_argument("--chains", type=_count(min_chains), default=4, help="Markov chains per model")
    p.add_argument("--seed", type=_count(0), default=0, help=seed_help)
    p.add_argument("--jobs", type=_jobs, default=1, help=jobs_help)


def _add_refits(p: argparse.ArgumentParser) -> None:
    p.add_argument("--refits", type=_count(0),
                   help="most exact leave-one-out refits per RT model, for the participant x block "
                        "units whose PSIS Pareto k is above 0.7 (default 10; each is one more "
                        "MCMC run)")


def _add_backend_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--backend", choices=("local", "dask"), default="local",
                   help="where the per-participant jobs run: this machine (local, the default) or "
                        "a running Dask cluster (dask: all of its workers, whatever --jobs says; "
                        "needs pip install 'foretell[dask]'); the tables are the same")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="the Dask scheduler's address with --backend dask, e.g. tcp://10.0.0.5:8786")


def _models_help() -> str:
    from ..params import describe_params

    return ("model ids:\n"
            "  count-K        Dirichlet counts of what followed the last K symbols (K = 0, 1, ...)\n"
            "  count-K-leak   the same, forgetting a fitted share of every count after each trial\n"
            "  count-task     counts on the task's own contexts (needs the task's source)\n"
            "  mix-D          exact Bayesian mixture over all context trees of depth <= D\n"
            "  source         the task's true probabilities (needs the task's source)\n"
            "default set: count-0 ... count-K with K = max(task depth + 1, 3), count-0-leak,\n"
            "  count-1-leak, count-task, mix-K, source\n"
            "parameters:\n" + describe_params() + "\n")


def build_parser() -> argparse.ArgumentParser:
    """Return the argument parser of the ``foretell`` command."""
    parser = argparse.ArgumentParser(
        prog="foretell", formatter_class=argparse.RawDescriptionHelpFormatter,
        description="Analyse guess-the-next-symbol experiments: which past context explains "
                    "each participant's guesses, block by block.",
        epilog=EXAMPLES)
    parser.add_argument("--version", action="version", version=f"foretell {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def command(name: str, help_: str, *examples: str, more: str = "") -> argparse.ArgumentParser:
        return sub.add_parser(name, help=help_, formatter_class=argparse.RawDescriptionHelpFormatter,
                              epilog=more + "examples:\n" + "".join(f"  {e}\n" for e in examples))

    p = command("demo", "run the whole analysis on the embedded demo study and write its report",
                "foretell demo", "foretell demo --out demo-results/ --jobs 2",
                "foretell demo --skip rt,groups       # the fits and comparisons only")
    p.add_argument("--out", default=DEMO_OUT, help=f"folder for the results (default ./{DEMO_OUT})")
    p.add_argument("--jobs", type=_jobs, default=-1,
                   help="participants fitted in parallel (default -1: all cores)")
    p.add_argument("--skip", default="", help="comma-separated steps to leave out: fit, rt, groups, "
                                              "events, report")
    p.add_argument("--trials", choices=TRIALS_CHOICES, default="best",
                   help="rows of fit/trials.csv (see foretell fit --help)")
    _add_force(p)

    p = command("analyze", "the whole job: validate, fit and compare, reaction times, groups, "
                           "EEG events and the report",
                "foretell analyze study.csv --task lantern-relay --out study-results/",
                "foretell analyze study.csv --task lantern-relay --out r/ --recovery design/ --jobs 2",
                "foretell analyze study.csv --task lantern-relay --out r/ --skip rt,events",
                more="Writes one subfolder per step (validation, fit, rt, groups, events, recovery)\n"
                     "and report.html with its figures.\n")
    _add_log_options(p)
    _add_screen_options(p)
    p.add_argument("--out", required=True, help="folder for every result and the report")
    p.add_argument("--models", help="comma-separated model ids for the fits (default: the task's set)")
    p.add_argument("--rt-models", help="comma-separated model ids for the RT models (default: --models)")
    p.add_argument("--free", default="", help="extra free learner parameters: leak, alpha or leak,alpha")
    p.add_argument("--skip", default="", help="comma-separated steps to leave out: fit, rt, groups, "
                                              "events, report")
    p.add_argument("--recovery", metavar="DIR", help="a foretell recover output to show in the report")
    _add_sampling_options(p, min_chains=2, seed_help="seed of every random step (>= 0)",
                          jobs_help="work in parallel (-1: all cores)")
    p.add_argument("--trials", choices=TRIALS_CHOICES, default="best",
                   help="rows of fit/trials.csv (see foretell fit --help)")
    _add_refits(p)
    _add_backend_options(p)
    _add_force(p)

    p = command("task", "describe a task file: contexts, probabilities, entropy rate",
                "foretell task lantern-relay", "foretell task my-study/task.toml",
                more="A task is a TOML file, or the name of a task shipped with foretell.\n")
    p.add_argument("task", help="task file (TOML), or the name of a shipped task "
                                "(lantern-relay, tide-gauge, compass-fair, ...)")

    p = command("check", "validate a response log against its task and summarise it",
                "foretell check s01.csv --task lantern-relay",
                "foretell check lab.tsv --task t.toml --map response=guess --map rt=RT --rt-unit ms")
    _add_log_options(p)
    _add_screen_options(p)

    p = command("fit", "fit every learner model per participant and compare them",
                "foretell fit study.csv --task lantern-relay --out results/",
                "foretell fit study.csv --task t.toml --out r/ --models count-0,count-1,mix-3 "
                "--free leak --jobs 2", more=_models_help())
    _add_log_options(p)
    p.add_argument("--out", required=True, help="folder for the result tables (CSV)")
    _add_fit_options(p)
    _add_backend_options(p)

    p = command("rt", "which past context explains reaction times (or another per-trial measure)",
                "foretell rt study.csv --task lantern-relay --out rt/",
                "foretell rt study.csv --task lantern-relay --out rt/ --fits results/ --no-bayes",
                "foretell rt eeg.csv --task lantern-relay --out p3/ --measure p3_amp --locked reveal",
                more="Per participant and learner model: log RT on the prediction's entropy (guess\n"
                     "designs) or the stimulus's surprise (reaction designs) plus a block trend, with\n"
                     "Newey-West errors; then one hierarchical Bayesian model per learner model,\n"
                     "compared by PSIS-LOO only when every model passes the diagnostics gate.\n")
    _add_log_options(p)
    _add_screen_options(p)
    p.add_argument("--out", required=True, help="folder for the tables and posteriors")
    p.add_argument("--models", help="comma-separated model ids (default: the task's default set)")
    p.add_argument("--fits", metavar="DIR",
                   help="a foretell fit output whose fitted learner parameters (e.g. leak) are reused")
    p.add_argument("--measure", default="rt",
                   help="the log column to explain (default rt; any numeric per-trial column)")
    p.add_argument("--locked", choices=("guess", "reveal"),
                   help="guess-locked measures use the prediction's entropy, reveal-locked ones the "
                        "stimulus's surprise (default: guess in guess designs, reveal in reaction ones)")
    p.add_argument("--log", action="store_true", dest="log_transform",
                   help="model the log of a measure other than rt (rt is always modelled on the log scale)")
    _add_sampling_options(p, min_chains=1, seed_help="seed of the samplers (>= 0)",
                          jobs_help="participants computed and chains sampled in parallel")
    _add_refits(p)
    _add_backend_options(p)
    _add_force(p)

    p = command("groups", "learning curves by group, and whether the groups learn differently",
                "foretell groups study.csv --task lantern-relay --out groups/",
                "foretell groups study.csv --task lantern-relay --out groups/ --fits results/ "
                "--reference control",
                more="Per participant and block: accuracy, optimal_rate, gain_bits, inv_temp,\n"
                     "median_rt, depth; hierarchical Bayesian group x block contrasts with a\n"
                     "permutation cross-check (Holm), and the between-group model test.\n")
    _add_log_options(p)
    _add_screen_options(p)
    p.add_argument("--out", required=True, help="folder for the tables and figures")
    p.add_argument("--fits", metavar="DIR", help="a foretell fit output to reuse (else the fits are run)")
    p.add_argument("--models", help="comma-separated model ids when the fits are run here")
    p.add_argument("--reference", help="the group the others are contrasted with (default: the first)")
    _add_sampling_options(p, min_chains=2, seed_help="seed of the samplers and permutations (>= 0)",
                          jobs_help="fits and chains in parallel (-1: all cores)")
    _add_force(p)

    p = command("events", "write BIDS events files with per-trial learner quantities for the EEG analysis",
                "foretell events study.csv --task lantern-relay --out events/ --fits results/",
                "foretell events study.csv --task lantern-relay --out events/ --models count-1,mix-3",
                more="One sub-<label>[_ses-<label>]_task-<label>_events.tsv (and .json sidecar) per\n"
                     "participant and session: a guess row and a reveal row per trial, with each\n"
                     "model's entropy, surprise, guess probability and context.\n")
    _add_log_options(p)
    p.add_argument("--out", required=True, help="folder for the events files")
    p.add_argument("--models", help="comma-separated model ids (default: the fitted models, or the "
                                    "task's set without leaky models when no --fits is given)")
    p.add_argument("--fits", metavar="DIR", help="a foretell fit output whose learner parameters are used")
    _add_force(p)

    p = command("recover", "design check: can the models and parameters be told apart on this task?",
                "foretell recover --task lantern-relay --participants 40 --trials 200,600 "
                "--models count-0,count-1,count-2 --out design/",
                "foretell recover --task t.toml --participants 30 --trials 300 "
                "--models count-1,count-1-leak --from-fits results/ --out design/ --jobs 2",
                more="For each trial count and generating model, simulated participants are fitted\n"
                     "with every listed model; the answer names the smallest trial count at which\n"
                     "every model is recovered (>= 0.9) and every parameter follows its true value\n"
                     "(Spearman >= 0.7).\n")
    p.add_argument("--task", required=True, help="task file (TOML) or the name of a shipped task")
    p.add_argument("--participants", type=_count(2), required=True,
                   help="simulated participants per generating model and trial count")
    p.add_argument("--trials", required=True, help="comma-separated trial counts, e.g. 200,400,800")
    p.add_argument("--models", required=True, help="comma-separated model ids (see foretell fit --help)")
    p.add_argument("--from-fits", metavar="DIR",
                   help="draw parameters from the fits.csv of a foretell fit output instead of the "
                        "default ranges")
    p.add_argument("--out", required=True, help="folder for the tables and figures")
    p.add_argument("--seed", type=_count(0), default=0, help="seed of the simulations and fits (>= 0)")
    p.add_argument("--jobs", type=_jobs, default=1, help="fits in parallel (-1: all cores)")
    _add_force(p)
    _add_backend_options(p)
    return parser


def _load(args: argparse.Namespace, measures: Sequence[str] = (), check_task=None):
    """Return (task, validated log) after printing the log's warnings once.

    ``check_task`` (a function of the task) runs before the log is read.
    """
    from ..logs import RTScreen, load_log
    from ..tasks import load_task

    task = load_task(args.task)
    if check_task is not None:
        check_task(task)
    defaults = RTScreen()
    screen = RTScreen(
        floor=defaults.floor if getattr(args, "rt_floor", None) is None else args.rt_floor,
        ceiling=defaults.ceiling if getattr(args, "rt_ceiling", None) is None else args.rt_ceiling,
        mad_k=getattr(args, "rt_mad", None))
    log = load_log(args.log, task, columns=_parse_map(args.map), rt_unit=args.rt_unit,
                   fix_labels=args.fix_labels, screen=screen, measures=measures)
    for warning in log.warnings:
        _say(f"warning: {warning}")
    return task, log


def _say(line: str) -> None:
    print(printable(line), file=sys.stderr)


def _cmd_task(args: argparse.Namespace) -> int:
    from ..tasks import load_task

    print(load_task(args.task).describe())
    return 0


def _cmd_check(args: argparse.Namespace) -> int:
    from ..logs import log_summary, unscorable
    from ..models import default_warmup

    task, log = _load(args)
    print(log_summary(log).to_string(index=False, na_rep=""))
    print(str(log.screen))
    for row in unscorable(log, default_warmup(task)).itertuples(index=False):
        _say(f"warning: participant {row.participant} has nothing to fit ({row.reason}); "
             "fit leaves them out")
    return 0


def _run_fit(task, log, args: argparse.Namespace, out: str | None, inputs: Sequence[str]):
    """Return the analysis of ``log`` after printing its summary (and writing it to ``out``)."""
    from ..steps.guesses import fit
    from ..outputs import check_output_dir, provenance, write_outputs

    if out is not None:
        check_output_dir(out, inputs=inputs, force=args.force)
    started = time.perf_counter()
    result = fit(log, task, models=_csv_list(getattr(args, "models", None)),
                 free=tuple(_csv_list(getattr(args, "free", "")) or ()),
                 seed=getattr(args, "seed", 0), n_starts=getattr(args, "starts", 3),
                 n_jobs=args.jobs, progress=sys.stderr.isatty())
    for line in result.notes:
        _say(line)
    if out is not None:
        manifest = provenance(args.command, _options(args), inputs,
                              {"fit_s": round(time.perf_counter() - started, 3)})
        path = write_outputs(out, result.tables(trials=args.trials),
                             texts={"summary.txt": result.summary + "\n"}, manifest=manifest,
                             inputs=inputs, force=args.force)
        _say(f"tables written to {path}/")
    print(result.summary)
    return result


def _options(args: argparse.Namespace) -> dict[str, object]:
    """Return the parsed options as JSON-ready values (for the manifest)."""
    return {k: v for k, v in sorted(vars(args).items()) if k != "command"}


def _cmd_fit(args: argparse.Namespace) -> int:
    from ..cluster import job_backend

    from ..steps.guesses import check_guess_design

    task, log = _load(args, check_task=check_guess_design)
    with job_backend(args.backend, args.scheduler):
        _run_fit(task, log, args, args.out, [args.log, *_task_inputs(task)])
    return 0


def _task_inputs(task) -> list[str]:
    """Return the task's file as an input of the run (shipped tasks included: their hash is provenance)."""
    return [task.path] if task.path else []


def _trial_counts(text: str) -> list[int]:
    """Return the whole numbers of a comma-separated list (usage error otherwise)."""
    values = _csv_list(text) or []
    try:
        counts = [int(v) for v in values]
    except ValueError:
        raise UsageError(f"--trials expects whole numbers separated by commas, e.g. 200,400; got {text!r}") from None
    if not counts:
        raise UsageError("--trials needs at least one trial count")
    return counts


def _cmd_recover(args: argparse.Namespace) -> int:
    from ..cluster import job_backend
    from ..plots.common import figure_png
    from ..outputs import check_output_dir, provenance, write_outputs
    from ..steps.design import recover
    from ..tasks import load_task

    task = load_task(args.task)
    fits_path = Path(args.from_fits) / "fits.csv" if args.from_fits else None
    inputs = [*_task_inputs(task), *([str(fits_path)] if fits_path else [])]
    check_output_dir(args.out, inputs=inputs, force=args.force)
    from_fits = _read_fits(fits_path) if fits_path else None
    started = time.perf_counter()
    with job_backend(args.backend, args.scheduler):
        try:
            result = recover(task, _csv_list(args.models) or [], n_participants=args.participants,
                             trials=_trial_counts(args.trials), from_fits=from_fits, seed=args.seed,
                             n_jobs=args.jobs, progress=sys.stderr.isatty())
        except InputError as err:  # problems of the fits table: name its file
            raise InputError([replace(p, path=p.path or str(fits_path)) for p in err.problems]) from None
    for line in result.notes:
        _say(f"note: {line}")
    figures = {f"figures/{name}.png": figure_png(fig) for name, fig in result.figures.items()}
    manifest = provenance("recover", _options(args), inputs,
                          {"recover_s": round(time.perf_counter() - started, 3)})
    path = write_outputs(args.out, result.tables(), texts={"answer.txt": result.answer + "\n"},
                         extra=figures, manifest=manifest, inputs=inputs, force=args.force)
    _say(f"tables and figures written to {path}/")
    print(result.answer)
    return 0


def _cmd_rt(args: argparse.Namespace) -> int:
    from ..cluster import job_backend
    from ..outputs import check_output_dir, netcdf_bytes, provenance, write_outputs
    from ..steps.measures import analyse_rt

    measures = [] if args.measure == "rt" else [args.measure]
    task, log = _load(args, measures=measures)
    fits_path = Path(args.fits) / "fits.csv" if args.fits else None
    inputs = [args.log, *_task_inputs(task), *([str(fits_path)] if fits_path else [])]
    check_output_dir(args.out, inputs=inputs, force=args.force)
    fits = _read_fits(fits_path, "--fits") if fits_path else None
    started = time.perf_counter()
    with job_backend(args.backend, args.scheduler):
        result = analyse_rt(log, task, _csv_list(args.models), measure=args.measure,
                            locked=args.locked, fits=fits, bayes=args.bayes, draws=args.draws,
                            chains=args.chains, seed=args.seed, n_jobs=args.jobs,
                            refits=args.refits, progress=sys.stderr.isatty(),
                            log_transform=True if args.measure == "rt" else args.log_transform)
    for line in result.notes:
        _say(f"note: {line}")
    posteriors = {f"posterior_{model}.nc": netcdf_bytes(idata) for model, idata in result.posteriors.items()}
    manifest = provenance("rt", _options(args), inputs, {"rt_s": round(time.perf_counter() - started, 3)})
    path = write_outputs(args.out, result.tables(), extra=posteriors, manifest=manifest,
                         texts={"summary.txt": "\n".join(result.notes) + "\n"},
                         inputs=inputs, force=args.force)
    _say(f"tables written to {path}/")
    print(result.compare.to_string(index=False))
    return 0


def _cmd_groups(args: argparse.Namespace) -> int:
    from ..plots.common import figure_png
    from ..steps.groups import compare_groups
    from ..outputs import check_output_dir, provenance, write_outputs

    task, log = _load(args)
    fit_dir = Path(args.fits) if args.fits else None
    names = ("fits", "blocks", "winners", "contexts")
    inputs = [args.log, *_task_inputs(task), *([str(fit_dir / f"{n}.csv") for n in names] if fit_dir else [])]
    check_output_dir(args.out, inputs=inputs, force=args.force)
    started = time.perf_counter()
    if fit_dir is not None:
        fitted = {n: _read_fits(fit_dir / f"{n}.csv", "--fits") for n in names}
    else:
        from ..steps.guesses import fit

        fitted = fit(log, task, _csv_list(args.models), seed=args.seed, n_jobs=args.jobs,
                     progress=sys.stderr.isatty())
    cores = max(1, min(args.chains, args.jobs if args.jobs > 0 else 2))
    result = compare_groups(log, task, fitted, reference=args.reference, draws=args.draws,
                            chains=args.chains, tune=args.draws, seed=args.seed, bayes=args.bayes,
                            cores=cores, progress=sys.stderr.isatty())
    for line in result.notes:
        _say(f"note: {line}")
    figures = {f"figures/{n}.png": figure_png(f) for n, f in result.figures.items()}
    manifest = provenance("groups", _options(args), inputs,
                          {"groups_s": round(time.perf_counter() - started, 3)})
    path = write_outputs(args.out, result.tables(), extra=figures, manifest=manifest,
                         texts={"summary.txt": "".join(f"{n}\n" for n in result.notes)},
                         inputs=inputs, force=args.force)
    _say(f"tables and figures written to {path}/")
    print("".join(f"{n}\n" for n in result.notes), end="")
    return 0


def _cmd_events(args: argparse.Namespace) -> int:
    from ..steps.events import events_tables, sidecar_json, to_tsv
    from ..outputs import check_output_dir, provenance, write_outputs
    from ..steps.whole import event_models

    task, log = _load(args)
    fits_path = Path(args.fits) / "fits.csv" if args.fits else None
    inputs = [args.log, *_task_inputs(task), *([str(fits_path)] if fits_path else [])]
    check_output_dir(args.out, inputs=inputs, force=args.force)
    fits = _read_fits(fits_path, "--fits") if fits_path else None
    models = _csv_list(args.models) or event_models(fits, task)
    result = events_tables(log, task, models, fits=fits)
    for line in result.warnings:
        _say(f"warning: {line}")
    files = {name: to_tsv(frame) for name, frame in result.files.items()}
    files |= {name: sidecar_json(d) for name, d in result.sidecars.items()}
    path = write_outputs(args.out, {"participants": result.labels}, extra=files,
                         manifest=provenance("events", _options(args), inputs), inputs=inputs,
                         force=args.force)
    _say(f"{len(result.files)} events files written to {path}/ (participants.csv maps ids to BIDS labels)")
    return 0


def _read_fits(path: Path, option: str = "--from-fits"):
    """Return a table of a foretell fit output folder (InputError naming the file otherwise)."""
    import pandas as pd

    if not path.is_file():
        raise InputError(f"no {path.name} here: {option} takes the output folder of foretell fit",
                         path=str(path))
    try:
        return pd.read_csv(path)
    except (ValueError, UnicodeDecodeError) as err:
        raise InputError(f"cannot read the fits table: {err}", path=str(path)) from None


def _cmd_demo(args: argparse.Namespace) -> int:
    from ..demo import DEMO_RT_MODELS, demo_log, demo_task, demo_truth, recovery_text
    from ..logs import validate_log
    from ..steps.whole import DEMO_CHAINS, DEMO_DRAWS, analyze

    task = demo_task()
    _say(f"demo study: task {task.name!r} ({', '.join(task.symbols)}); 28 simulated participants "
         "in two invented groups, fitted with the default model set")
    log = validate_log(demo_log(), task, source="demo_log.csv")
    result = analyze(log, task, args.out, rt_models=DEMO_RT_MODELS, skip=_csv_list(args.skip) or (),
                     n_jobs=args.jobs, draws=DEMO_DRAWS, tune=DEMO_DRAWS, chains=DEMO_CHAINS,
                     provisional=True, force=args.force, trials=args.trials,
                     manifest=_run_record(args, []), progress=sys.stderr.isatty())
    _report_run(result, args.out)
    if result.fit is not None:
        print()
        print(recovery_text(result.fit.winners, demo_truth()))
    return 0


def _cmd_analyze(args: argparse.Namespace) -> int:
    from ..cluster import job_backend
    from ..steps.whole import analyze

    task, log = _load(args)
    inputs = [args.log, *_task_inputs(task)]
    with job_backend(args.backend, args.scheduler):
        result = analyze(log, task, args.out, models=_csv_list(args.models),
                         rt_models=_csv_list(args.rt_models), free=_csv_list(args.free) or (),
                         skip=_csv_list(args.skip) or (), recovery=args.recovery, seed=args.seed,
                         n_jobs=args.jobs, bayes=args.bayes, draws=args.draws, chains=args.chains,
                         tune=args.draws, force=args.force, inputs=inputs, trials=args.trials,
                         refits=args.refits,
                         manifest=_run_record(args, inputs), progress=sys.stderr.isatty())
    _report_run(result, args.out)
    return 0


def _run_record(args: argparse.Namespace, inputs: Sequence[str]) -> dict[str, object]:
    """Return the manifest's provenance of this command (timings are added by the step runner)."""
    from ..outputs import provenance

    return provenance(args.command, _options(args), inputs)


def _report_run(result, out: str) -> None:
    """Print the notes, the fit summary and where the report is."""
    for line in result.notes:
        _say(f"note: {line}")
    if result.fit is not None:
        print(result.fit.summary)
    if result.report_html is not None:
        _say(f"report: {Path(out) / 'report.html'}")
    _say(f"results written to {out}/")


COMMANDS = {"demo": _cmd_demo, "task": _cmd_task, "check": _cmd_check, "fit": _cmd_fit,
            "recover": _cmd_recover, "rt": _cmd_rt, "analyze": _cmd_analyze, "groups": _cmd_groups,
            "events": _cmd_events}


class _Terminated(KeyboardInterrupt):
    """SIGTERM, turned into an interruption so that cleanup runs as for Ctrl-C."""


def _on_sigterm(signum, frame) -> None:  # noqa: ARG001 (signal handler signature)
    raise _Terminated()


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``foretell`` command; return its exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    previous = None
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not the main thread: leave signals alone
        previous = None
    try:
        return COMMANDS[args.command](args)
    except InputError as err:
        for problem in err.problems:
            _say(f"error: {problem}")
        return 1
    except UsageError as err:
        _say(f"foretell {args.command}: {err}")
        return 2
    except ForetellError as err:
        _say(f"error: {err}")
        return 1
    except OSError as err:  # a file the checks above could not foresee (disk full, permissions)
        _say(f"error: {err.filename or ''}: {err.strerror or err}")
        return 1
    except _Terminated:
        _say("terminated: nothing was written (an existing output folder is unchanged)")
        return 128 + signal.SIGTERM
    except KeyboardInterrupt:
        _say("interrupted: nothing was written (an existing output folder is unchanged)")
        return 130
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":
    sys.exit(main())
