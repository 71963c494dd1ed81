"""Absorbing chains: expected time to absorption, its variance, and where the cohort ends.

Discrete time (Kemeny & Snell 1960, "Finite Markov Chains", ch. 3): with P in canonical
form [[Q, R], [0, I]], the fundamental matrix N = (I - Q)^-1 holds the expected number of
cycles spent in each transient state, counting the starting cycle (N = I + Q + Q^2 + ...);
t = N 1, Var = (2N - I) t - t_sq, B = N R.

Continuous time (the phase-type moments of Neuts 1981, "Matrix-Geometric Solutions in
Stochastic Models"): with Q_TT the generator among transient states, N = (-Q_TT)^-1 holds
expected time in each transient state, t = N 1, E[T^2] = 2 N t so Var = 2 N t - t_sq, and
B = N Q_TA.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .checks import TOLERANCE, as_generator, as_start, as_stochastic
from .steady import closed_classes, describe_states


@dataclass(frozen=True, eq=False)
class Absorption:
    """Absorption results; rows follow `transient`, columns of `probabilities` follow `absorbing`.

    Times are in cycles for a discrete chain (counting the starting cycle) and in time
    units for a continuous one.
    """
    transient: np.ndarray  # state indices
    absorbing: np.ndarray  # state indices
    fundamental: np.ndarray  # (T, T): expected time in transient j when starting in i
    expected_time: np.ndarray  # (T,)
    time_variance: np.ndarray  # (T,)
    probabilities: np.ndarray  # (T, A): probability of ending in each absorbing state

    def _split(self, start) -> tuple[np.ndarray, np.ndarray]:
        vector = as_start(start, len(self.transient) + len(self.absorbing))
        return vector[self.transient], vector[self.absorbing]

    def expected_time_from(self, start) -> float:
        """Expected time to absorption for a start distribution over all states."""
        in_transient, _ = self._split(start)
        return float(in_transient @ self.expected_time)

    def probabilities_from(self, start) -> np.ndarray:
        """Probability of ending in each absorbing state for a start distribution."""
        in_transient, in_absorbing = self._split(start)
        return in_transient @ self.probabilities + in_absorbing


def _split_states(matrix: np.ndarray, absorbing_mask: np.ndarray, names) -> tuple:
    """Transient and absorbing indices; refuses chains where some state is never absorbed."""
    if not absorbing_mask.any():
        raise ValueError("the chain has no absorbing state")
    trapped = [c for c in closed_classes(matrix) if not absorbing_mask[c].all()]
    if trapped:
        listed = "; ".join(describe_states(c, names) for c in trapped)
        raise ValueError(f"states {listed} form a closed class with no absorbing state: "
                         "the time to absorption from them is infinite")
    return np.flatnonzero(~absorbing_mask), np.flatnonzero(absorbing_mask)


def absorption(matrix, names=None) -> Absorption:
    """Absorption analysis of a discrete chain (absorbing states: P[i, i] = 1)."""
    matrix = as_stochastic(matrix)
    if matrix.ndim != 2:
        raise ValueError("absorption needs one (S, S) matrix")
    transient, absorbing = _split_states(matrix, np.diagonal(matrix) >= 1 - TOLERANCE, names)
    among = matrix[np.ix_(transient, transient)]
    fundamental = np.linalg.inv(np.eye(len(transient)) - among)
    expected = fundamental.sum(axis=1)
    variance = (2 * fundamental - np.eye(len(transient))) @ expected - expected**2
    return Absorption(transient, absorbing, fundamental, expected, variance,
                      fundamental @ matrix[np.ix_(transient, absorbing)])


def absorption_continuous(generator, names=None) -> Absorption:
    """Absorption analysis of a continuous chain (absorbing states: a zero row of Q)."""
    generator = as_generator(generator)
    if generator.ndim != 2:
        raise ValueError("absorption_continuous needs one (S, S) generator")
    scale = max(1.0, float(np.abs(generator).max()))
    is_absorbing = np.abs(np.diagonal(generator)) <= TOLERANCE * scale
    transient, absorbing = _split_states(generator, is_absorbing, names)
    fundamental = np.linalg.inv(-generator[np.ix_(transient, transient)])
    expected = fundamental.sum(axis=1)
    variance = 2 * fundamental @ expected - expected**2
    return Absorption(transient, absorbing, fundamental, expected, variance,
                      fundamental @ generator[np.ix_(transient, absorbing)])
