"""The checks every correlation matrix of a scenario passes, whether it correlates
population attributes or PSA parameters, and those of a covariance matrix."""
from __future__ import annotations

import numpy as np

from .fields import CORRELATION, TOLERANCE, Node, show


def read_correlation_matrix(node: Node, key: str, names: tuple[str, ...], *,
                            empty_as_short: bool = False) -> tuple[tuple[float, ...], ...]:
    """The `matrix` of a correlation table whose `key` (attributes, parameters) lists
    `names`: at least two names; square, unit diagonal, symmetric and positive
    semi-definite (smallest eigenvalue from numpy.linalg.eigvalsh at least -1e-9).
    `empty_as_short`: refuse an empty matrix as too few rows rather than as empty."""
    if len(names) < 2:
        node.fail(key, f"needs at least two {key} to correlate")
    matrix = node.matrix("matrix", len(names), CORRELATION, per=key.removesuffix("s"),
                         empty_as_short=empty_as_short)
    for i in range(len(names)):
        if abs(matrix[i][i] - 1.0) > TOLERANCE:
            node.fail(f"matrix[{i}][{i}]", f"the diagonal must be 1, got {show(matrix[i][i])}")
        for j in range(i):
            if abs(matrix[i][j] - matrix[j][i]) > TOLERANCE:
                node.fail(f"matrix[{i}][{j}]", f"{show(matrix[i][j])} differs from "
                          f"matrix[{j}][{i}] = {show(matrix[j][i])}; the matrix must be "
                          "symmetric")
    smallest = float(np.linalg.eigvalsh(np.array(matrix)).min())
    if smallest < -TOLERANCE:
        node.fail("matrix", f"is not positive semi-definite: its smallest eigenvalue is "
                            f"{show(smallest)}; no set of {key} can have these correlations")
    return matrix


COVARIANCE_TOLERANCE = 1e-9  # relative to the largest variance: symmetry, smallest eigenvalue


def covariance_problem(covariance) -> tuple[str, str] | None:
    """What is wrong with a covariance matrix, as (where, message), or None: finite, square,
    variances >= 0, symmetric and positive semi-definite within COVARIANCE_TOLERANCE
    (relative to the largest variance; the smallest eigenvalue from numpy.linalg.eigvalsh)."""
    matrix = np.asarray(covariance, dtype=float)
    if matrix.ndim != 2 or matrix.shape[0] != matrix.shape[1] or not np.all(np.isfinite(matrix)):
        return "", f"must be a finite square matrix, got shape {matrix.shape}"
    diagonal = np.diag(matrix)
    if np.any(diagonal < 0):
        i = int(np.argmax(diagonal < 0))
        return f"[{i}][{i}]", f"is a variance and must be at least 0, got {diagonal[i]:.12g}"
    scale = max(float(diagonal.max(initial=0.0)), np.finfo(float).tiny)
    for i, j in zip(*np.nonzero(np.abs(matrix - matrix.T) > COVARIANCE_TOLERANCE * scale)):
        if i > j:
            return (f"[{i}][{j}]", f"{matrix[i, j]:.12g} differs from the entry across the "
                                   f"diagonal ([{j}][{i}] = {matrix[j, i]:.12g}); a covariance "
                                   "matrix is symmetric")
    smallest = float(np.linalg.eigvalsh((matrix + matrix.T) / 2).min(initial=0.0))
    if smallest < -COVARIANCE_TOLERANCE * scale:
        return "", (f"is not positive semi-definite: its smallest eigenvalue is {smallest:.6g}; "
                    "no set of parameters can have these covariances")
    return None
