"""Argument checks shared by every public entry: counts, options, seeds and child random streams.

One home for "a whole number >= low", "one of these options" and the seed
recipe, so that every step says the same thing in the same words (the way
scikit-learn keeps its checks in ``sklearn/utils/validation.py``).
"""

from __future__ import annotations

import hashlib
import numbers
from collections.abc import Iterable
from pathlib import Path

import numpy as np

from .errors import UsageError

SeedLike = "int | numpy.random.Generator"


def check_count(name: str, value: object, low: int = 1) -> int:
    """Return ``value`` as an int after checking that it is a whole number >= ``low``.

    Parameters
    ----------
    name : str
        The argument's name, as the caller knows it (used in the message).
    value : object
        What was given. ``bool`` is refused although it is an ``int``.
    low : int, default 1
        The smallest allowed value.

    Returns
    -------
    int

    Raises
    ------
    UsageError
        When ``value`` is not a whole number or is below ``low``.

    Examples
    --------
    >>> check_count("n_jobs", 2)
    2
    """
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        else:
            raise UsageError(f"{name} must be a whole number >= {low}, got {value!r}")
    if value < low:
        raise UsageError(f"{name} must be a whole number >= {low}, got {value}")
    return int(value)


def check_option(name: str, value: object, options: Iterable[object]) -> object:
    """Return ``value`` after checking that it is one of ``options``.

    Parameters
    ----------
    name : str
        The argument's name (used in the message).
    value : object
        What was given.
    options : iterable
        The allowed values, in the order the message lists them.

    Returns
    -------
    object
        ``value`` unchanged.

    Raises
    ------
    UsageError
        ``"<name> must be one of a, b, c; got 'x'"``, with a "did you mean"
        when a close option exists.

    Examples
    --------
    >>> check_option("criterion", "bic", ("bic", "cv"))
    'bic'
    """
    options = tuple(options)
    if value in options:
        return value
    from difflib import get_close_matches

    listed = ", ".join(map(str, options))
    close = get_close_matches(str(value), [str(o) for o in options], n=1) if isinstance(value, str) else []
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    raise UsageError(f"{name} must be one of {listed}; got {value!r}{hint}")


def check_n_jobs(value: object) -> int:
    """Return a joblib ``n_jobs`` value: a positive count, or -1 for all cores (-2 all but one, ...).

    Raises
    ------
    UsageError
        For 0, a non-integer, or a bool.
    """
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise UsageError(f"n_jobs must be a whole number (1, 2, ... or -1 for all cores), got {value!r}")
    if value == 0:
        raise UsageError("n_jobs = 0 cannot run anything: give 1, 2, ... or -1 for all cores")
    return int(value)


def check_seed(seed: object) -> int:
    """Return the integer seed of a run.

    Parameters
    ----------
    seed : int or numpy.random.Generator
        A whole number >= 0, or a Generator from which one seed is drawn
        (this advances the Generator once).

    Returns
    -------
    int
        A seed for :func:`child_rng` and :func:`child_seed`.

    Raises
    ------
    UsageError
        For a negative number, a bool, or anything else.
    """
    if isinstance(seed, np.random.Generator):
        return int(seed.integers(0, 2**63 - 1))
    return check_count("seed", seed, 0)


def _label_key(label: object) -> int:
    """Return a stable 64-bit key of one label: non-negative ints as they are, other labels hashed."""
    if isinstance(label, numbers.Integral) and not isinstance(label, bool) and label >= 0:
        return int(label)
    digest = hashlib.sha256(f"{type(label).__name__}:{label}".encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "little")


def child_seed(seed: int, *labels: object) -> np.random.SeedSequence:
    """Return the child SeedSequence of ``seed`` keyed by ``labels``.

    The one recipe for every random stream in foretell: a stream is keyed by
    what it is for (a participant's label, a model id, a metric, a unit), never
    by the position of the work, so results do not depend on order, on
    ``n_jobs`` or on the backend. Labels that are non-negative integers are
    used as they are; any other label enters as the first 8 bytes of the
    SHA-256 of its type and text.

    Parameters
    ----------
    seed : int
        The run's seed (:func:`check_seed`).
    *labels : object
        What the stream is for, outermost first.

    Returns
    -------
    numpy.random.SeedSequence

    Examples
    --------
    >>> a = child_seed(0, "p01", "count-1").generate_state(1)
    >>> b = child_seed(0, "p01", "count-1").generate_state(1)
    >>> bool((a == b).all())
    True
    """
    return np.random.SeedSequence(int(seed), spawn_key=tuple(_label_key(label) for label in labels))


def child_rng(seed: int, *labels: object) -> np.random.Generator:
    """Return a Generator on :func:`child_seed` ``(seed, *labels)``."""
    return np.random.default_rng(child_seed(seed, *labels))


def child_int(seed: int, *labels: object) -> int:
    """Return a 32-bit integer seed from :func:`child_seed` (for libraries that take an int seed)."""
    return int(child_seed(seed, *labels).generate_state(1)[0])


def check_path(name: str, value: object) -> Path:
    """Return ``value`` as a Path; refuse anything that is not a str or a path.

    Raises
    ------
    UsageError
        For lists, numbers, None and other objects.
    """
    if isinstance(value, (str, Path)) and str(value).strip():
        return Path(value)
    raise UsageError(f"{name} must be a file or folder path, got {value!r}")
