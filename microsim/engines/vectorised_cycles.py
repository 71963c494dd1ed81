"""The vectorised cycle engine: the SimPy cycle engine's rules and draws, one cycle at a
time for the whole batch.

`microsim.engines.cycle_engine` runs one process per patient; here each cycle is a handful of
numpy operations over the live patients of each state, in the same risk order and with the
same draws (same purposes, occurrence = cycle), so the two engines return equal histories,
record for record and bit for bit. What keeps the floats identical:

- the age factor exp(slope * t) is one number per risk and cycle, from `math.exp` in both;
- the per-cycle probabilities come from the same functions
  (`microsim.hazards.cycle_probabilities`), which use numpy's `expm1` on arrays here and
  on numpy scalars in the SimPy engine: the same routine either way.

Speed: only live patients are touched (the batch shrinks as patients are absorbed), draws
are made only for the purposes a cycle model reads (the move of each cycle and each event),
four cycles at a time for the whole batch by numpy's own Philox (`microsim.streams.block`),
and nothing in a cycle loops over patients in Python.
"""
from __future__ import annotations

from math import exp

import numpy as np

from microsim import streams
from microsim.binding import BoundModel
from microsim.engines import plan
from microsim.engines.cycle_engine import MOVE, row_name, state_plans
from microsim.engines.histories import START, Histories, from_records
from microsim.hazards.cycle_probabilities import LIMIT, competing, overflow, separate
from microsim.patients.multipliers import Multipliers

BLOCK = 4  # cycles of draws made at once: one Philox block holds four occurrences


class _Batch:
    """What every patient of the batch carries from cycle to cycle, as arrays, and the
    per-cycle probabilities of a row for some of them."""

    def __init__(self, model: BoundModel, mult: Multipliers, starts: np.ndarray):
        tracked = plan.tracked_names(model)
        self.cycle = model.cycle
        self.bumps = plan.bumps(model, tracked)
        # the values of plan.static_multipliers, risk-major so a risk's are contiguous
        self.static = np.ascontiguousarray(np.exp(mult.log_static).T)
        self.ones = np.all(mult.log_static == 0.0, axis=0).tolist()  # risks no effect touches
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

    def weigh(self, step, who: np.ndarray, t: float):
        """(base probability, L, multiplier) of a risk for patients `who` at time t, in the
        cycle engine's order of operations (scalars where every patient shares them)."""
        r, _, _, values, logs, bands, memory = step
        if bands is None:
            p, log = values[0], logs[0]
        else:
            axis, starts = bands
            x = (t, self.age0[who] + t, self.duration[who] * self.cycle)[axis]
            if np.ndim(x) == 0:
                k = max(int(np.searchsorted(starts, x, side="right")) - 1, 0)
                p, log = values[k], logs[k]
            else:
                k = np.maximum(np.searchsorted(starts, x, side="right") - 1, 0)
                p, log = np.asarray(values, float)[k], np.asarray(logs, float)[k]
        m = 1.0 if self.ones[r] else self.static[r][who]
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
        return p, log, m

    def chances(self, steps, combined: bool, who: np.ndarray, t: float) -> list:
        """The per-cycle probabilities of `steps` (a row's moves, or events one by one)."""
        row = [self.weigh(step, who, t) for step in steps]
        if combined:
            return competing(row)
        return [np.where(m == 1.0, p, separate(log, m)) if np.ndim(m) else
                (p if m == 1.0 else separate(log, m)) for p, log, m in row]

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
    plans = state_plans(model, names)
    read = sorted({0} | {step[1] for _, _, events, _ in plans for step in events})
    column = {purpose: j for j, purpose in enumerate(read)}  # purpose -> row of the draws
    starts = np.asarray(plan.start_states(model, streams.uniforms(seed, ids, plan.START_PURPOSE),
                                          mult),
                        np.int64).reshape(-1)
    batch = _Batch(model, mult, starts)
    records = [(np.arange(len(ids)), 0.0, START, starts, START)]  # (patients, time, from, to, risk)
    absorbing = model.absorbing
    live = [i for i in range(model.n_states) if not absorbing[i]]
    alive = np.flatnonzero(~absorbing[starts])
    cycle = model.cycle
    draws = None
    on_points = np.empty((len(ids), model.n_cycles + 1), np.int16)  # the state at each point
    on_points[:, 0] = starts
    for n in range(model.n_cycles):
        if alive.size == 0:
            on_points[:, n:] = batch.state[:, None]  # everyone stays where they are
            break
        if n % BLOCK == 0:  # (purposes, cycles, patients) of the next block of cycles
            draws = streams.lanes(seed, ids, [names[j] for j in read], n // BLOCK)
        lane = n % BLOCK
        t = n * cycle
        end = t + cycle
        state = batch.state
        here = state[alive]
        for i in live:
            who = alive[here == i]
            if who.size == 0:
                continue
            moves, remainder, events, combined = plans[i]
            u = draws[0, lane, who]
            risk = np.full(who.size, START, np.int64)
            target = np.full(who.size, i, np.int64)
            total = 0.0
            for step, p in zip(moves, batch.chances(moves, combined, who, t)):
                total = total + p
                taken = (risk == START) & (u < total)
                risk[taken], target[taken] = step[0], step[2]
            if moves and not np.max(total) <= LIMIT:
                first = np.flatnonzero(~(np.broadcast_to(total, who.shape) <= LIMIT))[0]
                raise overflow(row_name(model, i), float(np.broadcast_to(total, who.shape)[first]),
                               f"patient {ids[who[first]]}", n)
            if remainder is not None:
                rest = risk == START
                risk[rest], target[rest] = remainder
            happened = [(step[0], who[draws[column[step[1]], lane, who] < p])
                        for step, p in zip(events, batch.chances(events, False, who, t))]
            for r, hit in happened:
                records.append((hit, end, i, i, r))
                batch.occur(hit, r, end)
            moved = target != i
            records.append((who[moved], end, i, target[moved], risk[moved]))
            for r in np.unique(risk[moved]).tolist():
                batch.occur(who[moved & (risk == r)], r, end)
            batch.duration[who] = np.where(moved, 0, batch.duration[who] + 1)
            state[who[moved]] = target[moved]
        alive = alive[~absorbing[state[alive]]]
        on_points[:, n + 1] = state
    return from_records(records, len(ids), on_points)

