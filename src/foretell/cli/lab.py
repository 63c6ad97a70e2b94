"""The command line of the lab's own files: ``foretell profile``, ``foretell sequence``, and the options that read them."""

from __future__ import annotations

import argparse
import os
import tempfile
from pathlib import Path

from ..errors import OutputError


def source_options(p: argparse.ArgumentParser) -> None:
    """Add --profile and --name-pattern to a command that reads a log."""
    p.add_argument("--profile", metavar="TOML",
                   help="a lab profile: the column map, RT unit, value maps, no-response codes, zero-based "
                        "counters and rows to leave out (see the README, 'Lab profiles'); --map, --rt-unit "
                        "and --name-pattern override it")
    p.add_argument("--name-pattern", metavar="PATTERN",
                   help="read a folder's files whose names fit PATTERN, taking ids from them, e.g. "
                        "'{participant}_ses-{session}_*.csv' (quote it; placeholders {participant}, "
                        "{session}, {group}; * any text)")


def derivatives_option(p: argparse.ArgumentParser) -> None:
    """Add --bids-derivatives to a command that writes a result."""
    p.add_argument("--bids-derivatives", metavar="ROOT",
                   help="also write the result as a BIDS derivatives dataset in ROOT/derivatives/foretell/ "
                        "(per-participant tables under sub-<label>/, whole-study tables at the top)")


def profile_parser(command) -> None:
    """Add ``foretell profile``."""
    p = command("profile", "suggest a lab profile from one of the lab's files (columns, units, value maps)",
                "foretell profile --from data/p01_lanterns_2024-03-01.csv --task lantern-relay > lab.toml",
                "foretell profile --from data/p01.json --task lantern-relay --out lab.toml",
                more="The profile is a template: check every line, fill in each \"?\" of a value map with\n"
                     "a task symbol, then try it with foretell check DATA --task T --profile lab.toml.\n")
    p.add_argument("--from", dest="source", required=True, metavar="FILE",
                   help="one of the lab's files (CSV, TSV, JSON, spreadsheet, ...)")
    p.add_argument("--task", help="the task: response and stimulus values that are not its symbols get a value map")
    p.add_argument("--sheet", help="the sheet of a spreadsheet (default: the first)")
    p.add_argument("--out", help="write the profile to this file (default: print it)")
    p.add_argument("--force", action="store_true", help="replace --out when it exists")


def sequence_parser(command) -> None:
    """Add ``foretell sequence``."""
    from .parser import count

    p = command("sequence", "draw each participant's stimulus sequence from the task's source, for the experiment",
                "foretell sequence --task lantern-relay --participants 24 --blocks 5 --seed 7 --out stimuli/",
                "foretell sequence --task t.toml --participants 40 --blocks 6 --trials-per-block 100 "
                "--min-context-count 3 --seed 1 --out stimuli/",
                more="Writes sequences/p01.csv, ... (participant, block, trial, stimulus: the stimuli to\n"
                     "present), blocks.csv (redraws per block), and contexts.csv and transitions.csv: the\n"
                     "sequences' context frequencies against the source's probabilities. The same seed\n"
                     "gives the same files.\n")
    p.add_argument("--task", required=True, help="task file (TOML) or the name of a shipped task; it must give its source")
    p.add_argument("--participants", type=count(1), required=True, help="participants (p01, p02, ...)")
    p.add_argument("--blocks", type=count(1), required=True, help="blocks per participant")
    p.add_argument("--trials-per-block", type=count(1), help="trials per block (default: the task's block_length)")
    p.add_argument("--burn-in", type=count(0), metavar="SYMBOLS",
                   help="start from a uniform past and discard this many symbols (default: start from the "
                        "source's exact stationary distribution)")
    p.add_argument("--min-context-count", type=count(0), default=0, metavar="N",
                   help="redraw a block until every context of the source is the context of at least N of "
                        "its trials (default 0: no check)")
    p.add_argument("--max-redraws", type=count(0), default=1000, help="most redraws of one block (default 1000)")
    p.add_argument("--seed", type=count(0), default=0, help="seed (>= 0): participant p draws from its own child seed")
    p.add_argument("--out", required=True, help="folder for the sequences and the summary")
    p.add_argument("--force", action="store_true", help="replace an output folder that foretell wrote before")


def cmd_profile(args: argparse.Namespace) -> int:
    """``foretell profile``: print (or write) a profile suggested from one file."""
    from ..profiletemplate import suggest_profile
    from .commands import _task, say

    task = _task(args.task) if args.task else None
    sheet = int(args.sheet) if args.sheet is not None and args.sheet.isdigit() else args.sheet
    text = suggest_profile(args.source, task, sheet=sheet)
    if args.out is None:
        print(text, end="")
        return 0
    write_text_file(args.out, text, force=args.force, source=args.source)
    say(f"profile written to {args.out}: check every line, fill in each \"?\"")
    return 0


def cmd_sequence(args: argparse.Namespace) -> int:
    """``foretell sequence``: the stimulus sequences of an experiment."""
    from ..steps.sequence import make_sequences
    from .commands import _run, _task, _task_inputs, say

    task = _task(args.task)

    def step():
        return make_sequences(task, n_participants=args.participants, n_blocks=args.blocks,
                              trials_per_block=args.trials_per_block, burn_in=args.burn_in,
                              min_context_count=args.min_context_count, max_redraws=args.max_redraws,
                              seed=args.seed)

    result = _run(args, step, task=task, inputs=_task_inputs(task))
    say(f"{args.participants} sequence files in {Path(args.out) / 'sequences'}/")
    return 0


def profile_inputs(args: argparse.Namespace) -> list[str]:
    """Return the profile file of a run as an input (its SHA-256 goes into the manifest), or nothing."""
    profile = getattr(args, "profile", None)
    return [profile] if profile else []


def print_mapping(log) -> None:
    """Print what a profile and the file names mapped (``foretell check --profile``), when anything was."""
    if log.mapped:
        print("mapped:")
        for line in log.mapped:
            print(f"  {line}")
    if len(log.sources) > 1:
        print(f"files read: {len(log.sources)}")


def check_derivatives(args: argparse.Namespace) -> None:
    """Refuse, before any work, a ``--bids-derivatives`` folder that may not be written (see :func:`write_derivatives`)."""
    from ..bids import derivatives_folder
    from ..outputs import check_output_dir

    root = getattr(args, "bids_derivatives", None)
    if root:
        check_output_dir(derivatives_folder(root), force=args.force)


def write_derivatives(args: argparse.Namespace, result, *, inputs, manifest) -> None:
    """Write ``result`` as a BIDS derivatives dataset when ``--bids-derivatives`` was given."""
    from ..bids import write_bids_derivatives
    from .commands import say

    root = getattr(args, "bids_derivatives", None)
    if root:
        path = write_bids_derivatives(root, result, command=command_line(args), force=args.force,
                                      inputs=inputs, manifest=manifest)
        say(f"BIDS derivatives written to {path}/")


def command_line(args: argparse.Namespace) -> str:
    """Return the command as it could be typed again: the log first, then every option given."""
    import shlex

    words = ["foretell", args.command] + ([args.log] if getattr(args, "log", None) else [])
    for key, value in sorted(vars(args).items()):
        if key in ("command", "log") or value is None or value is False or value == [] or value == "":
            continue
        option = "--" + key.replace("_", "-")
        values = value if isinstance(value, list) else [value]
        words += [option] if value is True else [w for v in values for w in (option, str(v))]
    return shlex.join(words)


def write_text_file(path: str | Path, text: str, *, force: bool, source: str | Path) -> Path:
    """Return ``path`` after writing ``text`` there atomically; an existing file is replaced only with ``force``.

    Raises
    ------
    OutputError
        When ``path`` is the input, a folder, or exists without ``force``.
    """
    out = Path(path)
    if out.exists() and out.resolve() == Path(source).resolve():
        raise OutputError(f"{out}: is the input file; write the profile to another file")
    if out.is_dir():
        raise OutputError(f"{out}: is a folder; give a file name, e.g. --out lab.toml")
    if out.exists() and not force:
        raise OutputError(f"{out}: exists; pass --force to replace it")
    out.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".partial", dir=out.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)
        os.replace(tmp, out)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return out
