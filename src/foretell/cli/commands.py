"""The ``foretell`` subcommands: read the inputs, run one step, write its result, print what matters."""

from __future__ import annotations

import argparse
import contextlib
import re
import sys
import textwrap
import time
from collections.abc import Callable, Sequence
from dataclasses import replace
from pathlib import Path

from ..errors import InputError, UsageError, printable
from ..text import plural
from .eeg import cmd_eeg
from .lab import (check_derivatives, cmd_profile, cmd_sequence, print_mapping, profile_inputs,
                  write_derivatives)
from .names import model_ids, named_task

_CLI_ADVICE = re.compile(r"\b\w+=(?:\{[^{}]*\}|'[^']*'|\"[^\"]*\"|[^\s(){}]+)? \(CLI: ([^)]*)\)")
"""Python advice with its command-line twin: ``keyword=value (CLI: --option ...)``."""
WIDTH = 99
"""The longest console line of a note (errors stay one line per problem, whatever their length)."""
PROGRESS = True
"""The steps' progress on the command line: a bar on a terminal, plain lines otherwise (:mod:`foretell.progress`)."""


def say(line: str) -> None:
    """Print one message line to stderr, in the command line's words (see :func:`cli_words`)."""
    print(printable(cli_words(line)), file=sys.stderr)


def say_notes(notes: Sequence[str]) -> None:
    """Print each note as ``note: ...``, wrapped to lines of at most :data:`WIDTH` characters."""
    for note in notes:
        for line in textwrap.wrap(cli_words(f"note: {note}"), WIDTH, subsequent_indent="  ", break_on_hyphens=False):
            say(line)


def say_problems(err: InputError) -> None:
    """Print one ``error:`` line per problem of ``err`` (file, line and column first)."""
    for problem in err.problems:
        say(f"error: {problem}")


def cli_words(text: str) -> str:
    """Return ``text`` with Python advice given as ``keyword=value (CLI: --option)`` reduced to the option.

    Library messages name both spellings (``pass rt_unit='ms' (CLI: --rt-unit ms)``);
    on the command line only the option means anything.
    """
    return _CLI_ADVICE.sub(r"\1", text)


def csv_list(text: str | None) -> list[str] | None:
    """Return the items of a comma-separated option (None when the option was not given)."""
    return None if text is None else [t.strip() for t in text.split(",") if t.strip()]


def parse_map(pairs: Sequence[str]) -> dict[str, str]:
    """Return {canonical: theirs} from ``--map canonical=theirs`` options."""
    out: dict[str, str] = {}
    for pair in pairs:
        canonical, sep, theirs = pair.partition("=")
        if not sep or not canonical.strip() or not theirs.strip():
            raise UsageError(f"--map expects canonical=theirs (e.g. response=guess), got {pair!r}")
        out[canonical.strip()] = theirs.strip()
    return out


def _options(args: argparse.Namespace) -> dict[str, object]:
    """Return the parsed options as JSON-ready values (for the manifest)."""
    return {k: v for k, v in sorted(vars(args).items()) if k != "command"}


def _task_inputs(task) -> list[str]:
    """Return the task's file as an input of the run (shipped tasks included: their hash is provenance)."""
    return [task.path] if task.path else []


def _load(args: argparse.Namespace, measures: Sequence[str] = (), check_task=None):
    """Return (task, validated log) after printing the log's warnings once.

    ``check_task`` (a function of the task) runs before the log is read.
    """
    from ..logs import RTScreen, load_log

    task = _task(args.task)
    if check_task is not None:
        check_task(task)
    defaults = RTScreen()
    screen = RTScreen(
        floor=defaults.floor if getattr(args, "rt_floor", None) is None else args.rt_floor,
        ceiling=defaults.ceiling if getattr(args, "rt_ceiling", None) is None else args.rt_ceiling,
        mad_k=getattr(args, "rt_mad", None))
    log = load_log(args.log, task, profile=args.profile, name_pattern=args.name_pattern,
                   columns=parse_map(args.map), rt_unit=args.rt_unit, fix_labels=args.fix_labels,
                   screen=screen, measures=measures)
    for warning in log.warnings:
        say(f"warning: {warning}")
    return task, log


def _task(name: str):
    """Return the task named on the command line after printing its notes (e.g. which file was used)."""
    task = named_task(name)
    say_notes(task.notes)
    return task


def _backend(args: argparse.Namespace):
    """Return the context in which the step's per-participant jobs run (``--backend``, ``--scheduler``)."""
    from ..cluster import job_backend

    if not hasattr(args, "backend"):
        return contextlib.nullcontext()
    return job_backend(args.backend, args.scheduler)


def _run(args: argparse.Namespace, step: Callable[[], object], *, task, log=None,
         inputs: Sequence[str] = (), reads: Sequence = ()):
    """Return a step's result after running it and writing it to ``--out``.

    The output folder is checked and held before the step starts; ``inputs``
    are the files the run read, ``reads`` the result folders
    (:class:`foretell.folders.ResultFolder`): the output may not be, hold or
    lie inside any of them. The manifest records every input's SHA-256 and
    the task's and log's fingerprints (:func:`foretell.folders.fingerprints`).
    """
    from ..folders import fingerprints
    from ..outputs import provenance, reserve, write

    folders = [folder.path for folder in reads]
    check_derivatives(args)
    with reserve(args.out, inputs=[*inputs, *folders], force=args.force), _backend(args):
        started = time.perf_counter()
        result = step()
        record = provenance(args.command, _options(args),
                            [*inputs, *(path for folder in reads for path in folder.input_files())],
                            {f"{result.step}_s": round(time.perf_counter() - started, 3)})
        path = write(args.out, result, inputs=[*inputs, *folders], force=args.force,
                     manifest=record | fingerprints(task, log))
        write_derivatives(args, result, inputs=[*inputs, *folders], manifest=record | fingerprints(task, log))
    say_notes(result.notes)
    say(f"results written to {path}/")
    return result


def cmd_task(args: argparse.Namespace) -> int:
    """``foretell task``: describe a task."""
    print(_task(args.task).describe())
    return 0


def cmd_check(args: argparse.Namespace) -> int:
    """``foretell check``: validate a log and summarise it; the last line is the verdict."""
    from ..logs import log_summary, unscorable
    from ..models import default_warmup

    try:
        task, log = _load(args)
    except InputError as err:
        say_problems(err)
        print(f"verdict: {plural(len(err.problems), 'problem')}, fix them first")
        return 1
    print(log_summary(log).to_string(index=False, na_rep=""))
    print(str(log.screen))
    print_mapping(log)
    empty = unscorable(log, default_warmup(task))
    for row in empty.itertuples(index=False):
        say(f"warning: participant {row.participant} left out of the fits: {row.reason}")
    n = log.frame["participant"].nunique()
    if len(empty) == n:
        print("verdict: nothing to analyse: no participant has a guess to fit after the warm-up")
        return 0
    left = f"; {len(empty)} with nothing to fit, left out" if len(empty) else ""
    print(f"verdict: the log is ready to analyse ({plural(n, 'participant')}, "
          f"{plural(len(log.frame), 'trial')}{left})")
    return 0


def cmd_fit(args: argparse.Namespace) -> int:
    """``foretell fit``: fit and compare the learner models."""
    from ..steps import guesses

    task, log = _load(args, check_task=guesses.check_guess_design)

    def step():
        return guesses.fit(log, task, models=model_ids(args.models, task), free=tuple(csv_list(args.free) or ()),
                           seed=args.seed, n_starts=args.starts, n_jobs=args.jobs, trials=args.trials,
                           progress=PROGRESS)

    result = _run(args, step, task=task, log=log, inputs=[*log.sources, *_task_inputs(task), *profile_inputs(args)])
    print(result.summary)
    return 0


def _fit_folder(args: argparse.Namespace, option: str):
    """Return the ``foretell fit`` folder an option names (a list: nothing when the option is not given)."""
    from ..folders import step_folder

    path = getattr(args, option)
    return [step_folder(path, "fit")] if path else []


def cmd_rt(args: argparse.Namespace) -> int:
    """``foretell rt``: models of reaction times (or another per-trial measure)."""
    from ..folders import as_fit
    from ..steps.measure_calls import ranking_text
    from ..steps.measures import analyze_rt

    task, log = _load(args, measures=[] if args.measure == "rt" else [args.measure])
    reads = _fit_folder(args, "fits")
    fitted = as_fit(reads[0], log, task) if reads else None

    def step():
        return analyze_rt(log, task, models=model_ids(args.models, task), fit=fitted, measure=args.measure,
                          locked=args.locked, bayes=args.bayes, draws=args.draws, chains=args.chains, tune=args.tune,
                          seed=args.seed, n_jobs=args.jobs, refits=args.refits, loo=args.loo, progress=PROGRESS,
                          log_transform=True if args.measure == "rt" else args.log_transform,
                          baseline=args.baseline, bootstrap=args.bootstrap)

    result = _run(args, step, task=task, log=log, inputs=[*log.sources, *_task_inputs(task), *profile_inputs(args)], reads=reads)
    print(_step_findings(result))
    print(ranking_text(result.compare))
    return 0


def _step_findings(result) -> str:
    """Return the findings of one step's result (:func:`foretell.findings.findings_text`)."""
    from ..findings import findings_text
    from ..steps.whole import AnalysisResult

    return findings_text(AnalysisResult.of(result))


def cmd_groups(args: argparse.Namespace) -> int:
    """``foretell groups``: learning curves and group contrasts (running the fits when none are given)."""
    from ..folders import as_fit
    from ..steps.groups import compare_groups

    task, log = _load(args)
    reads = _fit_folder(args, "fits")

    def step():
        from ..steps.guesses import fit

        fitted = (as_fit(reads[0], log, task) if reads else
                  fit(log, task, models=model_ids(args.models, task), seed=args.seed, n_jobs=args.jobs,
                      progress=PROGRESS))
        return compare_groups(log, task, fit=fitted, reference=args.reference, draws=args.draws,
                              chains=args.chains, tune=args.tune, seed=args.seed, bayes=args.bayes,
                              n_jobs=args.jobs, progress=PROGRESS)

    result = _run(args, step, task=task, log=log, inputs=[*log.sources, *_task_inputs(task), *profile_inputs(args)], reads=reads)
    print(_step_findings(result))
    return 0


def cmd_events(args: argparse.Namespace) -> int:
    """``foretell events``: BIDS events files with per-trial learner quantities."""
    from ..folders import as_fit
    from ..steps.events import export_events

    task, log = _load(args)
    reads = _fit_folder(args, "fits")
    fitted = as_fit(reads[0], log, task) if reads else None

    def step():
        return export_events(log, task, fit=fitted, models=model_ids(args.models, task))

    result = _run(args, step, task=task, log=log, inputs=[*log.sources, *_task_inputs(task), *profile_inputs(args)], reads=reads)
    n_files = sum(name.endswith("_events.tsv") for name in result.blobs())
    say(f"{n_files} events files; participants.csv maps participant ids to BIDS labels")
    return 0


def _trial_counts(text: str) -> list[int]:
    """Return the whole numbers of ``--trials`` (usage error otherwise)."""
    values = csv_list(text) or []
    try:
        counts = [int(v) for v in values]
    except ValueError:
        raise UsageError(f"--trials expects whole numbers separated by commas, e.g. 200,400; got {text!r}") from None
    if not counts:
        raise UsageError("--trials needs at least one trial count")
    return counts


def cmd_recover(args: argparse.Namespace) -> int:
    """``foretell recover``: the design check."""
    from ..folders import as_fit
    from ..steps.design import recover

    task = _task(args.task)
    trial_counts = _trial_counts(args.trial_counts)
    reads = _fit_folder(args, "from_fits")
    fitted = as_fit(reads[0], None, task) if reads else None

    def step():
        try:
            return recover(task, models=model_ids(args.models, task), n_participants=args.participants,
                           trial_counts=trial_counts, fit=fitted, seed=args.seed, n_jobs=args.jobs,
                           rt=args.rt, rt_datasets=args.rt_datasets, rt_effect=args.rt_effect / 1000,
                           progress=PROGRESS)
        except InputError as err:  # problems of the reused fits: name their file
            where = str(reads[0].path / "fits.csv") if reads else None
            raise InputError([replace(p, path=p.path or where) for p in err.problems]) from None

    result = _run(args, step, task=task, inputs=_task_inputs(task), reads=reads)
    print(result.answer)
    if result.rt is not None:
        print(result.rt.answer)
    return 0


def _report_run(result, out: str | Path) -> None:
    """Print the notes, the findings, the fit summary and where the report is."""
    from ..findings import findings_text

    say_notes(result.notes)
    print(findings_text(result))
    if result.fit is not None:
        print(result.fit.summary)
    if result.report is not None:
        say(f"report: {Path(out) / 'report.html'}")
    say(f"results written to {Path(out)}/")


def cmd_analyze(args: argparse.Namespace) -> int:
    """``foretell analyze``: every step, and the report."""
    from ..folders import step_folder
    from ..outputs import provenance
    from ..steps.whole import analyze

    task, log = _load(args)
    inputs = [*log.sources, *_task_inputs(task), *profile_inputs(args)]
    reads = [step_folder(args.recovery, "recover")] if args.recovery else []
    check_derivatives(args)
    record = provenance(args.command, _options(args),
                        [*inputs, *(path for folder in reads for path in folder.input_files())])
    with _backend(args):
        result = analyze(log, task, out=args.out, models=model_ids(args.models, task),
                         rt_models=model_ids(args.rt_models, task), free=csv_list(args.free) or (),
                         skip=csv_list(args.skip) or (), recovery=reads[0] if reads else None, seed=args.seed,
                         n_jobs=args.jobs, bayes=args.bayes, draws=args.draws, chains=args.chains,
                         tune=args.tune, refits=args.refits, loo=args.loo, trials=args.trials, force=args.force,
                         epochs=args.epochs, locked=args.locked, inputs=inputs, manifest=record, progress=PROGRESS)
    write_derivatives(args, result, inputs=inputs, manifest=record)
    _report_run(result, args.out)
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    """``foretell demo``: the whole analysis of the embedded demo study."""
    from ..demo import DEMO_RT_MODELS, demo_log, demo_plan, demo_task, demo_truth, recovery_text
    from ..logs import validate_log
    from ..outputs import provenance
    from ..steps.whole import DEMO_CHAINS, DEMO_DRAWS, analyze

    task = demo_task()
    skip = csv_list(args.skip) or ()
    say(demo_plan(task, skip))
    log = validate_log(demo_log(), task, source="demo_log.csv")
    result = analyze(log, task, out=args.out, rt_models=DEMO_RT_MODELS, skip=skip, seed=args.seed, n_jobs=args.jobs,
                     draws=DEMO_DRAWS, tune=DEMO_DRAWS, chains=DEMO_CHAINS, provisional=True, force=args.force,
                     trials=args.trials, manifest=provenance(args.command, _options(args), []),
                     progress=PROGRESS)
    _report_run(result, args.out)
    if result.fit is not None:
        print()
        print(recovery_text(result.fit.winners, demo_truth()))
    return 0


COMMANDS = {"demo": cmd_demo, "task": cmd_task, "check": cmd_check, "fit": cmd_fit, "recover": cmd_recover,
            "rt": cmd_rt, "analyze": cmd_analyze, "groups": cmd_groups, "events": cmd_events,
            "eeg": cmd_eeg, "sequence": cmd_sequence, "profile": cmd_profile}
"""The function that runs each subcommand."""
