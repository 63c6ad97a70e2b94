"""Labels shared by every output table: the reserved label ``all``, block labels, context labels."""

from __future__ import annotations

from collections.abc import Sequence

ALL = "all"
"""The label of "everyone" (group column) and of "the whole session" (block and session columns)."""

CONTEXT_SEP = "-"
"""Joins a context's symbol labels, oldest first."""

ROOT = "*"
"""The label of the empty context (no past: the root of a context tree)."""


def block_label(block: object) -> str:
    """Return a block (or session) number as a string: 3 and 3.0 give "3"; strings pass through."""
    if isinstance(block, str):
        return block
    value = float(block)
    return str(int(value)) if value.is_integer() else str(block)


def symbol_label_problem(label: object) -> str | None:
    """Return why ``label`` cannot be a symbol label (None when it can).

    Symbol labels are non-empty strings without the context separator, the
    root mark or whitespace, so that a context label can be parsed back.
    """
    if not isinstance(label, str) or not label or CONTEXT_SEP in label or label == ROOT \
            or ROOT in label or any(ch.isspace() or not ch.isprintable() for ch in label):
        return (f"symbol label {label!r} must be a non-empty string without "
                f"'{CONTEXT_SEP}', '{ROOT}', whitespace or control characters")
    return None


def context_label(symbols: Sequence[str], context: Sequence[int]) -> str:
    """Return a context (symbol indices, oldest first) as labels joined by '-'; the root is '*'."""
    return CONTEXT_SEP.join(symbols[int(i)] for i in context) if len(context) else ROOT


def parse_context(label: str, symbols: Sequence[str]) -> tuple[int, ...]:
    """Return the symbol indices (oldest first) of a context label written by :func:`context_label`."""
    if label == ROOT:
        return ()
    index = {s: i for i, s in enumerate(symbols)}
    try:
        return tuple(index[s] for s in label.split(CONTEXT_SEP))
    except KeyError as err:
        raise ValueError(f"context label {label!r} names an unknown symbol {err.args[0]!r}") from None
