"""An expanded chain (tunnel or counter states) and the map back onto the original states.

Memory that a chain cannot hold (cycles spent in a state, how many times an event has
happened) becomes part of the state; collapsing the expanded trace onto the original
states gives the exact cohort counterpart of a simulation with that memory.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .checks import as_start


@dataclass(frozen=True, eq=False)
class ExpandedChain:
    """Expanded matrices and, per expanded state, its original state and memory level.

    `level` is the duration in the state (1, 2, ...; 0 for states without tunnels) or the
    event count (0, 1, ...); `capped` marks the last level, which holds from then on.
    `entry[s]` is the expanded state where a patient starting in or entering s lands.
    """
    matrices: np.ndarray  # (E, E) or (n, E, E)
    origin: np.ndarray  # (E,) original state index
    level: np.ndarray  # (E,)
    capped: np.ndarray  # (E,) bool
    entry: np.ndarray  # (S,)
    level_name: str  # "cycle in state" or "count"

    @property
    def n_states(self) -> int:
        """The number of original states."""
        return len(self.entry)

    def expand_start(self, start) -> np.ndarray:
        """A start vector over original states, placed at each state's entry level."""
        expanded = np.zeros(len(self.origin))
        expanded[self.entry] = as_start(start, self.n_states)
        return expanded

    def collapse(self, trace) -> np.ndarray:
        """Sum an expanded trace (..., E) back onto the original states (..., S)."""
        indicator = np.zeros((len(self.origin), self.n_states))
        indicator[np.arange(len(self.origin)), self.origin] = 1.0
        return np.asarray(trace, dtype=float) @ indicator

    def labels(self, names) -> list[str]:
        """Readable names of the expanded states, e.g. "sick (cycle in state 3+)"."""
        labels = []
        for s, level, capped in zip(self.origin, self.level, self.capped):
            single = np.count_nonzero(self.origin == s) == 1 and self.level_name != "count"
            suffix = "" if single else f" ({self.level_name} {level}{'+' if capped else ''})"
            labels.append(f"{names[s]}{suffix}")
        return labels
