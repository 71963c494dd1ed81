"""Exact expected discounted outcomes of a continuous-time chain.

The expected discounted time in each state, x = integral pi(t) e^{-delta t} dt with
delta = ln(1 + d) for an effective rate d per time unit, comes from one exponential of an
augmented (block) matrix (Van Loan 1978, "Computing integrals involving the matrix
exponential", IEEE Trans Automatic Control): with A = Q - delta I,

    exp([[A^T, pi^T], [0, 0]] T) = [[exp(A^T T), integral_0^T exp(A^T s) ds pi^T], [0, 1]].

State values are then x v, and one-off transition values integral pi_i(t) q_ij c_ij
e^{-delta t} dt are x_i sum_j q_ij c_ij. Discounting starts at the first break.
"""
from __future__ import annotations

import numpy as np
import scipy.linalg
import scipy.sparse
import scipy.sparse.linalg

from .checks import as_pieces, as_start
from .continuous import DENSE_LIMIT


def _piece(pi: np.ndarray, generator: np.ndarray, delta: float, duration: float,
           dense_limit: int) -> tuple[np.ndarray, np.ndarray]:
    """Discounted occupancy over one piece, and the (undiscounted) distribution at its end."""
    size = len(pi)
    shifted = generator.T - delta * np.eye(size)
    if np.isinf(duration):
        if delta <= 0:
            raise ValueError("an infinite horizon needs a discount rate > 0; for undiscounted "
                             "expected times use absorption_continuous")
        return np.linalg.solve(-shifted, pi), np.zeros(size)
    augmented = np.zeros((size + 1, size + 1))
    augmented[:size, :size] = shifted
    augmented[:size, size] = pi
    columns = np.zeros((size + 1, 2))
    columns[:size, 0], columns[size, 1] = pi, 1.0
    if size > dense_limit:
        moved = scipy.sparse.linalg.expm_multiply(
            scipy.sparse.csr_array(augmented) * duration, columns)
    else:
        moved = scipy.linalg.expm(augmented * duration) @ columns
    return moved[:size, 1], moved[:size, 0] * np.exp(delta * duration)


def occupancy(start, generators, breaks, discount: float = 0.0,
              dense_limit: int = DENSE_LIMIT) -> np.ndarray:
    """Expected discounted time in each state during each piece, shape (K, S).

    `generators[k]` holds on [breaks[k], breaks[k+1]) (one (S, S) generator with breaks
    (0, T) is the constant case; the last break may be inf when discount > 0).
    """
    stack, edges = as_pieces(generators, breaks)
    pi = as_start(start, stack.shape[-1])
    if discount <= -1:
        raise ValueError(f"discount rate must be > -1, got {discount}")
    delta = np.log1p(discount)
    result = np.empty((len(stack), len(pi)))
    for k, generator in enumerate(stack):
        time_in, pi_next = _piece(pi, generator, delta, edges[k + 1] - edges[k], dense_limit)
        result[k] = np.exp(-delta * (edges[k] - edges[0])) * time_in
        pi = pi_next
    return result


def continuous_value(start, generators, breaks, values, discount: float = 0.0) -> float:
    """Expected discounted total of per-time-unit state values; `values` (S,) or (K, S).

    An event that leaves the state unchanged, at rate e_i with value c, is valued by
    passing values e * c.
    """
    time_in = occupancy(start, generators, breaks, discount)
    values = np.broadcast_to(np.asarray(values, dtype=float), time_in.shape)
    return float(np.sum(time_in * values))


def continuous_transition_value(start, generators, breaks, one_off,
                                discount: float = 0.0) -> float:
    """Expected discounted total of one-off values c[i, j] per i -> j move; (S, S) or (K, S, S)."""
    time_in = occupancy(start, generators, breaks, discount)
    stack, _ = as_pieces(generators, breaks)
    off_diagonal = stack * (1 - np.eye(stack.shape[-1]))
    flows = (off_diagonal * np.asarray(one_off, dtype=float)).sum(axis=-1)
    return float(np.sum(time_in * flows))
