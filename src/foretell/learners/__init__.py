"""Learner models: predictive distributions of the next symbol from the stimuli seen so far.

Every learner is a frozen dataclass with ``depth``, ``next_proba(x, m)``,
``log_next_proba(x, m)`` and ``log_evidence(x, m, start=None)``; see
:class:`foretell.learners.base.Learner`.
"""

from .base import Learner
from .counting import Counting
from .mixture import TreeMixture, TreePosterior, default_leaf_prob
from .source import Source, TaskCounting

__all__ = ["Counting", "Learner", "Source", "TaskCounting", "TreeMixture", "TreePosterior",
           "default_leaf_prob"]
