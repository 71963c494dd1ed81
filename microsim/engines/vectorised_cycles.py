"""The vectorised cycle engine: the SimPy cycle engine's rules and draws, one cycle at a
time for the whole batch.

`microsim.engines.cycle_engine` runs one process per patient; here each cycle is a handful of
numpy operations over the patients in each live state, in the same risk order and with the
same draws (same purposes, occurrence = cycle), so the two engines return equal histories,
record for record and bit for bit. Two details keep the floats identical:

- the age factor exp(slope * t) is one number per risk and cycle, so it comes from
  `math.exp` exactly as in the cycle engine (numpy's SIMD exp can differ in the last bit);
- the rate-scale power 1 - (1 - p)^m uses `np.float_power`, which evaluates the C
  library's pow element by element as Python's `**` does; `np.power` may take a SIMD
  routine that differs in the last bit (measured: about 5% of random arguments on an
  AVX-512 machine).
"""
from __future__ import annotations

from math import exp

import numpy as np

from microsim.binding import BoundModel
from microsim.patients.multipliers import Multipliers
from microsim import streams
from microsim.engines import plan
from microsim.engines.cycle_engine import MOVE, state_plans
from microsim.engines.histories import START, Histories, from_records


class _Batch:
    """What every patient of the batch carries from cycle to cycle, as arrays, and the
    per-cycle probability of a risk for some of them."""

    def __init__(self, model: BoundModel, mult: Multipliers, starts: np.ndarray):
        tracked = plan.tracked_names(model)
        self.cycle = model.cycle
        self.bumps = plan.bumps(model, tracked)
        self.static = np.exp(mult.log_static)  # the values of plan.static_multipliers
        self.slopes = mult.age_slope.tolist()
        self.age0 = np.zeros(mult.size) if mult.entry_age is None else np.asarray(mult.entry_age, float)
        window = mult.window
        self.window = window
        self.windowed = [window is not None and window.on_factor[r] != window.off_factor[r]
                         for r in range(len(model.risks))]
        initial = [plan.initial_memory(model, tracked, s) for s in range(model.n_states)]
        counts = np.array([c for c, _ in initial], np.int64).reshape(model.n_states, -1)
        last = np.array([[np.nan if x is None else x for x in t] for _, t in initial],
                        float).reshape(model.n_states, -1)
        self.counts, self.last = counts[starts], last[starts]
        self.state = starts.copy()
        self.duration = np.zeros(len(starts), np.int64)

    def probability(self, step, who: np.ndarray, t: float):
        """The risk's per-cycle probability for patients `who` at time t, in the cycle
        engine's order of operations."""
        r, _, _, constant, table, memory = step
        if table is None:
            p = constant
        else:
            axis, starts, values = table
            x = (t, self.age0[who] + t, self.duration[who] * self.cycle)[axis]
            place = np.searchsorted(np.asarray(starts, float), x, side="right") - 1
            p = np.asarray(values, float)[np.maximum(place, 0)]
        m = self.static[who, r]
        if self.slopes[r]:
            m = m * exp(self.slopes[r] * t)
        if self.windowed[r]:
            on = (self.window.on[who] <= t) & (t < self.window.off[who])
            m = m * np.where(on, float(self.window.on_factor[r]), float(self.window.off_factor[r]))
        for index, multipliers, within, multiplier in memory:
            if multipliers is not None:
                cap = len(multipliers) - 1
                m = m * np.asarray(multipliers, float)[np.minimum(self.counts[who, index], cap)]
            else:
                # the cycle engine's tolerance: whole cycles compare exactly with `within`
                recent = t - self.last[who, index] < within - 1e-9 * self.cycle
                m = np.where(recent, m * multiplier, m)
        return np.where(m == 1.0, p, 1.0 - np.float_power(1.0 - p, m))

    def occur(self, who: np.ndarray, r: int, end: float):
        for index in self.bumps[r]:
            self.counts[who, index] += 1
            self.last[who, index] = end


def simulate_cycles_vectorised(model: BoundModel, mult: Multipliers, patient_ids: np.ndarray,
                               seed: int) -> Histories:
    """Run one batch of patients through the cycle model, a cycle at a time; the same
    histories as `microsim.engines.cycle_engine.simulate_cycles` for the same arguments."""
    ids = np.asarray(patient_ids)
    names = (MOVE, *plan.risk_purposes(model))
    # (cycle, purpose, patient): one contiguous row of draws per purpose and cycle
    draws = np.ascontiguousarray(
        streams.block(seed, ids, names, max(model.n_cycles, 1)).transpose(2, 1, 0))
    plans = state_plans(model, names)
    starts = np.asarray(plan.start_states(model, streams.uniforms(seed, ids, plan.START_PURPOSE)),
                        np.int64).reshape(-1)
    batch = _Batch(model, mult, starts)
    everyone = np.arange(len(ids))
    records = [(everyone, 0.0, START, starts, START)]  # (patients, time, from, to, risk)
    live = [i for i in range(model.n_states) if not model.absorbing[i]]
    cycle = model.cycle
    for n in range(model.n_cycles):
        t = n * cycle
        end = t + cycle
        state = batch.state
        groups = [(i, np.flatnonzero(state == i)) for i in live]
        for i, who in groups:
            if who.size == 0:
                continue
            moves, remainder, events = plans[i]
            u = draws[n, 0, who]
            risk = np.full(who.size, START, np.int64)
            target = np.full(who.size, i, np.int64)
            total = 0.0
            for step in moves:
                total = total + batch.probability(step, who, t)
                taken = (risk == START) & (u < total)
                risk[taken], target[taken] = step[0], step[2]
            if remainder is not None:
                rest = risk == START
                risk[rest], target[rest] = remainder
            happened = [(step[0], who[draws[n, step[1], who] < batch.probability(step, who, t)])
                        for step in events]
            for r, hit in happened:
                records.append((hit, end, i, i, r))
                batch.occur(hit, r, end)
            moved = target != i
            records.append((who[moved], end, i, target[moved], risk[moved]))
            for r in np.unique(risk[moved]).tolist():
                batch.occur(who[moved & (risk == r)], r, end)
            batch.duration[who] = np.where(moved, 0, batch.duration[who] + 1)
            state[who[moved]] = target[moved]
    return from_records(records, len(ids))

