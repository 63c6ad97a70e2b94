"""The command line: parse, run a step, write, print; exit 0 ok, 1 bad input, 2 usage, 130/143 interrupted."""

from __future__ import annotations

import signal
import sys
from collections.abc import Sequence

from ..errors import ForetellError, InputError, UsageError

ALIASES = {"analyse": "analyze"}
"""Other spellings of a subcommand, accepted but not listed by ``--help``."""


class _Terminated(KeyboardInterrupt):
    """SIGTERM, turned into an interruption so that cleanup runs as for Ctrl-C."""


def _on_sigterm(signum, frame) -> None:  # noqa: ARG001 (signal handler signature)
    raise _Terminated()


def _spelled(argv: Sequence[str]) -> list[str]:
    """Return ``argv`` with an alias of the subcommand (its first word that is not an option) replaced."""
    words = list(argv)
    at = next((i for i, word in enumerate(words) if not word.startswith("-")), None)
    if at is not None and words[at] in ALIASES:
        words[at] = ALIASES[words[at]]
    return words


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``foretell`` command and return its exit status.

    Parameters
    ----------
    argv : sequence of str, optional
        The arguments after ``foretell`` (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        0 on success, 1 for bad input (one ``error:`` line per problem,
        naming file, line and column), 2 for a usage error, 130 when
        interrupted (Ctrl-C) and 143 when terminated (SIGTERM). Parse errors
        and ``--help`` exit through ``SystemExit`` as argparse does.
    """
    from .commands import COMMANDS, say, say_problems
    from .parser import build_parser

    args = build_parser().parse_args(_spelled(sys.argv[1:] if argv is None else argv))
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not the main thread: leave signals alone
        previous = None
    try:
        return COMMANDS[args.command](args)
    except InputError as err:
        say_problems(err)
        return 1
    except UsageError as err:
        say(f"foretell {args.command}: {err}")
        return 2
    except ForetellError as err:
        say(f"error: {err}")
        return 1
    except OSError as err:  # a file the checks above could not foresee (disk full, permissions)
        say(f"error: {err.filename or ''}: {err.strerror or err}")
        return 1
    except _Terminated:
        say("terminated: nothing was written (an existing output folder is unchanged)")
        return 128 + signal.SIGTERM
    except KeyboardInterrupt:
        say("interrupted: nothing was written (an existing output folder is unchanged)")
        return 130
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":
    sys.exit(main())
