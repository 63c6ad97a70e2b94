"""The parameters of learner models and of the choice rule: domain, fit bounds, start and scale.

One table, read by the learners' validation, the fitter, the simulator and
the command-line help, so a parameter's limits live in one place.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import UsageError


@dataclass(frozen=True)
class Param:
    """A model parameter: where it is defined, where the fitter looks for it, and how.

    ``domain`` is the interval of values that make sense ((low, high) with
    ``open_low`` / ``open_high`` saying whether an end is excluded); ``low`` and
    ``high`` are the fitter's bounds (inside the domain); ``start`` is the
    optimiser's first start and the value used when the parameter is neither
    fitted nor fixed; ``log_scale`` parameters are optimised as log(value)
    (they span orders of magnitude).
    """

    name: str
    role: str  # "choice" (the choice rule) or "learner"
    domain: tuple[float, float]
    open_low: bool
    open_high: bool
    low: float
    high: float
    start: float
    log_scale: bool
    meaning: str
    unit: str

    def contains(self, value: float) -> bool:
        """Return whether ``value`` is a finite number inside the domain."""
        lo, hi = self.domain
        ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)
        ok = ok and math.isfinite(value)
        return ok and (value > lo if self.open_low else value >= lo) and \
            (value < hi if self.open_high else value <= hi)

    def interval(self) -> str:
        """Return the domain written as an interval, e.g. '(0, inf)'."""
        lo, hi = self.domain
        return f"{'(' if self.open_low else '['}{lo:g}, {hi:g}{')' if self.open_high else ']'}"

    def check(self, value: float, who: str = "") -> float:
        """Return ``value`` as a float; raise UsageError naming ``who`` when it is outside the domain."""
        if not self.contains(value):
            label = f"{who} {self.name}".strip()
            raise UsageError(f"{label} must be a number in {self.interval()}, got {value!r}")
        return float(value)


PARAMS: dict[str, Param] = {p.name: p for p in (
    Param("inv_temp", "choice", (0.0, math.inf), True, True, 0.01, 50.0, 1.0, True,
          "inverse temperature of the softmax choice rule (1 = probability matching)", "no unit"),
    Param("lapse", "choice", (0.0, 1.0), False, False, 1e-4, 0.5, 0.05, True,
          "share of guesses made at random, whatever the prediction", "share of guesses"),
    Param("leak", "learner", (0.0, 1.0), False, True, 0.0, 0.95, 0.1, False,
          "share of every count forgotten after each trial", "share forgotten per trial"),
    Param("alpha", "learner", (0.0, math.inf), True, True, 0.01, 10.0, 0.5, True,
          "Dirichlet prior count per symbol (0.5: Krichevsky-Trofimov)", "prior count per symbol"),
)}
CHOICE_PARAMS = tuple(n for n, p in PARAMS.items() if p.role == "choice")
LEARNER_PARAMS = tuple(n for n, p in PARAMS.items() if p.role == "learner")
DEFAULT_ALPHA = PARAMS["alpha"].start
"""The learners' Dirichlet prior when alpha is not fitted (Krichevsky & Trofimov, 1981)."""


def describe_params() -> str:
    """Return one line per parameter: name, domain, fit bounds and meaning (for help texts)."""
    return "\n".join(f"  {p.name:<9} fitted in [{p.low:g}, {p.high:g}] ({p.meaning})"
                     for p in PARAMS.values())
