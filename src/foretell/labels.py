"""Labels shared by every output table: the reserved label ``all``, id lengths, block and context labels."""

from __future__ import annotations

import numbers
from collections.abc import Sequence

from .errors import UsageError

ALL = "all"
"""The label of "everyone" (group column) and of "the whole session" (block and session columns)."""

MAX_LABEL_LENGTH = 64
"""The most characters of a participant or group id.

Ids name output files (``sub-<label>_..._events.tsv``) and file systems
allow 255 bytes per name; 64 characters leave room for the rest of the name
and for characters of several bytes. foretell's own choice.
"""

CONTEXT_SEP = "-"
"""Joins a context's symbol labels, oldest first."""

ROOT = "*"
"""The label of the empty context (no past: the root of a context tree)."""


def block_label(block: object) -> str:
    """Return a block (or session) number as a string.

    Parameters
    ----------
    block : int, float or str
        3 and 3.0 give "3"; strings pass through.

    Returns
    -------
    str

    Raises
    ------
    UsageError
        When ``block`` is neither a number nor a string.

    Examples
    --------
    >>> block_label(3.0), block_label("all")
    ('3', 'all')
    """
    if isinstance(block, str):
        return block
    if isinstance(block, bool) or not isinstance(block, numbers.Real):
        raise UsageError(f"a block or session label must be a number or a string, got {block!r}")
    value = float(block)
    return str(int(value)) if value.is_integer() else str(block)


def symbol_label_problem(label: object) -> str | None:
    """Return why ``label`` cannot be a symbol label (None when it can).

    Symbol labels are non-empty strings without the context separator, the
    root mark, whitespace or control characters, so that a context label can
    be parsed back.

    Parameters
    ----------
    label : object

    Returns
    -------
    str or None
    """
    if not isinstance(label, str) or not label or CONTEXT_SEP in label or label == ROOT \
            or ROOT in label or any(ch.isspace() or not ch.isprintable() for ch in label):
        return (f"symbol label {label!r} must be a non-empty string without "
                f"'{CONTEXT_SEP}', '{ROOT}', whitespace or control characters")
    return None


def context_label(symbols: Sequence[str], context: Sequence[int]) -> str:
    """Return a context as its symbol labels joined by '-', oldest first; the root is '*'.

    Parameters
    ----------
    symbols : sequence of str
        The alphabet.
    context : sequence of int
        Symbol indices, oldest first.

    Returns
    -------
    str

    Examples
    --------
    >>> context_label(["up", "down"], [0, 1]), context_label(["up", "down"], [])
    ('up-down', '*')
    """
    return CONTEXT_SEP.join(symbols[int(i)] for i in context) if len(context) else ROOT


def parse_context(label: str, symbols: Sequence[str]) -> tuple[int, ...]:
    """Return the symbol indices (oldest first) of a context label written by :func:`context_label`.

    Parameters
    ----------
    label : str
    symbols : sequence of str
        The alphabet.

    Returns
    -------
    tuple of int

    Raises
    ------
    UsageError
        When the label names a symbol that is not in ``symbols``.

    Examples
    --------
    >>> parse_context("up-down", ["up", "down"])
    (0, 1)
    """
    if label == ROOT:
        return ()
    index = {s: i for i, s in enumerate(symbols)}
    try:
        return tuple(index[s] for s in str(label).split(CONTEXT_SEP))
    except KeyError as err:
        raise UsageError(f"context label {label!r} names an unknown symbol {err.args[0]!r}") from None
