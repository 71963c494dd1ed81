"""Counter states: memory of how many times an event or transition has happened, up to a cap.

The chain is copied once per count 0..cap; a counted move goes from copy c to copy
min(c + 1, cap), every other move stays within its copy. Each copy may have its own
matrix (risks that depend on the count), and the form is the same for transition
matrices P and generators Q.
"""
from __future__ import annotations

import numpy as np

from .checks import TOLERANCE, as_generator, as_stochastic
from .expanded import ExpandedChain


def split_counted(matrices, counted) -> tuple[np.ndarray, np.ndarray]:
    """Split matrices (..., S, S) into (plain, counting) parts by a boolean mask of moves.

    `counted[i, j]` marks the moves i -> j that add one to the count (a transition, or
    all entries into a state). Events that leave the state unchanged cannot be told apart
    from staying by a mask: give their share directly in `counting[..., i, i]`.
    """
    matrices = np.asarray(matrices, dtype=float)
    counted = np.asarray(counted, dtype=bool)
    if counted.shape != matrices.shape[-2:]:
        raise ValueError(f"counted: expected shape {matrices.shape[-2:]}, got {counted.shape}")
    counting = np.where(counted, matrices, 0.0)
    return matrices - counting, counting


def counter_expansion(plain, counting, generator: bool = False) -> ExpandedChain:
    """Expand a chain by a capped event count.

    `plain` and `counting` have shape (C, S, S), or (n, C, S, S) by cycle, with C = cap + 1
    copies: `counting[c]` holds the moves from copy c that add one to the count and
    `plain[c]` the rest; plain[c] + counting[c] is the chain's transition matrix (or, when
    `generator`, its rate matrix) for patients with count c. In a generator a counted
    event that leaves state i unchanged has its rate at counting[c, i, i] and minus that
    rate inside plain[c, i, i]. Expanded state c * S + s is state s with count c.
    """
    plain, counting = np.asarray(plain, dtype=float), np.asarray(counting, dtype=float)
    if plain.shape != counting.shape or plain.ndim not in (3, 4):
        raise ValueError("plain and counting: expected equal shapes (C, S, S) or (n, C, S, S)")
    size = plain.shape[-1]
    off_diagonal = 1 - np.eye(size) if generator else np.ones((size, size))
    if min(counting.min(), (plain * off_diagonal).min()) < -TOLERANCE:
        raise ValueError("plain and counting: probabilities and rates must be >= 0")
    (as_generator if generator else as_stochastic)(plain + counting, "plain + counting")
    copies = plain.shape[-3]
    expanded = np.zeros(plain.shape[:-3] + (copies * size,) * 2)
    for count in range(copies):
        here = slice(count * size, (count + 1) * size)
        up = min(count + 1, copies - 1)
        expanded[..., here, here] += plain[..., count, :, :]
        expanded[..., here, up * size:(up + 1) * size] += counting[..., count, :, :]
    level = np.repeat(np.arange(copies), size)
    return ExpandedChain(expanded, np.tile(np.arange(size), copies), level,
                         level == copies - 1, np.arange(size), "count")
