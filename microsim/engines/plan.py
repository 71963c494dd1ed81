"""What both SimPy engines precompute for a batch: per-state risk plans, memory, draws.

Everything a patient process reads in its loop is turned into plain Python lists and
tuples here, once per batch, because attribute lookups and numpy scalars cost more than
the arithmetic of a transition.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from microsim.binding import BoundModel
from microsim.effects import Multipliers
from microsim.engines import streams

CLOCKS = {"since_start": 0, "since_entry": 1, "age": 2}
START_PURPOSE = "start"


def tracked_names(model: BoundModel) -> tuple[str, ...]:
    """Names whose occurrences some memory effect counts or times."""
    return tuple(sorted({m.after for r in model.risks for m in r.memory}))


def bumps(model: BoundModel, tracked: tuple[str, ...]) -> list[tuple[int, ...]]:
    """For each risk, the tracked names its occurrence advances (its own name, and the
    state it enters when that is a new state)."""
    out = []
    for risk in model.risks:
        hit = {risk.name}
        if risk.target is not None and risk.target != risk.source:
            hit.add(model.states[risk.target])
        out.append(tuple(k for k, name in enumerate(tracked) if name in hit))
    return out


def memory_terms(model: BoundModel, tracked: tuple[str, ...]) -> list[tuple]:
    """For each risk: ((tracked index, multipliers or None, within, multiplier), ...)."""
    return [tuple((tracked.index(m.after), m.multipliers, m.within, m.multiplier)
                  for m in risk.memory) for risk in model.risks]


def purposes(model: BoundModel, extra: tuple[str, ...] = ()) -> tuple[str, ...]:
    """Draw purposes: the start, each named risk (shared by all states it occurs in)."""
    return (START_PURPOSE, *extra, *model.risk_names)


@dataclass
class BatchDraws:
    """A batch's uniforms by (patient row, purpose, occurrence), with a spill beyond the block."""
    seed: int
    patient_ids: np.ndarray
    names: tuple[str, ...]
    rows: list  # rows[b][p] -> list of uniforms
    depth: int

    @classmethod
    def make(cls, seed: int, patient_ids, names, depth: int) -> "BatchDraws":
        block = streams.block(seed, patient_ids, names, depth)
        return cls(seed, np.asarray(patient_ids), tuple(names), block.tolist(), depth)

    def spill(self, b: int, p: int, occurrence: int) -> float:
        """A draw past the precomputed block (rare): computed on its own, same stream."""
        return float(streams.uniforms(self.seed, self.patient_ids[b:b + 1], self.names[p],
                                      occurrence)[0])


def start_states(model: BoundModel, draws: BatchDraws) -> list[int]:
    """Each patient's starting state, from its own 'start' draw and the start shares."""
    u = np.array([row[0][0] for row in draws.rows])
    cumulative = np.cumsum(model.start)
    cumulative[-1] = 1.0
    return np.searchsorted(cumulative, u, side="right").tolist()


def static_multipliers(mult: Multipliers) -> list[list[float]]:
    return np.exp(mult.log_static).tolist()


def initial_memory(model: BoundModel, tracked: tuple[str, ...], state: int):
    """Counts and last-occurrence times at the start: entering the start state counts."""
    name = model.states[state]
    counts = [int(t == name) for t in tracked]
    last = [0.0 if t == name else None for t in tracked]
    return counts, last
