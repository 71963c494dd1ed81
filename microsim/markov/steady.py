"""Steady states of discrete chains (pi P = pi) and continuous chains (pi Q = 0).

The steady state is unique when the chain has exactly one closed communicating class
(transient states then get share 0); a discrete chain's distribution also converges to it
only when that class is aperiodic (Kemeny & Snell 1960, "Finite Markov Chains"; Grinstead
& Snell 1997, "Introduction to Probability", ch. 11). Classes are the strongly connected
components of the transition graph (scipy.sparse.csgraph); the period of a class is the
gcd of level[u] + 1 - level[v] over its edges u -> v, with levels from a breadth-first
search (the classical method, e.g. Jarvis & Shier 1999, "Graph-theoretic analysis of
finite Markov chains"; cited from memory).
"""
from __future__ import annotations

from collections import deque
from math import gcd

import numpy as np
import scipy.sparse
from scipy.sparse.csgraph import connected_components

from .checks import as_generator, as_stochastic


class NoUniqueSteadyState(ValueError):
    """The chain has no single limiting distribution; the message says why.

    reason: "reducible" (several closed classes, listed in `classes`) or "periodic"
    (`period` > 1; `stationary` still holds the unique stationary vector, the long-run
    average share, though the distribution itself keeps cycling).
    """

    def __init__(self, message: str, reason: str, classes: list[np.ndarray],
                 period: int = 1, stationary: np.ndarray | None = None):
        super().__init__(message)
        self.reason = reason
        self.classes = classes
        self.period = period
        self.stationary = stationary


def _graph(matrix: np.ndarray) -> np.ndarray:
    """Edges i -> j (i != j) where a move is possible."""
    adjacency = matrix > 0
    np.fill_diagonal(adjacency, False)
    return adjacency


def communicating_classes(matrix) -> list[np.ndarray]:
    """The communicating classes of a transition or rate matrix, ordered by first state."""
    adjacency = _graph(np.asarray(matrix, dtype=float))
    count, labels = connected_components(scipy.sparse.csr_array(adjacency),
                                         directed=True, connection="strong")
    classes = [np.flatnonzero(labels == label) for label in range(count)]
    return sorted(classes, key=lambda members: members[0])


def closed_classes(matrix) -> list[np.ndarray]:
    """The classes no move leaves (an absorbing state is a closed class of one)."""
    adjacency = _graph(np.asarray(matrix, dtype=float))
    closed = []
    for members in communicating_classes(matrix):
        outside = np.ones(len(adjacency), dtype=bool)
        outside[members] = False
        if not adjacency[np.ix_(members, outside)].any():
            closed.append(members)
    return closed


def period(matrix, members) -> int:
    """The period of the communicating class `members` of a transition matrix."""
    members = np.asarray(members)
    inside = np.asarray(matrix, dtype=float)[np.ix_(members, members)] > 0
    level = np.full(len(members), -1)
    level[0] = 0
    queue = deque([0])
    while queue:
        here = queue.popleft()
        for there in np.flatnonzero(inside[here] & (level < 0)):
            level[there] = level[here] + 1
            queue.append(there)
    result = 0
    for u, v in np.argwhere(inside):
        result = gcd(result, int(abs(level[u] + 1 - level[v])))
    return result


def describe_states(members: np.ndarray, names) -> str:
    """A set of states in words: their names, each once (several expanded states can carry
    one model state's name), or their indices without names."""
    labels = dict.fromkeys(str(names[i]) if names is not None else str(i) for i in members)
    return "{" + ", ".join(labels) + "}"


def _solve_on(members: np.ndarray, balance: np.ndarray, size: int) -> np.ndarray:
    """Solve pi M = 0, sum(pi) = 1 on one closed class; zero elsewhere."""
    system = balance[np.ix_(members, members)].T.copy()
    system[-1] = 1.0
    right = np.zeros(len(members))
    right[-1] = 1.0
    pi = np.zeros(size)
    pi[members] = np.linalg.solve(system, right)
    return pi


def _single_closed_class(matrix: np.ndarray, names) -> np.ndarray:
    closed = closed_classes(matrix)
    if len(closed) > 1:
        listed = ", ".join(describe_states(c, names) for c in closed)
        raise NoUniqueSteadyState(
            f"no unique steady state: the chain has {len(closed)} closed classes ({listed}); "
            "each has its own steady state and where the cohort ends depends on the start "
            "(use the cohort trace, or absorption probabilities)",
            reason="reducible", classes=closed)
    return closed[0]


def steady_state(matrix, names=None, periodic_ok: bool = False) -> np.ndarray:
    """The steady state of a transition matrix P: pi P = pi, sum(pi) = 1.

    Raises NoUniqueSteadyState when there are several closed classes, or when the closed
    class is periodic (unless `periodic_ok`: then the stationary vector is returned, which
    is the long-run average share, not a limit). `names` only label the message.
    """
    matrix = as_stochastic(matrix)
    members = _single_closed_class(matrix, names)
    pi = _solve_on(members, matrix - np.eye(len(matrix)), len(matrix))
    cycle = period(matrix, members)
    if cycle > 1 and not periodic_ok:
        raise NoUniqueSteadyState(
            f"the closed class {describe_states(members, names)} is periodic with period {cycle}: "
            "the distribution keeps cycling and does not converge. A stationary vector (the "
            "long-run average share) still exists: read it from this error's `stationary` "
            "or pass periodic_ok=True",
            reason="periodic", classes=[members], period=cycle, stationary=pi)
    return pi


def steady_state_continuous(generator, names=None) -> np.ndarray:
    """The steady state of a generator Q: pi Q = 0, sum(pi) = 1.

    Continuous-time chains have no periodicity, so only several closed classes are refused.
    """
    generator = as_generator(generator)
    members = _single_closed_class(generator, names)
    return _solve_on(members, generator, len(generator))
