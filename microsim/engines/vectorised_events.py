"""The vectorised event engine: the SimPy event engine's rules and draws, one round at a
time for every live patient of the batch.

`microsim.engines.event_engine` runs one process per patient; here a round is a handful of
numpy operations over the live patients in each state. A round is what it is there: every
risk of the state gets a latent time by inverting its cumulative hazard from occurrence k
of its purpose (k = the patient's count of rounds in that state, rounds ended by a change
point included), the earliest wins unless a change point (a treatment window opening or
closing, a `within` memory window running out) or the horizon comes first, and then memory,
clocks and state move on. Patients who are absorbed or reach the horizon leave the live set,
so a round costs work in proportion to the patients still running, and memory holds a few
numbers and two windows of draws a patient, however long the horizon.

The two engines agree record for record (patient, from, to, risk), and on times within
floating-point tolerance, not bit for bit: numpy's vectorised exp, log1p and power may differ
from Python's `math` in the last bit, and the numerical root of a Weibull or log-logistic
hazard under an attained-age effect is found here by `solve_growing_array` (Gauss-Legendre
and Newton), there by quadrature and Brent's method. Measured on the models of
tests/test_vectorised_events.py: recorded times agree within 4e-15 relative for closed forms
and 1e-12 with numerical roots (the scalar solver's own accuracy); the tests hold them to
1e-12 and 1e-9, and `TIE` is wider still. Where two outcomes of a round (two latent times, or
a latent time and the change point or horizon) lie within TIE of each other, their order
could hang on those last bits, so that patient's round is decided by the event engine's own
scalar code (`event_engine.latent_time`) instead: a near-tie is never resolved by this
engine's arithmetic.
"""
from __future__ import annotations

from math import inf

import numpy as np

from microsim.binding import BoundModel
from microsim.hazards import HazardFamily, TimeScaledHazard
from microsim.patients.multipliers import Multipliers
from microsim import streams
from microsim.engines import plan
from microsim.engines.event_engine import DEPTH, latent_time
from microsim.engines.histories import START, Histories, from_records

TIE = 1e-9  # relative to the time: outcomes closer than this are decided by the scalar code
DRAW_CHUNK = 1024  # patients per call of the generator: its arrays then stay in cache
LOOKAHEAD = DEPTH // 8  # rounds before its last draw at which a patient gets the next window


class _Draws:
    """Occurrence k of each of a state's risks' purposes, as -log u, for patients in their
    k-th round there.

    `streams.block` gives occurrences 0..n-1 with all four words of each Philox block;
    `streams.uniforms` any occurrence, at a whole block per draw. So every patient gets its
    first DEPTH occurrences from `block` (the event engine's precomputed block), and later
    ones in windows of DEPTH: from `block` while that costs no more than `uniforms` (up to
    the fourth window), fetched ahead in bulk: when a patient runs out, every patient of the
    state within LOOKAHEAD rounds of its last draw gets its next window, so the generator is
    called once in LOOKAHEAD rounds or less, not every round, for patients who are about to
    use what it gives; memory holds two windows a patient.
    """

    def __init__(self, seed: int, ids: np.ndarray, purposes: list[str]):
        self.seed, self.ids, self.purposes = seed, ids, purposes
        n = len(ids)
        self.first = np.empty((len(purposes), n * DEPTH))  # (risk, patient * DEPTH + k)
        table = self.first.reshape(len(purposes), n, DEPTH)
        for lo in range(0, n if purposes else 0, DRAW_CHUNK):
            u = self.fetch(ids[lo:lo + DRAW_CHUNK], 0)
            table[:, lo:lo + DRAW_CHUNK] = -np.log(u).transpose(1, 0, 2)
        self.later = None  # (risk, patient * 2 DEPTH + place): two windows past the first
        self.ends = np.full(n, DEPTH)  # occurrences fetched so far, per patient

    def fetch(self, ids: np.ndarray, start: int) -> np.ndarray:
        """(patient, risk, DEPTH) uniforms of occurrences start .. start + DEPTH - 1."""
        if start <= 3 * DEPTH:  # (start + DEPTH) / 4 blocks: no more than DEPTH
            return streams.block(self.seed, ids, self.purposes, start + DEPTH)[:, :, start:]
        occurrences = start + np.arange(DEPTH)
        return np.stack([streams.uniforms(self.seed, ids[:, None], p, occurrences)
                         for p in self.purposes], axis=1)

    def take(self, rows: np.ndarray, k: np.ndarray) -> np.ndarray:
        """(risk, patient) draws for rows in round k."""
        if k.max() < DEPTH:
            return self.first.take(rows * DEPTH + k, axis=1)
        if np.any(k >= self.ends[rows]):
            self.fetch_ahead(rows[k >= self.ends[rows] - LOOKAHEAD])
        first = self.first.take(rows * DEPTH + np.minimum(k, DEPTH - 1), axis=1)
        place = np.maximum(k - DEPTH, 0)
        later = self.later.take(rows * (2 * DEPTH) + place // DEPTH % 2 * DEPTH + place % DEPTH,
                                axis=1)
        return np.where(k < DEPTH, first, later)

    def fetch_ahead(self, rows: np.ndarray):
        """The next window of draws for these patients, into the slot of the one before last."""
        if self.later is None:
            self.later = np.empty((len(self.purposes), len(self.ids) * 2 * DEPTH))
        starts = self.ends[rows]
        for start in np.unique(starts).tolist():
            group = rows[starts == start]
            slot = (start - DEPTH) // DEPTH % 2 * DEPTH
            for lo in range(0, group.size, DRAW_CHUNK):
                part = group[lo:lo + DRAW_CHUNK]
                places = (part[:, None] * (2 * DEPTH) + slot + np.arange(DEPTH)).ravel()
                e = -np.log(self.fetch(self.ids[part], start)).transpose(1, 0, 2)
                self.later[:, places] = e.reshape(len(self.purposes), -1)
        self.ends[rows] += DEPTH


class _Batch:
    """A batch's fixed inputs (multipliers, risk plans, draws) and every patient's running
    state (state, clocks, rounds per state, memory), as arrays over the batch."""

    def __init__(self, model: BoundModel, mult: Multipliers, ids: np.ndarray, seed: int):
        self.seed, self.ids, self.end = seed, ids, model.n_cycles * model.cycle
        purposes = plan.risk_purposes(model)
        tracked = plan.tracked_names(model)
        self.memory = plan.memory_terms(model, tracked)
        self.count_multipliers = {term: np.asarray(term[1], float) for terms in self.memory
                                  for term in terms if term[1] is not None}
        self.mult = mult
        self.views = plan.risk_views(model, mult)
        self.levels = plan.level_views(self.views, mult)  # risk -> (a view per row, rows)
        self.level_row = {r: np.asarray(row, np.int64) for r, (_, row) in self.levels.items()}
        self.ratios = [mult.time_ratios(r) for r in range(len(model.risks))]
        # a numerical root (no closed form under a growing multiplier) needs a search limit
        self.numerical = [bool(v.slope) and type(
            v.hazard if r not in self.levels else self.levels[r][0][0].hazard
        ).time_to_reach_growing_array is HazardFamily.time_to_reach_growing_array
                          for r, v in enumerate(self.views)]
        self.targets = np.array([r.source if r.target is None else r.target
                                 for r in model.risks], np.int64)
        self.from_state = [[r for r, risk in enumerate(model.risks) if risk.source == i]
                           for i in range(model.n_states)]
        self.risk_index = [np.asarray(risks, np.int64) for risks in self.from_state]
        bumps = plan.bumps(model, tracked)
        # per state: (tracked name, positions of the state's risks whose occurrence counts)
        self.bumps = [[(t, js) for t in range(len(tracked))
                       if (js := [j for j, r in enumerate(risks) if t in bumps[r]])]
                      for risks in self.from_state]
        n, window = len(ids), mult.window
        self.static = np.exp(mult.log_static).T.copy()  # (risk, patient): the event engine's
        self.age0 = np.zeros(n) if mult.entry_age is None else np.asarray(mult.entry_age, float)
        self.on = np.full(n, inf) if window is None else np.asarray(window.on, float)
        self.off = np.full(n, inf) if window is None else np.asarray(window.off, float)
        self.draws = [_Draws(seed, ids, [purposes[r] for r in risks])
                      for risks in self.from_state]
        starts = np.asarray(plan.start_states(
            model, streams.uniforms(seed, ids, plan.START_PURPOSE), mult), np.int64).reshape(-1)
        self.state = starts
        self.counts, self.last = plan.initial_memory_arrays(model, tracked, starts)
        self.now, self.entered = np.zeros(n), np.zeros(n)
        self.rounds = np.zeros((model.n_states, n), np.int64)
        self.records = [(np.arange(n), 0.0, START, starts.copy(), START)]

    def multiplier(self, r: int, rows, now, change):
        """Risk r's multiplier now, in the event engine's order of operations; the change
        points it brings; and where the treatment window makes it 0 (the risk is off)."""
        view, m, off = self.views[r], self.static[r].take(rows), None
        if view.on_factor is not None:
            on, stop = self.on[rows], self.off[rows]
            active = (on <= now) & (now < stop)
            m = m * np.where(active, view.on_factor, view.off_factor)
            change = np.where(active, np.minimum(change, stop),
                              np.where(now < on, np.minimum(change, on), change))
            off = m == 0.0
        for term in self.memory[r]:
            index, multipliers, within, factor = term
            if multipliers is not None:
                table = self.count_multipliers[term]
                m = m * table.take(np.minimum(self.counts[index].take(rows), len(table) - 1))
            else:
                ends = self.last[index].take(rows) + within  # nan: no occurrence yet
                inside = now < ends
                m = np.where(inside, m * factor, m)
                counted = inside if off is None else inside & ~off
                change = np.where(counted, np.minimum(change, ends), change)
        return m, change, off

    def latent(self, r: int, rows, e, m, now, limit) -> np.ndarray:
        """Time from now to risk r for each patient: the event engine's `latent_time` (a
        table by level: each level's patients with their level's hazard)."""
        if r not in self.levels:
            return self.latent_by(r, self.views[r], rows, e, m, now, limit)
        out = np.empty(rows.size)
        row = self.level_row[r].take(rows)
        for j, view in enumerate(self.levels[r][0]):
            mine = row == j
            if mine.any():
                m_, now_, limit_ = (x[mine] if np.ndim(x) else x for x in (m, now, limit))
                out[mine] = self.latent_by(r, view, rows[mine], e[mine], m_, now_, limit_)
        return out

    def latent_by(self, r: int, view, rows, e, m, now, limit) -> np.ndarray:
        """`latent` for the patients `rows` that share the view of risk r."""
        a = (now if view.clock == "since_start" else
             now - self.entered.take(rows) if view.clock == "since_entry"
             else self.age0.take(rows) + now)
        hazard = view.hazard if self.ratios[r] is None else \
            TimeScaledHazard(view.hazard, self.ratios[r].take(rows))
        if view.slope:
            return hazard.time_to_reach_growing_array(
                e, a, m * np.exp(view.slope * now), view.slope, limit)
        if view.rate is not None:
            return e / (m * view.rate)  # e > 0, so a rate of 0 gives inf, as there
        return hazard.time_to_reach_array(e / m, a)

    def round(self, i: int, rows: np.ndarray) -> np.ndarray:
        """One round in state i for patient rows `rows`; returns the rows that reached the
        horizon."""
        risks = self.from_state[i]
        k = self.rounds[i].take(rows)
        self.rounds[i][rows] = k + 1
        if not risks:  # no way out and no event: the patient stays to the horizon
            return rows
        now = self.now.take(rows)
        change = self.end  # an array once some risk brings change points
        parts = []
        for r in risks:
            m, change, off = self.multiplier(r, rows, now, change)
            parts.append((m, off))
        # how far a numerical root must be searched: just past the change point
        limit = (change - now + 2.0 * TIE * change
                 if any(self.numerical[r] for r in risks) else inf)
        draws = self.draws[i].take(rows, k)
        best = first = runner_up = None
        for j, (r, (m, off)) in enumerate(zip(risks, parts)):
            t = self.latent(r, rows, draws[j], m, now, limit)
            if off is not None:
                t = np.where(off, inf, t)
            if j == 0:  # nan, which `dt < best` never takes, as inf
                best, first = np.fmin(t, inf), np.zeros(rows.size, np.int64)
            else:  # the event engine's `dt < best`: the first of equal times wins
                better = t < best
                runner_up = np.fmax(best, t) if j == 1 else np.fmin(runner_up, np.fmax(best, t))
                first = np.where(better, j, first)
                best = np.fmin(best, t)
        reached = now + best
        close = np.abs(reached - change) <= TIE * change
        if runner_up is not None:
            close |= runner_up - best <= TIE * reached
        if close.any():
            change = np.broadcast_to(change, rows.shape).copy()
            self.decide_by_scalar_code(i, rows, np.flatnonzero(close), draws, now, first,
                                       best, change)
            reached = now + best
        happens = reached < change
        self.now[rows] = np.where(happens, reached, change)
        self.occur(i, rows[happens], first[happens], reached[happens])
        return rows[~happens & (change >= self.end)]

    def decide_by_scalar_code(self, i, rows, close, draws, now, first, best, change):
        """Rounds whose outcome is a near-tie, decided by `event_engine.latent_time` exactly
        as the event engine decides them (in place: first, best, change)."""
        for p in close.tolist():
            b = int(rows[p])
            counts = self.counts[:, b].tolist()
            last = [None if np.isnan(x) else x for x in self.last[:, b].tolist()]
            window = (float(self.on[b]), float(self.off[b]))
            t, entered, age0 = float(now[p]), float(self.entered[b]), float(self.age0[b])
            soonest, winner, bound = inf, 0, self.end
            views = plan.patient_views(self.views, self.levels, self.mult, b)
            for j, r in enumerate(self.from_state[i]):
                dt, bound = latent_time(views[r], float(draws[j][p]), float(self.static[r, b]),
                                        t, entered, age0, self.memory[r], counts, last, bound,
                                        window)
                if dt < soonest:
                    soonest, winner = dt, j
            first[p], best[p], change[p] = winner, soonest, bound

    def occur(self, i: int, who, first, at):
        """Record the occurrences (the winners: positions among state i's risks) and move
        memory, clocks and states on."""
        winner = self.risk_index[i].take(first)
        target = self.targets.take(winner)
        self.records.append((who, at, i, target, winner))
        for index, positions in self.bumps[i]:
            hit = first == positions[0] if len(positions) == 1 else np.isin(first, positions)
            self.counts[index][who[hit]] += 1
            self.last[index][who[hit]] = at[hit]
        moved = target != i
        self.state[who[moved]] = target[moved]
        self.entered[who[moved]] = at[moved]


def simulate_events_vectorised(model: BoundModel, mult: Multipliers, patient_ids: np.ndarray,
                               seed: int) -> Histories:
    """Run one batch of patients through the rate model, a round at a time; the histories of
    `microsim.engines.event_engine.simulate_events` for the same arguments (see the module
    docstring for the tolerance on times)."""
    ids = np.asarray(patient_ids)
    batch = _Batch(model, mult, ids, seed)
    absorbing = model.absorbing
    states = np.flatnonzero(~absorbing).tolist()
    live = np.flatnonzero(~absorbing[batch.state])
    done = np.zeros(len(ids), bool)
    with np.errstate(divide="ignore", invalid="ignore"):  # inf - inf, e / 0: as in Python
        while live.size:
            state = batch.state[live]
            for i in states:
                rows = live[state == i]
                if rows.size:
                    done[batch.round(i, rows)] = True
            live = live[~done[live] & ~absorbing[batch.state[live]]]
    return from_records(batch.records, len(ids))
