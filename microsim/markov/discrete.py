"""Discrete-time cohort traces: pi(n+1) = pi(n) P(n)."""
from __future__ import annotations

import numpy as np

from .checks import as_start, as_stochastic


def cohort_trace(start, matrices, n_cycles: int) -> np.ndarray:
    """The expected share of the cohort in each state at cycles 0..n_cycles, shape (n_cycles+1, S).

    `matrices` is one (S, S) transition matrix, or a stack (m, S, S) with m >= n_cycles
    whose row k moves the cohort from cycle k to k+1 (time-varying P: by cycle, or by
    attained age when the caller has already indexed the stack by age).
    """
    matrices = as_stochastic(matrices)
    if n_cycles < 0:
        raise ValueError(f"n_cycles must be >= 0, got {n_cycles}")
    if matrices.ndim not in (2, 3):
        raise ValueError(f"matrices: expected (S, S) or (m, S, S), got {matrices.shape}")
    if matrices.ndim == 3 and len(matrices) < n_cycles:
        raise ValueError(f"{len(matrices)} matrices given for {n_cycles} cycles")
    trace = np.empty((n_cycles + 1, matrices.shape[-1]))
    trace[0] = as_start(start, matrices.shape[-1])
    for k in range(n_cycles):
        step = matrices if matrices.ndim == 2 else matrices[k]
        trace[k + 1] = trace[k] @ step
    return trace


def n_step(matrix, n: int) -> np.ndarray:
    """The n-step transition matrix P^n (Chapman-Kolmogorov)."""
    matrix = as_stochastic(matrix)
    if matrix.ndim != 2 or n < 0:
        raise ValueError("n_step needs one (S, S) matrix and n >= 0")
    return np.linalg.matrix_power(matrix, n)
