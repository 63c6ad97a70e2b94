"""Small text helpers shared by every message and printed table: counts and numbers."""

from __future__ import annotations

import re

_SIBILANT = re.compile(r"(s|x|z|ch|sh)$")
_CONSONANT_Y = re.compile(r"[^aeiou]y$")


def plural(n: int, noun: str, plural: str | None = None) -> str:
    """Return the count ``n`` followed by ``noun`` in the right number.

    Parameters
    ----------
    n : int
    noun : str
        The singular.
    plural : str, optional
        The plural, when it is not the regular English one ("guess" ->
        "guesses", "entry" -> "entries", "trial" -> "trials").

    Returns
    -------
    str

    Examples
    --------
    >>> plural(1, "context"), plural(2, "guess"), plural(0, "entry")
    ('1 context', '2 guesses', '0 entries')
    """
    if n == 1:
        return f"{n} {noun}"
    if plural is None:
        if _SIBILANT.search(noun):
            plural = noun + "es"
        elif _CONSONANT_Y.search(noun):
            plural = noun[:-1] + "ies"
        else:
            plural = noun + "s"
    return f"{n} {plural}"


def number(value: float, spec: str = ".4f") -> str:
    """Return ``value`` formatted with ``spec``, never as a negative zero.

    Parameters
    ----------
    value : float
    spec : str, default ".4f"
        A format specification (:func:`format`).

    Returns
    -------
    str

    Examples
    --------
    >>> number(-0.00001), number(-0.5, ".1f")
    ('0.0000', '-0.5')
    """
    text = format(value, spec)
    if text.startswith("-") and float(text) == 0.0:
        return text[1:]
    return text
