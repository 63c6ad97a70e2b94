"""The exact entropy rate of a context-tree source, from its chain on pasts of maximal depth."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components
from scipy.sparse.linalg import spsolve


@dataclass(frozen=True)
class RecurrentClass:
    """One closed class of the chain on pasts of maximal depth and its entropy rate.

    Attributes
    ----------
    pasts : tuple of tuple of int
        The states (symbol indices, oldest first).
    stationary : numpy.ndarray
        Their stationary probabilities within the class.
    entropy_rate_bits : float
        The class's entropy rate in bits per symbol.
    """

    pasts: tuple[tuple[int, ...], ...]
    stationary: np.ndarray
    entropy_rate_bits: float


@dataclass(frozen=True)
class EntropyRate:
    """Entropy rate of a task's source, in bits per symbol.

    Attributes
    ----------
    bits : float
        The rate when the chain on pasts has a single recurrent class (the
        rate then does not depend on the start); otherwise ``nan``.
    classes : tuple of RecurrentClass
        Each recurrent class with its own rate.
    """

    bits: float
    classes: tuple[RecurrentClass, ...]

    @property
    def irreducible(self) -> bool:
        """True when the source has one recurrent class."""
        return len(self.classes) == 1


def chain_entropy_rate(states: np.ndarray, trans: sparse.csr_matrix, h_state: np.ndarray) -> EntropyRate:
    """Return the entropy rate of a finite chain whose state s emits a symbol with entropy ``h_state[s]``.

    H = sum_s pi(s) H(P(. | s)) over pasts s of maximal depth D, with pi the
    stationary distribution of the chain s -> s[1:] + a (Cover & Thomas,
    2006, Theorem 4.2.4, applied to the D-th order chain). Recurrent classes
    are the strongly connected components with no edge leaving them; each
    gets its own rate.

    Parameters
    ----------
    states : numpy.ndarray, shape (n, D)
        The pasts, one per row (oldest first).
    trans : scipy.sparse.csr_matrix, shape (n, n)
        Transition probabilities between the pasts.
    h_state : numpy.ndarray, shape (n,)
        Entropy in bits of the next symbol after each past.

    Returns
    -------
    EntropyRate

    References
    ----------
    Cover, T. M., & Thomas, J. A. (2006). Elements of Information Theory (2nd ed.). Wiley.
    """
    classes = [RecurrentClass(pasts=tuple(tuple(int(v) for v in states[i]) for i in members), stationary=pi,
                              entropy_rate_bits=float(pi @ h_state[members]))
               for members, pi in _recurrent_classes(trans)]
    bits = classes[0].entropy_rate_bits if len(classes) == 1 else math.nan
    return EntropyRate(bits=bits, classes=tuple(classes))


def stationary_mean(trans: sparse.csr_matrix, per_state: np.ndarray) -> float:
    """Return the long-run mean sum_s pi(s) v(s) of a value of the states of an irreducible chain.

    pi is the stationary distribution (as in :func:`chain_entropy_rate`);
    ``nan`` when the chain has more than one recurrent class (the mean
    then depends on the start).

    Parameters
    ----------
    trans : scipy.sparse.csr_matrix, shape (n, n)
        Transition probabilities between the states.
    per_state : numpy.ndarray, shape (n,)
        The value v(s) of each state.

    Returns
    -------
    float
    """
    classes = _recurrent_classes(trans)
    if len(classes) != 1:
        return math.nan
    members, pi = classes[0]
    return float(pi @ np.asarray(per_state, dtype=float)[members])


def _recurrent_classes(trans: sparse.csr_matrix) -> list[tuple[np.ndarray, np.ndarray]]:
    """Return (members, stationary distribution) of each recurrent class: a strong component no edge leaves."""
    n_comp, labels = connected_components(trans, directed=True, connection="strong")
    coo = trans.tocoo()
    leaving = np.zeros(n_comp, dtype=bool)
    cross = labels[coo.row] != labels[coo.col]
    leaving[labels[coo.row[cross]]] = True
    out = []
    for comp in np.flatnonzero(~leaving):
        members = np.flatnonzero(labels == comp)
        out.append((members, _stationary(trans[members][:, members])))
    return out


def entropy_bits(probs: np.ndarray) -> np.ndarray:
    """Return the Shannon entropy in bits of each row, -sum p log2 p, with 0 log 0 = 0 (Shannon, 1948).

    Parameters
    ----------
    probs : array_like, shape (..., m)

    Returns
    -------
    numpy.ndarray, shape (...)
    """
    p = np.asarray(probs, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(p > 0, -p * np.log2(p), 0.0)
    return terms.sum(axis=-1) + 0.0  # -p log p of p = 1 is a negative zero


def _stationary(trans: sparse.csr_matrix) -> np.ndarray:
    """Return the stationary distribution of an irreducible stochastic matrix.

    Solves pi (P - I) = 0 with one balance equation replaced by sum(pi) = 1
    (a standard way to make the system non-singular; common practice).
    """
    n = trans.shape[0]
    if n == 1:
        return np.ones(1)
    a = (trans.T - sparse.identity(n, format="csr")).tolil()
    a[n - 1, :] = np.ones(n)
    b = np.zeros(n)
    b[-1] = 1.0
    pi = spsolve(a.tocsc(), b)
    pi = np.clip(np.atleast_1d(pi), 0.0, None)
    return pi / pi.sum()
