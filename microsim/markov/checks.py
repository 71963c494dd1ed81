"""Shape and validity checks for the arrays the closed-form side reads.

These arrays come from binding, which has already refused bad user input, so a failure
here is a programming error: plain `ValueError`, naming the row or entry that is wrong.
"""
from __future__ import annotations

import numpy as np

TOLERANCE = 1e-9
"""Slack allowed for rounding in probabilities, row sums and generator rows."""


def _where(index: tuple[int, ...]) -> str:
    return "[" + ", ".join(str(int(i)) for i in index) + "]"


def as_square(matrices, name: str) -> np.ndarray:
    """A float array whose last two axes are square, with finite entries."""
    array = np.asarray(matrices, dtype=float)
    if array.ndim < 2 or array.shape[-1] != array.shape[-2]:
        raise ValueError(f"{name}: expected square matrices (..., S, S), got shape {array.shape}")
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{name}: entries must be finite")
    return array


def as_probability_rows(rows, name: str, tol: float = TOLERANCE) -> np.ndarray:
    """Rows (..., S) of probabilities: entries >= -tol and each row summing to 1 within tol."""
    array = np.asarray(rows, dtype=float)
    if array.ndim < 1 or not np.all(np.isfinite(array)):
        raise ValueError(f"{name}: probability rows must be finite, got shape {array.shape}")
    if array.size and array.min() < -tol:
        at = np.unravel_index(np.argmin(array), array.shape)
        raise ValueError(f"{name}: negative probability {array[at]:.3g} at {_where(at)}")
    error = np.abs(array.sum(axis=-1) - 1.0)
    if error.size and error.max() > tol:
        at = np.unravel_index(np.argmax(error), error.shape)
        raise ValueError(
            f"{name}: row {_where(at)} sums to {array[at].sum():.12g}, not 1")
    return array


def as_stochastic(matrices, name: str = "transition matrix", tol: float = TOLERANCE) -> np.ndarray:
    """Square, row-stochastic matrix or stack of them."""
    return as_probability_rows(as_square(matrices, name), name, tol)


def as_generator(matrices, name: str = "rate matrix", tol: float = TOLERANCE) -> np.ndarray:
    """Square generator(s): off-diagonal rates >= 0 and rows summing to 0 (within tol x scale)."""
    array = as_square(matrices, name)
    size = array.shape[-1]
    off = array * (1.0 - np.eye(size))
    if off.size and off.min() < -tol:
        at = np.unravel_index(np.argmin(off), off.shape)
        raise ValueError(f"{name}: negative rate {off[at]:.3g} at {_where(at)}")
    scale = max(1.0, float(np.abs(array).max(initial=0.0)))
    error = np.abs(array.sum(axis=-1))
    if error.size and error.max() > tol * scale:
        at = np.unravel_index(np.argmax(error), error.shape)
        raise ValueError(
            f"{name}: row {_where(at)} sums to {array[at].sum():.3g}, not 0 "
            "(the diagonal must be minus the sum of the row's rates)")
    return array


def as_start(start, size: int, name: str = "start") -> np.ndarray:
    """Non-negative start vector over `size` states (shares; a cohort size also works)."""
    vector = np.asarray(start, dtype=float)
    if vector.shape != (size,):
        raise ValueError(f"{name}: expected shape ({size},), got {vector.shape}")
    if not np.all(np.isfinite(vector)) or vector.min(initial=0.0) < 0:
        raise ValueError(f"{name}: entries must be finite and >= 0")
    return vector


def as_pieces(generators, breaks) -> tuple[np.ndarray, np.ndarray]:
    """Piecewise-constant generators: stack (K, S, S) and breaks (K+1,), strictly increasing.

    A single (S, S) generator is one piece. The last break may be infinite.
    """
    stack = as_generator(generators, "generators")
    if stack.ndim == 2:
        stack = stack[None]
    if stack.ndim != 3:
        raise ValueError(f"generators: expected (S, S) or (K, S, S), got {stack.shape}")
    edges = np.asarray(breaks, dtype=float)
    if edges.shape != (len(stack) + 1,):
        raise ValueError(
            f"breaks: expected {len(stack) + 1} values for {len(stack)} generator(s), "
            f"got shape {edges.shape}")
    if not np.all(np.isfinite(edges[:-1])) or np.isnan(edges[-1]) or np.any(np.diff(edges) <= 0):
        raise ValueError("breaks: must be strictly increasing and finite (the last may be inf)")
    return stack, edges
