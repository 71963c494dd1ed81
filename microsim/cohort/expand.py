"""The expanded state space that turns finite memory back into a Markov chain.

A patient's "expanded state" is (state, cycles spent in it, capped counts of earlier
occurrences). Tunnel states carry time-in-state memory of cycle models; counter copies
carry count memory ("number of earlier flares, up to 2+"). With them, the trace of the
expanded chain collapsed onto the model's states is the exact counterpart of a simulation
with that memory (common practice for tunnel states; see e.g. Hawkins, Sculpher & Epstein
2005, "Cost-effectiveness analysis of treatments for chronic disease: using R to
incorporate time dependency of treatment response").
"""
from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from microsim.binding import BoundModel, BoundRisk
from microsim.scenario.spec import TableSpec


@dataclass(frozen=True)
class Counter:
    """A capped count of occurrences of `after` (event, transition, or entries to a state)."""
    after: str
    cap: int


@dataclass(frozen=True)
class Expansion:
    model: BoundModel
    counters: tuple[Counter, ...]
    durations: tuple[int, ...]  # per model state: tunnel length (1 = no tunnel)
    expanded: tuple[tuple[int, int, tuple[int, ...]], ...]  # (state, duration, counts)
    exact: bool  # False when some memory has no finite expansion
    reasons: tuple[str, ...]  # why not exact, in plain words

    @property
    def size(self) -> int:
        return len(self.expanded)

    @property
    def trivial(self) -> bool:
        return self.size == self.model.n_states

    def index(self, state: int, duration: int, counts: tuple[int, ...]) -> int:
        """Position of an expanded state; an absorbing state has one copy, whatever the
        memory it was entered with (nothing happens there any more)."""
        if self.model.absorbing[state]:
            return self._lookup[(state, 0, (0,) * len(self.counters))]
        return self._lookup[(state, duration, counts)]

    @cached_property
    def _lookup(self) -> dict:
        return {key: e for e, key in enumerate(self.expanded)}

    def collapse(self) -> np.ndarray:
        """(E, S) 0/1 matrix: expanded trace @ collapse() -> trace over model states."""
        out = np.zeros((self.size, self.model.n_states))
        for e, (state, _, _) in enumerate(self.expanded):
            out[e, state] = 1.0
        return out

    def start(self) -> np.ndarray:
        """Initial distribution over expanded states: duration 0, counts from the start."""
        p = np.zeros(self.size)
        names = self.model.states
        for i, share in enumerate(self.model.start):
            if share > 0:
                counts = tuple(int(c.after == names[i]) for c in self.counters)
                p[self.index(i, 0, self.capped(counts))] += share
        return p

    def capped(self, counts) -> tuple[int, ...]:
        return tuple(min(n, c.cap) for n, c in zip(counts, self.counters))

    def memory_factor(self, risk: BoundRisk, counts: tuple[int, ...]) -> float:
        """The product of a risk's count-memory multipliers in expanded state `counts`."""
        factor = 1.0
        for m in risk.memory:
            if m.multipliers is None:
                continue  # time-since memory: no finite expansion (Expansion.exact is False)
            k = next(k for k, c in enumerate(self.counters) if c.after == m.after)
            factor *= m.multipliers[min(counts[k], len(m.multipliers) - 1)]
        return factor

    def after_move(self, counts, source: int, risk: BoundRisk | None) -> tuple[int, ...]:
        """Counts after `risk` happens from `source` (None: staying put, no event)."""
        if risk is None:
            return counts
        names = self.model.states
        bumped = []
        for n, c in zip(counts, self.counters):
            hit = c.after == risk.name or (
                risk.target is not None and risk.target != source and c.after == names[risk.target])
            bumped.append(n + hit)
        return self.capped(bumped)


def tunnel_length(risks: tuple[BoundRisk, ...], cycle: float) -> int:
    """Cycles of time-in-state memory a state needs: up to the last band's start."""
    starts = [r.probability.starts[-1] for r in risks
              if isinstance(r.probability, TableSpec) and r.probability.by == "time_in_state"]
    return 1 + (math.ceil(max(starts) / cycle - 1e-9) if starts else 0)


def semi_markov(model: BoundModel, risk: BoundRisk) -> bool:
    """A continuous-time hazard on the time-since-entry clock that is not constant
    makes the process semi-Markov, unless the state can only be occupied from time 0
    (nothing enters it), where time since entry is time since start."""
    if model.discrete or risk.clock != "since_entry":
        return False
    varying = risk.family not in (None, "constant") and not (
        risk.family == "table" and risk.table.by != "time_in_state")
    if risk.table is not None and risk.table.by == "time_in_state":
        varying = True
    entered = any(r.target == risk.source and r.source != risk.source for r in model.risks)
    return varying and entered


def expand(model: BoundModel) -> Expansion:
    """Build the expanded state space of `model` and say whether it is exact."""
    reasons = []
    caps: dict[str, int] = {}
    for risk in model.risks:
        for m in risk.memory:
            if m.multipliers is None:
                reasons.append(f"'{risk.name}' depends on the time since the last '{m.after}'")
            else:
                caps[m.after] = max(caps.get(m.after, 0), len(m.multipliers) - 1)
        if semi_markov(model, risk):
            reasons.append(f"'{risk.name}' has a {risk.family} hazard on the time since "
                           f"entering a state that patients can re-enter (semi-Markov)")
    counters = tuple(Counter(after, cap) for after, cap in sorted(caps.items()))
    durations = tuple(tunnel_length(model.risks_from(i), model.cycle) if model.discrete else 1
                      for i in range(model.n_states))
    count_space = list(itertools.product(*(range(c.cap + 1) for c in counters)))
    plain = ((0,) * len(counters),)
    expanded = tuple((i, d, counts) for i in range(model.n_states)
                     for d in range(durations[i])
                     for counts in (plain if model.absorbing[i] else count_space))
    return Expansion(model, counters, durations, expanded, not reasons, tuple(reasons))
