"""Continuous-time chains: generators and transient distributions pi(t) = pi(0) exp(Q t)."""
from __future__ import annotations

import numpy as np
import scipy.linalg
import scipy.sparse
import scipy.sparse.linalg

from .checks import as_pieces, as_square, as_start

DENSE_LIMIT = 200
"""Chains with more states than this use sparse exp(Q t) v products instead of full exp(Q t)."""


def rate_matrix(rates) -> np.ndarray:
    """The generator Q from off-diagonal rates: same off-diagonal, diagonal = minus row sums.

    `rates[i, j]` is the rate of moving i -> j per time unit; its diagonal must be zero
    (the diagonal of Q is computed, never given).
    """
    rates = as_square(rates, "rates")
    size = rates.shape[-1]
    if np.any(np.diagonal(rates, axis1=-2, axis2=-1) != 0):
        raise ValueError("rates: the diagonal must be zero; it is computed as minus the row sum")
    if rates.min(initial=0.0) < 0:
        raise ValueError("rates: rates must be >= 0")
    generator = rates.copy()
    diagonal = np.arange(size)
    generator[..., diagonal, diagonal] = -rates.sum(axis=-1)
    return generator


class _Propagator:
    """Moves a distribution forward by dt under one generator; reuses exp(Q dt) for repeated steps.

    Small chains use the full exponential (scipy.linalg.expm); large ones use
    scipy.sparse.linalg.expm_multiply (Al-Mohy & Higham 2011, "Computing the action of the
    matrix exponential"), which never forms exp(Q dt).
    """

    def __init__(self, dense_limit: int):
        self.dense_limit = dense_limit
        self.exponentials: dict[tuple[int, float], np.ndarray] = {}
        self.sparse: dict[int, scipy.sparse.csr_array] = {}

    def advance(self, pi: np.ndarray, generator: np.ndarray, piece: int, dt: float) -> np.ndarray:
        if dt == 0:
            return pi
        if len(pi) > self.dense_limit:
            if piece not in self.sparse:
                self.sparse[piece] = scipy.sparse.csr_array(generator.T)
            return scipy.sparse.linalg.expm_multiply(self.sparse[piece] * dt, pi)
        key = (piece, float(f"{dt:.12e}"))  # steps equal to 13 digits share one exp(Q dt)
        if key not in self.exponentials:
            self.exponentials[key] = scipy.linalg.expm(generator * dt)
        return pi @ self.exponentials[key]


def transient(start, generator, times, dense_limit: int = DENSE_LIMIT) -> np.ndarray:
    """The distribution over states at each of `times` (sorted, >= 0), shape (len(times), S)."""
    return transient_piecewise(start, generator, (0.0, np.inf), times, dense_limit)


def transient_piecewise(start, generators, breaks, times,
                        dense_limit: int = DENSE_LIMIT) -> np.ndarray:
    """Transient distribution under a piecewise-constant generator Q(t).

    `generators[k]` holds on [breaks[k], breaks[k+1]); the cohort is at `start` at time
    breaks[0]; `times` are sorted and lie within [breaks[0], breaks[-1]].
    """
    stack, edges = as_pieces(generators, breaks)
    pi = as_start(start, stack.shape[-1])
    times = np.asarray(times, dtype=float)
    if times.ndim != 1 or np.any(np.diff(times) < 0):
        raise ValueError("times: expected a sorted 1-D array")
    if times.size and (times[0] < edges[0] or times[-1] > edges[-1]):
        raise ValueError(f"times: must lie within [{edges[0]}, {edges[-1]}]")
    propagator = _Propagator(dense_limit)
    distributions = np.empty((len(times), len(pi)))
    now, piece = edges[0], 0
    for row, time in enumerate(times):
        while piece < len(stack) - 1 and time >= edges[piece + 1]:
            pi = propagator.advance(pi, stack[piece], piece, edges[piece + 1] - now)
            now, piece = edges[piece + 1], piece + 1
        pi = propagator.advance(pi, stack[piece], piece, time - now)
        now = time
        distributions[row] = pi
    return distributions
