"""The ``foretell`` command's argument parser: one function per subcommand, shared option groups."""

from __future__ import annotations

import argparse
from collections.abc import Callable

from .. import __version__
from . import lab
from .eeg import eeg_parser

EXAMPLES = """\
examples:
  foretell demo                                   # the whole job on the embedded demo data
  foretell task lantern-relay                     # a shipped task: contexts and entropy rate
  foretell check session.csv --task lantern-relay
  foretell fit session.csv --task lantern-relay --out results/
"""
TRIALS_CHOICES = ("best", "all", "none")
DEMO_OUT = "foretell-demo"
SKIPPABLE = "comma-separated steps to leave out: fit, rt, groups, events, report"


def jobs(text: str) -> int:
    """Return a joblib n_jobs value: a positive count, or -1 for all cores (-2 all but one, ...)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value == 0:
        raise argparse.ArgumentTypeError("0 jobs cannot run anything: give 1, 2, ... or -1 for all cores")
    return value


def count(low: int) -> Callable[[str], int]:
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


class _Formatter(argparse.RawDescriptionHelpFormatter):
    """Keeps the epilog's line breaks, and adds an option's default to its help when the help does not say it.

    No default is added for options that are off or empty unless given
    (None, False, "", []).
    """

    def _get_help_string(self, action: argparse.Action) -> str:
        text = action.help or ""
        unset = action.default is None or action.default is False or action.default in ("", [])
        if not action.option_strings or unset or action.default is argparse.SUPPRESS or "default" in text:
            return text
        return f"{text} (default: %(default)s)"


def _log_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("log", help="response log, one row per trial: a file (CSV, TSV, JSON, spreadsheet, Parquet), "
                               "a folder or a quoted glob of files, or a BIDS dataset")
    p.add_argument("--task", required=True,
                   help="task file (TOML) describing the stimulus source, or the name of a "
                        "task shipped with foretell (e.g. lantern-relay)")
    p.add_argument("--map", action="append", default=[], metavar="CANONICAL=THEIRS",
                   help="use the lab's own column name for a canonical column (repeatable)")
    p.add_argument("--rt-unit", choices=("s", "ms"), default=None,
                   help="unit of the rt column (default: the profile's, else s)")
    p.add_argument("--fix-labels", action="store_true", default=None,
                   help="strip stray spaces and match letter case of symbol labels (reported)")
    lab.source_options(p)


def _screen_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rt-floor", type=float, default=None,
                   help="flag responses faster than this many seconds (default 0.15)")
    p.add_argument("--rt-ceiling", type=float, default=None,
                   help="flag responses slower than this many seconds (default 3)")
    p.add_argument("--rt-mad", type=float, default=None, metavar="K",
                   help="also flag log-RTs more than K median absolute deviations from the "
                        "participant's median")


def _jobs_option(p: argparse.ArgumentParser, what: str) -> None:
    p.add_argument("--jobs", type=jobs, default=1, help=f"{what} in parallel (default 1; -1: all cores)")


def _trials_option(p: argparse.ArgumentParser) -> None:
    p.add_argument("--trials", choices=TRIALS_CHOICES, default="best",
                   help="rows of fit/trials.csv (see foretell fit --help)")


def _free(p: argparse.ArgumentParser) -> None:
    p.add_argument("--free", default="", help="extra free learner parameters: leak, alpha or leak,alpha")


def _force(p: argparse.ArgumentParser) -> None:
    p.add_argument("--force", action="store_true", help="replace an output folder that foretell wrote before")


def _sampling_options(p: argparse.ArgumentParser, *, seed_help: str, jobs_help: str) -> None:
    """Add --bayes/--no-bayes, --draws, --tune, --chains, --seed and --jobs (the Bayesian steps' options).

    Two chains at least everywhere: R-hat compares chains (Vehtari et al., 2021).
    """
    p.add_argument("--bayes", action=argparse.BooleanOptionalAction, default=True,
                   help="fit the hierarchical Bayesian models (default: yes)")
    p.add_argument("--draws", type=count(10), default=1000, help="posterior draws per chain")
    p.add_argument("--tune", type=count(0), default=1000, help="tuning steps per chain before the draws")
    p.add_argument("--chains", type=count(2), default=4, help="Markov chains per model (at least 2)")
    p.add_argument("--seed", type=count(0), default=0, help=seed_help)
    _jobs_option(p, jobs_help)


def _refits(p: argparse.ArgumentParser) -> None:
    p.add_argument("--loo", action="store_true",
                   help="compare the hierarchical RT models by PSIS-LOO over participant x block units, with "
                        "exact refits where Pareto k is above 0.7 (default: no LOO comparison)")
    p.add_argument("--refits", type=count(0),
                   help="with --loo, most exact leave-one-out refits per RT model, for the participant x block "
                        "units whose PSIS Pareto k is above 0.7 (default 10; each is one more "
                        "MCMC run)")


def _backend_options(p: argparse.ArgumentParser) -> None:
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


Adder = Callable[..., argparse.ArgumentParser]


def _demo(command: Adder) -> None:
    p = command("demo", "run the whole analysis on the embedded demo study and write its report",
                "foretell demo", "foretell demo --out demo-results/ --jobs 2",
                "foretell demo --skip rt,groups       # the fits and comparisons only",
                "foretell demo --seed 3               # the same data, other random starts and draws")
    p.add_argument("--out", default=DEMO_OUT, help=f"folder for the results (default ./{DEMO_OUT})")
    _jobs_option(p, "participants fitted and chains sampled")
    p.add_argument("--skip", default="", help=SKIPPABLE)
    p.add_argument("--seed", type=count(0), default=0,
                   help="seed of every random step of the analysis (>= 0); the demo data stay the same")
    _trials_option(p)
    _force(p)


def _analyze(command: Adder) -> None:
    p = command("analyze", "the whole job: validate, fit and compare, reaction times, groups, "
                           "EEG events and the report",
                "foretell analyze study.csv --task lantern-relay --out study-results/",
                "foretell analyze study.csv --task lantern-relay --out r/ --recovery design/ --jobs 2",
                "foretell analyze study.csv --task lantern-relay --out r/ --skip rt,events",
                more="Writes one subfolder per step (validation, fit, rt, groups, events, eeg, recovery)\n"
                     "and report.html with its figures. 'foretell analyse' is the same command.\n")
    _log_options(p)
    _screen_options(p)
    p.add_argument("--out", required=True, help="folder for every result and the report")
    p.add_argument("--models", help="comma-separated model ids for the fits (default: the task's set)")
    p.add_argument("--rt-models", help="comma-separated model ids for the RT models (default: --models)")
    _free(p)
    p.add_argument("--skip", default="", help=SKIPPABLE)
    p.add_argument("--recovery", metavar="DIR", help="a foretell recover output of this task to show in the report")
    p.add_argument("--epochs", help="the EEG epochs (*-epo.fif): a pattern with {participant}, {session}, or a "
                                    "BIDS derivatives folder; runs the eeg step (see foretell eeg --help)")
    p.add_argument("--locked", help="the event the EEG epochs are locked to: guess or reveal (reaction designs: "
                                    "stimulus); default the trial's first event")
    _sampling_options(p, seed_help="seed of every random step (>= 0)",
                      jobs_help="participants fitted and chains sampled")
    _trials_option(p)
    _refits(p)
    _backend_options(p)
    _force(p)
    lab.derivatives_option(p)


def _task(command: Adder) -> None:
    p = command("task", "describe a task file: contexts, probabilities, entropy rate",
                "foretell task lantern-relay", "foretell task my-study/task.toml",
                more="A task is a TOML file, or the name of a task shipped with foretell.\n")
    p.add_argument("task", help="task file (TOML), or the name of a shipped task "
                                "(lantern-relay, tide-gauge, compass-fair, ...)")


def _check(command: Adder) -> None:
    p = command("check", "validate a response log against its task and summarise it",
                "foretell check s01.csv --task lantern-relay",
                "foretell check lab.tsv --task t.toml --map response=guess --map rt=RT --rt-unit ms")
    _log_options(p)
    _screen_options(p)


def _fit(command: Adder) -> None:
    p = command("fit", "fit every learner model per participant and compare them",
                "foretell fit study.csv --task lantern-relay --out results/",
                "foretell fit study.csv --task t.toml --out r/ --models count-0,count-1,mix-3 "
                "--free leak --jobs 2", more=_models_help())
    _log_options(p)
    p.add_argument("--out", required=True, help="folder for the result tables (CSV)")
    p.add_argument("--models", help="comma-separated model ids (default: the task's default set; "
                                    "see the list below)")
    _free(p)
    p.add_argument("--seed", type=count(0), default=0, help="seed of the optimiser's random starts (>= 0)")
    p.add_argument("--starts", type=count(1), default=3, help="optimiser starts per fit")
    _jobs_option(p, "participants fitted")
    p.add_argument("--trials", choices=TRIALS_CHOICES, default="best",
                   help="rows of trials.csv: each participant's winning model (best, the default), "
                        "every model (all: large), or no trials.csv (none)")
    _force(p)
    lab.derivatives_option(p)
    _backend_options(p)


def _rt(command: Adder) -> None:
    p = command("rt", "which past context explains reaction times (or another per-trial measure)",
                "foretell rt study.csv --task lantern-relay --out rt/",
                "foretell rt study.csv --task lantern-relay --out rt/ --fits results/ --no-bayes",
                "foretell rt eeg.csv --task lantern-relay --out p3/ --measure p3_amp --locked reveal",
                more="Per participant and learner model: log RT on the prediction's entropy (guess\n"
                     "designs) or the stimulus's surprise (reaction designs) plus a time-on-task\n"
                     "baseline; the baseline alone (model 'none') joins every comparison, and a learner\n"
                     "is called only when the random-effects selection puts it ahead of the baseline\n"
                     "and the other learners. Then hierarchical Bayesian models (--bayes).\n")
    _log_options(p)
    _screen_options(p)
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
    p.add_argument("--baseline", metavar="TERMS",
                   help="comma-separated time-on-task terms of every model: blocks, trial_spline, log_trial, "
                        "block_trend, prev_correct; '' for an intercept alone (default: blocks,trial_spline,"
                        "prev_correct in guess designs, blocks,trial_spline in reaction designs)")
    p.add_argument("--bootstrap", type=count(0), metavar="N",
                   help="moving-block resamples behind the slope interval of a leak chosen on the measure "
                        "(reaction designs; 0: no interval; default 200)")
    _sampling_options(p, seed_help="seed of the samplers (>= 0)",
                      jobs_help="participants computed and chains sampled")
    _refits(p)
    _backend_options(p)
    _force(p)
    lab.derivatives_option(p)


def _groups(command: Adder) -> None:
    p = command("groups", "learning curves by group, and whether the groups learn differently",
                "foretell groups study.csv --task lantern-relay --out groups/",
                "foretell groups study.csv --task lantern-relay --out groups/ --fits results/ "
                "--reference control",
                more="Per participant and block: accuracy, optimal_rate, gain_bits, inv_temp,\n"
                     "median_rt, depth; hierarchical Bayesian group x block contrasts with a\n"
                     "permutation cross-check (Holm), and the between-group model test.\n")
    _log_options(p)
    _screen_options(p)
    p.add_argument("--out", required=True, help="folder for the tables and figures")
    p.add_argument("--fits", metavar="DIR", help="a foretell fit output to reuse (else the fits are run)")
    p.add_argument("--models", help="comma-separated model ids when the fits are run here")
    p.add_argument("--reference", help="the group the others are contrasted with (default: the first)")
    _sampling_options(p, seed_help="seed of the samplers and permutations (>= 0)",
                      jobs_help="fits and chains")
    _force(p)
    lab.derivatives_option(p)


def _events(command: Adder) -> None:
    p = command("events", "write BIDS events files with per-trial learner quantities for the EEG analysis",
                "foretell events study.csv --task lantern-relay --out events/ --fits results/",
                "foretell events study.csv --task lantern-relay --out events/ --models count-1,mix-3",
                more="One sub-<label>[_ses-<label>]_task-<label>_events.tsv (and .json sidecar) per\n"
                     "participant and session: a guess row and a reveal row per trial, with each\n"
                     "model's entropy, surprise, guess probability and context.\n")
    _log_options(p)
    p.add_argument("--out", required=True, help="folder for the events files")
    p.add_argument("--models", help="comma-separated model ids (default: the fitted models, or the "
                                    "task's set without leaky models when no --fits is given)")
    p.add_argument("--fits", metavar="DIR", help="a foretell fit output whose learner parameters are used")
    _force(p)
    lab.derivatives_option(p)


def _recover(command: Adder) -> None:
    p = command("recover", "design check: can the models and parameters be told apart on this task?",
                "foretell recover --task lantern-relay --participants 40 --trials 200,600 "
                "--models count-0,count-1,count-2 --out design/",
                "foretell recover --task t.toml --participants 30 --trials 300 "
                "--models count-1,count-1-leak --from-fits results/ --out design/ --jobs 2",
                more="For each trial count and generating model, simulated participants are fitted\n"
                     "with every listed model; the answer names the smallest trial count at which\n"
                     "every model is shown to be recovered (lower end of its 95% Clopper-Pearson\n"
                     "interval >= 0.9) and every parameter follows its true value (Spearman >= 0.7),\n"
                     "or how many simulated participants would show it; --rt also checks the RT analysis.\n")
    p.add_argument("--task", required=True, help="task file (TOML) or the name of a shipped task")
    p.add_argument("--participants", type=count(2), required=True,
                   help="simulated participants per generating model and trial count")
    p.add_argument("--trials", dest="trial_counts", required=True,
                   help="comma-separated trial counts, e.g. 200,400,800")
    p.add_argument("--models", required=True, help="comma-separated model ids (see foretell fit --help)")
    p.add_argument("--from-fits", metavar="DIR",
                   help="draw parameters from the fits of a foretell fit output of this task instead of "
                        "the default ranges")
    p.add_argument("--rt", action="store_true",
                   help="also check the RT analysis: RTs simulated from each model's uncertainty and from "
                        "practice-only and drift-only nulls, analysed as foretell rt does")
    p.add_argument("--rt-datasets", type=count(1), default=20, metavar="N",
                   help="with --rt: simulated datasets per process and trial count (default 20)")
    p.add_argument("--rt-effect", type=float, default=40.0, metavar="MS",
                   help="with --rt: RT rise per bit of the generating model's entropy, in ms (default 40)")
    p.add_argument("--out", required=True, help="folder for the tables and figures")
    p.add_argument("--seed", type=count(0), default=0, help="seed of the simulations and fits (>= 0)")
    _jobs_option(p, "fits")
    _force(p)
    _backend_options(p)


COMMANDS = (_demo, _analyze, _task, _check, _fit, _rt, _groups, _events, eeg_parser, _recover, lab.sequence_parser,
            lab.profile_parser)
"""The subcommands, in the order ``foretell --help`` lists them."""


def build_parser() -> argparse.ArgumentParser:
    """Return the argument parser of the ``foretell`` command.

    Returns
    -------
    argparse.ArgumentParser
        One subcommand per step (``foretell <command> --help`` shows its
        options and examples); the chosen one is ``args.command``.
    """
    parser = argparse.ArgumentParser(
        prog="foretell", formatter_class=_Formatter,
        description="Analyse guess-the-next-symbol experiments: which past context explains "
                    "each participant's guesses, block by block.",
        epilog=EXAMPLES)
    parser.add_argument("--version", action="version", version=f"foretell {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def command(name: str, help_: str, *examples: str, more: str = "") -> argparse.ArgumentParser:
        sentence = help_[:1].upper() + help_[1:] + ("" if help_.endswith(("?", ".")) else ".")
        return sub.add_parser(name, help=help_, description=sentence, formatter_class=_Formatter,
                              epilog=more + "examples:\n" + "".join(f"  {e}\n" for e in examples))

    for add in COMMANDS:
        add(command)
    return parser
