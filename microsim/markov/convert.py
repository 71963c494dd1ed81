"""Conversions between rates and probabilities, and between cycle lengths.

Changing the cycle of a transition matrix follows Chhatwal, Jayasuriya & Elbasha (2016),
"Changing cycle lengths in state-transition models: challenges and solutions" (Medical
Decision Making): a whole multiple is a matrix power; a fraction needs a matrix root,
which may not be a valid transition matrix (negative or complex entries), so the result is
checked and, only when asked, regularised by projecting each bad row onto the probability
simplex (Kreinin & Sidelnikova 2001, "Regularization algorithms for transition matrices",
Algo Research Quarterly).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.linalg

from .checks import TOLERANCE, as_generator, as_stochastic


def rate_to_probability(rate, time):
    """Probability of at least one event in `time` at a constant `rate`: 1 - exp(-rate time)."""
    rate, time = np.asarray(rate, dtype=float), np.asarray(time, dtype=float)
    if np.any(rate < 0) or np.any(time < 0):
        raise ValueError("rate and time must be >= 0")
    return -np.expm1(-rate * time)


def probability_to_rate(probability, time):
    """The constant rate giving `probability` within `time`: -ln(1 - p) / time."""
    probability, time = np.asarray(probability, dtype=float), np.asarray(time, dtype=float)
    if np.any(probability < 0) or np.any(probability >= 1) or np.any(time <= 0):
        raise ValueError("probability must be in [0, 1) and time > 0")
    return -np.log1p(-probability) / time


def probabilities_from_rates(generator, cycle: float) -> np.ndarray:
    """The exact transition matrix of one cycle for a generator Q: exp(Q cycle).

    Competing risks are handled exactly, including several moves within one cycle.
    A stack (..., S, S) of generators gives a stack of matrices.
    """
    generator = as_generator(generator)
    if cycle < 0:
        raise ValueError("cycle must be >= 0")
    return scipy.linalg.expm(generator * cycle)


def naive_probabilities(generator, cycle: float) -> np.ndarray:
    """For comparison only: each rate converted on its own, p_ij = 1 - exp(-q_ij cycle).

    Ignores competing risks and moves within a cycle; the diagonal is 1 minus the row
    sum and can even be negative. Use `probabilities_from_rates` for models.
    """
    generator = as_generator(generator)
    size = generator.shape[-1]
    matrix = rate_to_probability(generator * (1 - np.eye(size)), cycle)
    diagonal = np.arange(size)
    matrix[..., diagonal, diagonal] = 1 - matrix.sum(axis=-1)
    return matrix


def project_to_simplex(rows) -> np.ndarray:
    """Euclidean projection of each row onto {x >= 0, sum x = 1}.

    The sort-based algorithm of Held, Wolfe & Crowder (1974), "Validation of subgradient
    optimization": x = max(u - theta, 0) with theta chosen so that the row sums to 1.
    """
    rows = np.asarray(rows, dtype=float)
    size = rows.shape[-1]
    ordered = -np.sort(-rows, axis=-1)
    surplus = np.cumsum(ordered, axis=-1) - 1
    positions = np.arange(1, size + 1)
    kept = ordered - surplus / positions > 0
    count = size - np.argmax(kept[..., ::-1], axis=-1)
    theta = np.take_along_axis(surplus, count[..., None] - 1, axis=-1) / count[..., None]
    return np.maximum(rows - theta, 0.0)


class NotATransitionMatrix(ValueError):
    """A cycle change produced a matrix that is not a valid transition matrix.

    `rows`: the bad rows; `most_negative` and `at`: the most negative entry and where;
    `imaginary`: the largest imaginary part of the matrix root.
    """

    def __init__(self, message: str, rows: tuple[int, ...], most_negative: float,
                 at: tuple[int, int], imaginary: float):
        super().__init__(message)
        self.rows, self.most_negative, self.at, self.imaginary = rows, most_negative, at, imaginary


@dataclass(frozen=True, eq=False)
class CycleChange:
    """The matrix for the new cycle and what, if anything, was changed to make it valid.

    `changed_rows` lists rows projected onto the simplex (regularisation); `max_adjustment`
    is the largest absolute change of any entry from the real part of the matrix root,
    including rounding clean-up within tolerance (tiny negatives set to 0, rows rescaled).
    """
    matrix: np.ndarray
    factor: float
    changed_rows: tuple[int, ...]
    max_adjustment: float

    @property
    def regularised(self) -> bool:
        return bool(self.changed_rows)


def _describe_invalid(root: np.ndarray, bad: np.ndarray, factor: float, imaginary: float):
    at = np.unravel_index(np.argmin(root.real), root.shape)
    rows = tuple(int(i) for i in np.flatnonzero(bad))
    message = (
        f"the matrix for a cycle {factor:g} times the original is not a valid transition "
        f"matrix: rows {list(rows)} are invalid; the most negative entry is "
        f"{root.real[at]:.4g} at [{at[0]}, {at[1]}]")
    if imaginary > TOLERANCE:
        message += f"; the matrix root is complex (imaginary parts up to {imaginary:.3g})"
    message += (
        ". This happens when moves that take two or more steps within the original cycle "
        "were recorded as impossible (Chhatwal et al. 2016). Use a whole multiple of the "
        "original cycle, derive the matrix from rates, or pass on_invalid='regularise' to "
        "project the bad rows onto the probability simplex (Kreinin & Sidelnikova 2001)")
    return NotATransitionMatrix(message, rows, float(root.real[at]),
                                (int(at[0]), int(at[1])), imaginary)


def change_cycle(matrix, factor: float,
                 on_invalid: Literal["refuse", "regularise"] = "refuse",
                 tol: float = TOLERANCE) -> CycleChange:
    """The transition matrix for a cycle `factor` times as long (1/12: annual -> monthly).

    Whole factors use the matrix power (always valid). Other factors use the principal
    matrix power (scipy.linalg.fractional_matrix_power); an invalid result raises
    NotATransitionMatrix, or with on_invalid="regularise" has its bad rows projected onto
    the simplex and reported in the result. Nothing is changed silently.
    """
    matrix = as_stochastic(matrix)
    if matrix.ndim != 2 or factor <= 0 or on_invalid not in ("refuse", "regularise"):
        raise ValueError("change_cycle needs one (S, S) matrix, factor > 0 and "
                         "on_invalid 'refuse' or 'regularise'")
    if float(factor).is_integer():
        return CycleChange(np.linalg.matrix_power(matrix, int(factor)), factor, (), 0.0)
    root = np.asarray(scipy.linalg.fractional_matrix_power(matrix, factor))
    imaginary = float(np.abs(root.imag).max()) if np.iscomplexobj(root) else 0.0
    real = root.real
    bad = ((real < -tol).any(axis=1) | (np.abs(real.sum(axis=1) - 1) > tol)
           | (np.abs(np.imag(root)) > tol).any(axis=1))
    if bad.any() and on_invalid == "refuse":
        raise _describe_invalid(root, bad, factor, imaginary)
    result = np.empty_like(real)
    cleaned = np.maximum(real[~bad], 0.0)
    result[~bad] = cleaned / cleaned.sum(axis=1, keepdims=True)
    result[bad] = project_to_simplex(real[bad])
    changed = tuple(int(i) for i in np.flatnonzero(bad))
    return CycleChange(result, factor, changed, float(np.abs(result - real).max()))
