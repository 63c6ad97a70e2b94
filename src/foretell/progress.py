"""Progress of the steps on stderr: a bar on a terminal, plain one-line messages for batch jobs."""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import TextIO

from tqdm import tqdm

PREFIX = "[foretell]"
"""The start of every plain progress line."""

LINE_SECONDS = 10.0
"""Plain lines come at most this often (the last one of a stage always comes)."""

FALLBACK_WIDTH = 80
"""The bar's width on a terminal that reports none."""


def shown(progress: bool | None, stream: TextIO | None = None) -> str | None:
    """Return how progress is shown: "bar", "lines" or None (not at all).

    Parameters
    ----------
    progress : bool or None
        True: always (a bar on a terminal, plain lines otherwise); None: a
        bar on a terminal, nothing otherwise (the library's default); False: never.
    stream : file, optional
        Where it goes (default ``sys.stderr``).

    Returns
    -------
    str or None
    """
    if progress is False:
        return None
    terminal = (stream or sys.stderr).isatty()
    if terminal:
        return "bar"
    return "lines" if progress else None


def _width(stream: TextIO) -> int:
    """Return the terminal's width in characters, or :data:`FALLBACK_WIDTH` when it reports none."""
    try:
        columns = os.get_terminal_size(stream.fileno()).columns
    except (AttributeError, OSError, ValueError):
        columns = 0
    return columns if columns > 0 else FALLBACK_WIDTH


class Stage:
    """The progress of one stage of a step: ``done`` of ``total`` units, shown as :func:`shown` says.

    Call :meth:`advance` as units finish; :meth:`detail` names what is under way.
    """

    def __init__(self, step: str, what: str, total: int, mode: str | None, *, eta: bool, every: float,
                 stream: TextIO) -> None:
        self.step, self.what, self.total, self.mode, self.stream = step, what, int(total), mode, stream
        self.every = every
        self.done, self._detail = 0, ""
        self._last = time.monotonic()
        self._bar = None
        if mode == "bar":
            left = "<{remaining}" if eta else ""
            self._bar = tqdm(total=self.total, desc=step, unit=what, file=stream, ncols=_width(stream), leave=False,
                             bar_format="{desc}: {n_fmt}/{total_fmt} {unit} |{bar}| [{elapsed}" + left + "{postfix}]")

    def detail(self, text: str) -> None:
        """Name what is under way (beside the bar; in the next plain line)."""
        self._detail = text
        if self._bar is not None:
            self._bar.set_postfix_str(text)

    def advance(self, n: int = 1) -> None:
        """Count ``n`` more units done."""
        self.done += n
        if self._bar is not None:
            self._bar.update(n)
            return
        now = time.monotonic()
        if self.mode == "lines" and (self.done >= self.total or now - self._last >= self.every):
            self._last = now
            where = f" ({self._detail})" if self._detail else ""
            print(f"{PREFIX} {self.step}: {self.done}/{self.total} {self.what}{where}", file=self.stream, flush=True)

    def close(self) -> None:
        """Clear the bar."""
        if self._bar is not None:
            self._bar.close()


@contextmanager
def stage(step: str, what: str, total: int, progress: bool | None, *, eta: bool = True,
          every: float = LINE_SECONDS, stream: TextIO | None = None) -> Iterator[Stage]:
    """Yield the :class:`Stage` of ``total`` units of a step, closed on leaving.

    Parameters
    ----------
    step : str
        The step's name ("fit", "rt", "analysis", ...).
    what : str
        The units, counted in the past tense ("participants fitted", "models sampled").
    total : int
    progress : bool or None
        As :func:`shown`.
    eta : bool, default True
        Show the bar's estimate of the time left: only where the units take
        about the same time (participants), never for steps or models.
    every : float, default :data:`LINE_SECONDS`
        Seconds between plain lines (0: one line per :meth:`Stage.advance`).
    stream : file, optional
        Default ``sys.stderr``.

    Yields
    ------
    Stage

    Examples
    --------
    >>> with stage("fit", "participants fitted", 3, False) as bar:
    ...     bar.advance(3)
    """
    stream = stream or sys.stderr
    bar = Stage(step, what, total, shown(progress, stream), eta=eta, every=every, stream=stream)
    try:
        yield bar
    finally:
        bar.close()
