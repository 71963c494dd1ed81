"""Tunnel states: memory of the number of cycles already spent in a state.

A state whose exit probabilities depend on the duration of the stay is split into k tunnel
states, one per cycle of the stay (the k-th holds from then on); staying moves a patient
one tunnel further, every entry lands in the first (Sonnenberg & Beck 1993, "Markov models
in medical decision making: a practical guide").
"""
from __future__ import annotations

from typing import Mapping

import numpy as np

from .checks import as_probability_rows, as_stochastic
from .expanded import ExpandedChain


def tunnel_expansion(matrices, tunnels: Mapping[int, object]) -> ExpandedChain:
    """Expand the states in `tunnels` into tunnel states.

    `matrices`: one (S, S) transition matrix or a stack (n, S, S) by cycle.
    `tunnels[s]`: rows (k, S), or (n, k, S) by cycle, where row d - 1 is the transition row
    over the original states for a patient in their d-th cycle in s (moving to s means
    staying). The rows of tunnel states in `matrices` are replaced by these, not used.
    Expanded states keep the original order, each tunnel state as k consecutive states.
    """
    matrices = as_stochastic(matrices)
    size = matrices.shape[-1]
    rows_of: dict[int, np.ndarray] = {}
    for state, rows in tunnels.items():
        if not 0 <= state < size:
            raise ValueError(f"tunnels: state {state} is not in 0..{size - 1}")
        rows_of[state] = as_probability_rows(rows, f"tunnels[{state}]")
        if rows_of[state].ndim not in (2, 3) or rows_of[state].shape[-1] != size:
            raise ValueError(f"tunnels[{state}]: expected (k, {size}) or (n, k, {size}) rows")
    lead = np.broadcast_shapes(matrices.shape[:-2], *(r.shape[:-2] for r in rows_of.values()))
    matrices = np.broadcast_to(matrices, lead + (size, size))
    copies = np.array([rows_of[s].shape[-2] if s in rows_of else 1 for s in range(size)])
    entry = np.concatenate([[0], np.cumsum(copies)[:-1]])
    expanded = np.zeros(lead + (copies.sum(),) * 2)
    for state in range(size):
        for stay in range(copies[state]):
            targets = entry.copy()
            if state in rows_of:
                targets[state] += min(stay + 1, copies[state] - 1)
                row = rows_of[state][..., stay, :]
            else:
                row = matrices[..., state, :]
            expanded[..., entry[state] + stay, targets] = row
    is_tunnel = np.repeat([s in rows_of for s in range(size)], copies)
    level = np.concatenate([np.arange(1, c + 1) for c in copies]) * is_tunnel
    capped = is_tunnel & (level == np.repeat(copies, copies))
    return ExpandedChain(expanded, np.repeat(np.arange(size), copies), level, capped,
                         entry, "cycle in state")
