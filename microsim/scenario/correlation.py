"""The checks every correlation matrix of a scenario passes, whether it correlates
population attributes or PSA parameters."""
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
