"""The expanded state space that turns finite memory back into a Markov chain.

A patient's "expanded state" is (state, cycles spent in it, counts). The counts are capped
whole numbers, one per tracked name: for count memory, the number of earlier occurrences
("earlier flares, up to 2+"); for `within` memory in cycle models, the number of whole
cycles since the last occurrence, where the cap means "not recent, or never". Tunnel states
carry time-in-state memory of cycle models. With them, the trace of the expanded chain
collapsed onto the model's states is the exact counterpart of a simulation with that memory
(common practice for tunnel states; see e.g. Hawkins, Sculpher & Epstein 2005,
"Cost-effectiveness analysis of treatments for chronic disease: using R to incorporate time
dependency of treatment response").

`within` memory is finite only in cycle models: there every occurrence happens at a cycle
end and every probability is read at a cycle start, so the time since an occurrence is a
whole number of cycles. In rate models it is continuous and has no finite expansion.

A fixed delay to treatment in a rate model (`BoundModel.delay`) has none either. The
expansion approximates it: each waiting copy gets DELAY_STAGES stages (the duration
field), passed one after another at rate DELAY_STAGES / delay, so the wait is an
Erlang(DELAY_STAGES) time of mean `delay` (the method of stages; e.g. Cox 1955, "A use of
complex probabilities in the theory of stochastic processes"), and the result is labelled
not exact.
"""
from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from microsim.binding import BoundModel, BoundRisk
from microsim.scenario.spec import TableSpec

DELAY_STAGES = 16  # exponential stages of a rate model's fixed delay (not exact)


@dataclass(frozen=True)
class Counter:
    """A capped count of occurrences of `after` (event, transition, or entries to a state)."""
    after: str
    cap: int


@dataclass(frozen=True)
class Recency:
    """Cycles since the last occurrence of `after`, read at a cycle start and capped at
    `cap` ("not recent, or never"). An occurrence happens at its cycle's end, so the next
    cycle starts at 0; starting in a state is entering it at time 0."""
    after: str
    cap: int


def window_cycles(within: float, model: BoundModel) -> int:
    """Cycles in which a `within` window applies after the cycle of its occurrence.

    The engines apply it while t - last < within - 1e-9 * cycle (t a cycle start, `last`
    the cycle end of the occurrence, or 0 for the start state), and t - last = k * cycle,
    k = 0, 1, ...: so for the k < within / cycle - 1e-9. The tolerance makes a whole number
    of cycles exact (within = 2 cycles: k = 0, 1); within = 1.5 cycles also gives 2 and
    half a cycle gives 1 (the next cycle starts less than half a cycle after it). A window
    longer than the horizon is cut to it: no later cycle start exists."""
    return min(max(0, math.ceil(within / model.cycle - 1e-9)), model.n_cycles)


@dataclass(frozen=True)
class Expansion:
    model: BoundModel
    counters: tuple[Counter, ...]
    recencies: tuple[Recency, ...]  # cycle models only; counts list them after the counters
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

    @property
    def memories(self) -> tuple[Counter | Recency, ...]:
        """What the counts hold, in order."""
        return (*self.counters, *self.recencies)

    @cached_property
    def tracked(self) -> frozenset[str]:
        """Names whose occurrences move some count."""
        return frozenset(c.after for c in self.memories)

    def index(self, state: int, duration: int, counts: tuple[int, ...]) -> int:
        """Position of an expanded state; an absorbing state has one copy, whatever the
        memory it was entered with (nothing happens there any more)."""
        if self.model.absorbing[state]:
            return self._lookup[(state, 0, (0,) * len(self.memories))]
        return self._lookup[(state, duration, counts)]

    @cached_property
    def _lookup(self) -> dict:
        return {key: e for e, key in enumerate(self.expanded)}

    def target(self, state: int, duration: int, counts: tuple[int, ...], to: int,
               occurred: tuple) -> int:
        """The expanded state a cycle leads to from (state, duration, counts) when it ends
        in model state `to` with the risks `occurred` (remembered: the cycle matrices ask
        the same question every cycle)."""
        key = (state, duration, counts, to, tuple(id(r) for r in occurred))
        found = self._targets.get(key)
        if found is None:
            same = self.model.entered(to) == self.model.entered(state)  # or a copy of it
            after = min(duration + 1, self.durations[to] - 1) if same else 0
            found = self._targets[key] = self.index(to, after,
                                                    self.after_move(counts, state, occurred))
        return found

    @cached_property
    def _targets(self) -> dict:
        return {}

    def collapse(self) -> np.ndarray:
        """(E, S) 0/1 matrix: expanded trace @ collapse() -> trace over model states."""
        out = np.zeros((self.size, self.model.n_states))
        for e, (state, _, _) in enumerate(self.expanded):
            out[e, state] = 1.0
        return out

    def entry(self, state: int) -> int:
        """The expanded state of a patient who starts in `state`: duration 0, and starting
        there counts as an entry at time 0 (count 1, 0 cycles since)."""
        name = self.model.entered(state)
        counts = tuple(min(int(c.after == name), c.cap) for c in self.counters)
        since = tuple(0 if c.after == name else c.cap for c in self.recencies)
        return self.index(state, 0, counts + since)

    def start(self) -> np.ndarray:
        """Initial distribution over expanded states."""
        p = np.zeros(self.size)
        for i, share in enumerate(self.model.start):
            if share > 0:
                p[self.entry(i)] += share
        return p

    def start_rows(self, start: np.ndarray | None, rows: int) -> np.ndarray:
        """(rows, E) initial distributions: the model's for every row, or each row's own
        start shares over the model's states (`Multipliers.start`, (rows, S))."""
        if start is None:
            return np.broadcast_to(self.start(), (rows, self.size)).copy()
        entries = np.zeros((self.model.n_states, self.size))
        entries[np.arange(self.model.n_states),
                [self.entry(i) for i in range(self.model.n_states)]] = 1.0
        return start @ entries

    def memory_factor(self, risk: BoundRisk, counts: tuple[int, ...]) -> float:
        """The product of a risk's memory multipliers in expanded state `counts`."""
        factor = 1.0
        for m in risk.memory:
            if m.multipliers is not None:
                k = self._position[(Counter, m.after)]
                factor *= m.multipliers[min(counts[k], len(m.multipliers) - 1)]
            elif self.model.discrete:
                k = self._position[(Recency, m.after)]
                if counts[k] < window_cycles(m.within, self.model):
                    factor *= m.multiplier
            # rate models: time since an occurrence has no finite expansion (exact is False)
        return factor

    @cached_property
    def _position(self) -> dict:
        return {(type(c), c.after): k for k, c in enumerate(self.memories)}

    def after_move(self, counts, source: int, occurred) -> tuple[int, ...]:
        """Counts after the risks `occurred` happen from `source`, in one cycle (cycle
        models) or one jump (rate models): a counter adds its hits; a recency restarts
        at 0 on a hit and otherwise ages by a cycle. An occurrence hits its own name and,
        for a move to another state, that state's name (its entries)."""
        hits = [risk.name for risk in occurred] + [
            self.model.entered(risk.target) for risk in occurred
            if risk.target is not None
            and self.model.entered(risk.target) != self.model.entered(source)]
        n = len(self.counters)
        return (tuple(min(k + hits.count(c.after), c.cap) for k, c in zip(counts, self.counters))
                + tuple(0 if c.after in hits else min(k + 1, c.cap)
                        for k, c in zip(counts[n:], self.recencies)))


def tunnel_length(risks: tuple[BoundRisk, ...], cycle: float) -> int:
    """Cycles of time-in-state memory a state needs: up to the last band's start."""
    starts = [r.probability.starts[-1] for r in risks
              if isinstance(r.probability, TableSpec) and r.probability.by == "time_in_state"]
    return 1 + (math.ceil(max(starts) / cycle - 1e-9) if starts else 0)


def tunnel_lengths(model: BoundModel) -> tuple[int, ...]:
    """Each state's tunnel length: in rate models 1, or the stages of a delay's wait in a
    waiting copy. Time in state runs on across the copies of a state in treatment phases
    (a countdown's cycle, an event that moves the phase on), so in cycle models every copy
    counts as far as the longest of them needs."""
    if not model.discrete:
        return tuple(DELAY_STAGES if waiting else 1 for waiting in model.waiting)
    own = [tunnel_length(model.risks_from(i), model.cycle) for i in range(model.n_states)]
    longest: dict[str, int] = {}
    for i, length in enumerate(own):
        longest[model.entered(i)] = max(longest.get(model.entered(i), 1), length)
    return tuple(longest[model.entered(i)] for i in range(model.n_states))


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
    windows: dict[str, int] = {}
    for risk in model.risks:
        for m in risk.memory:
            if m.multipliers is not None:
                caps[m.after] = max(caps.get(m.after, 0), len(m.multipliers) - 1)
            elif model.discrete:
                windows[m.after] = max(windows.get(m.after, 0), window_cycles(m.within, model))
            else:
                reasons.append(f"'{risk.name}' depends on the time since the last '{m.after}' "
                               "(continuous in a rate model: no finite expansion; the analytic "
                               "side leaves this memory out)")
        if semi_markov(model, risk):
            reasons.append(f"'{risk.name}' has a {risk.family} hazard on the time since "
                           f"entering '{model.states[risk.source]}', a state patients enter "
                           "after the start (semi-Markov; the analytic side reads its clock "
                           "as the time since start)")
    waiting = model.waiting
    if waiting.any():
        unit = model.scenario.time.unit
        reasons.append(f"treatment starts a fixed {model.delay:g} {unit} after its trigger, "
                       "which no finite Markov chain can hold; the analytic side approximates "
                       f"the wait by {DELAY_STAGES} exponential stages of mean "
                       f"{model.delay / DELAY_STAGES:g} {unit} each (an Erlang({DELAY_STAGES}) "
                       "delay), beside which the simulation is shown, not tested")
    counters = tuple(Counter(after, cap) for after, cap in sorted(caps.items()))
    recencies = tuple(Recency(after, cap) for after, cap in sorted(windows.items()))
    durations = tunnel_lengths(model)
    memories = (*counters, *recencies)
    count_space = list(itertools.product(*(range(c.cap + 1) for c in memories)))
    plain = ((0,) * len(memories),)
    expanded = tuple((i, d, counts) for i in range(model.n_states)
                     for d in range(durations[i])
                     for counts in (plain if model.absorbing[i] else count_space))
    return Expansion(model, counters, recencies, durations, expanded, not reasons, tuple(reasons))
