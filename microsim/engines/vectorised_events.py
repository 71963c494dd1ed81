"""The vectorised event engine: the SimPy event engine's rules and draws, one round at a
time for every live patient of the batch.

`microsim.engines.event_engine` runs one process per patient; here a step is one round of
every live patient, each in its own state: numpy computes each risk's latent times over
the patients in its state (the hazard families' array code), and the compiled loops of
`microsim.engines.event_kernels` do what goes patient by patient (the draws, multipliers
and change points, the winner, the outcome). A round is what it is there: every risk of
the state gets a latent time by inverting its cumulative hazard from occurrence k of its
purpose (k = the patient's count of rounds in that state, rounds ended by a change point
included), the earliest wins unless a change point (a treatment window opening or
closing, a `within` memory window running out) or the horizon comes first, and then
memory, clocks and state move on. The copies of a state in a treatment phase read its
purposes and continue its count of rounds (`plan.round_owners`), so the Philox blocks a
patient holds are kept per state and its copies together. A wait for treatment
(`BoundModel.delay`) ends at each patient's deadline, which is one more change point of
its waiting copies: reached first, it moves the patient to the treated copy (a phase
change, as the event engine records it). Patients who are absorbed or reach the horizon
leave the live set, so a step costs work in proportion to the patients still running, and
memory holds a few numbers and one Philox block (four draws) per purpose of each state a
patient, however long the horizon.

The two engines agree record for record (patient, from, to, risk), and on times within
floating-point tolerance, not bit for bit: numpy's vectorised exp, log1p and power may differ
from Python's `math` in the last bit, and the numerical root of a Weibull or log-logistic
hazard under an attained-age effect is found here by `solve_growing_array` (Gauss-Legendre
and Newton), there by quadrature and Brent's method. Measured on the models of
tests/test_vectorised_events.py: recorded times agree within 4e-15 relative for closed forms
and about 1e-12 with numerical roots (the scalar solver's own accuracy); the tests hold them to
1e-12 and 1e-9, and `TIE` is wider still. Where two outcomes of a round (two latent times, or
a latent time and the change point or horizon) lie within TIE of each other, their order
could hang on those last bits, so that patient's round is decided by the event engine's own
scalar code (`event_engine.latent_time`) instead: a near-tie is never resolved by this
engine's arithmetic. The compiled loops add no difference of their own: they call no exp,
log or power, only exactly rounded +, -, * and comparisons in the order of the event
engine's arithmetic, and their draws are the streams' numbers bit for bit (the logarithm
of the draws is numpy's, on arrays, as in the event engine).
"""
from __future__ import annotations

from math import inf

import numpy as np

from microsim.binding import BoundModel
from microsim.hazards import HazardFamily, TimeScaledHazard
from microsim.patients.multipliers import Multipliers
from microsim import streams
from microsim.engines import event_kernels, plan
from microsim.engines.event_engine import latent_time
from microsim.engines.histories import START, Histories, from_records

TIE = 1e-9  # relative to the time: outcomes closer than this are decided by the scalar code


class _Batch:
    """A batch's fixed inputs (multipliers, risk plans, draws) and every patient's running
    state (state, clocks, rounds per state, memory), as arrays over the batch."""

    def __init__(self, model: BoundModel, mult: Multipliers, ids: np.ndarray, seed: int):
        self.end = float(model.n_cycles * model.cycle)
        self.absorbing = np.asarray(model.absorbing, bool)
        purposes = plan.risk_purposes(model)
        tracked = plan.tracked_names(model)
        self.memory = plan.memory_terms(model, tracked)
        self.mult = mult
        self.views = plan.risk_views(model, mult)
        self.levels = plan.level_views(self.views, mult)  # risk -> (a view per row, rows)
        self.level_row = {r: np.asarray(row, np.int64) for r, (_, row) in self.levels.items()}
        self.ratios = [mult.time_ratios(r) for r in range(len(model.risks))]
        self.targets = np.array([r.source if r.target is None else r.target
                                 for r in model.risks], np.int64)
        self.from_state = [[r for r, risk in enumerate(model.risks) if risk.source == i]
                           for i in range(model.n_states)]
        self.risk_arrays = [np.asarray(risks, np.int64) for risks in self.from_state]
        # a numerical root (no closed form under a growing multiplier) needs a search limit
        numerical = [bool(v.slope) and type(
            v.hazard if r not in self.levels else self.levels[r][0][0].hazard
        ).time_to_reach_growing_array is HazardFamily.time_to_reach_growing_array
                     for r, v in enumerate(self.views)]
        self.numerical = [any(numerical[r] for r in risks) for risks in self.from_state]
        # the risk at position j of state i's risks, at i * width + j
        self.width = max(1, *map(len, self.from_state))
        self.risk_at = np.zeros(model.n_states * self.width, np.int64)
        for i, risks in enumerate(self.from_state):
            self.risk_at[i * self.width:i * self.width + len(risks)] = risks
        bumps = plan.bumps(model, tracked)
        # whether each risk's occurrence counts for each tracked name
        self.bumps = np.array([[t in b for t in range(len(tracked))] for b in bumps],
                              bool).reshape(len(bumps), len(tracked))
        n, window = len(ids), mult.window
        self.static = np.exp(mult.log_static).T.copy()  # (risk, patient): the event engine's
        self.age0 = np.zeros(n) if mult.entry_age is None else np.asarray(mult.entry_age, float)
        self.on = np.full(n, inf) if window is None else np.asarray(window.on, float)
        self.off = np.full(n, inf) if window is None else np.asarray(window.off, float)
        self.plans = self.risk_plans()
        # draws: the purpose keys of each state and its copies (held by the state whose
        # rounds they continue), each state's risks' places among them, and each patient's
        # Philox blocks of them
        self.seed, self.ids = np.uint64(seed), ids.astype(np.uint64)
        self.owners = np.asarray(plan.round_owners(model), np.int64)
        names = [dict() for _ in range(model.n_states)]  # owner -> {purpose: place}
        for i, risks in enumerate(self.from_state):
            for r in risks:
                names[self.owners[i]].setdefault(purposes[r], len(names[self.owners[i]]))
        self.keys = [np.array([streams.purpose_id(p) for p in held], np.uint64) for held in names]
        self.slots = [np.array([names[self.owners[i]][purposes[r]] for r in risks], np.int64)
                      for i, risks in enumerate(self.from_state)]
        self.blocks = [np.empty((n, len(held), 4)) for held in names]
        self.cached = [np.full((n, len(held)), -1, np.int64) for held in names]
        starts = np.asarray(plan.start_states(
            model, streams.uniforms(seed, ids, plan.START_PURPOSE), mult), np.int64).reshape(-1)
        self.state = starts
        self.counts, self.last = plan.initial_memory_arrays(model, tracked, starts)
        self.now, self.entered = np.zeros(n), np.zeros(n)
        self.waiting = model.waiting
        self.delay = float(model.delay)
        self.delay_to = (np.arange(model.n_states) if model.delay_to is None
                         else model.delay_to).astype(np.int64)
        self.deadline = np.where(self.waiting[starts], self.delay, inf)
        self.rounds = np.zeros((model.n_states, n), np.int64)  # the owners' rows are used
        self.records = [(np.arange(n), 0.0, START, starts.copy(), START)]

    def risk_plans(self) -> event_kernels.RiskPlans:
        """Every risk's multiplier inputs as `event_kernels.multipliers` reads them."""
        terms = [term for terms in self.memory for term in terms]
        tables = [np.asarray(() if counts is None else counts, float)
                  for _, counts, _, _ in terms]
        return event_kernels.RiskPlans(
            self.static, self.on, self.off,
            windowed=np.array([v.on_factor is not None for v in self.views], bool),
            on_factor=np.array([1.0 if v.on_factor is None else v.on_factor for v in self.views]),
            off_factor=np.array([1.0 if v.off_factor is None else v.off_factor
                                 for v in self.views]),
            term_ptr=np.cumsum([0] + [len(terms) for terms in self.memory], dtype=np.int64),
            counted=np.array([counts is not None for _, counts, _, _ in terms], bool),
            tracked=np.array([index for index, _, _, _ in terms], np.int64),
            within=np.array([0.0 if w is None else w for _, _, w, _ in terms]),
            factor=np.array([1.0 if f is None else f for _, _, _, f in terms]),
            table_ptr=np.cumsum([0] + [t.size for t in tables], dtype=np.int64),
            tables=np.concatenate([np.empty(0)] + tables))

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
        if view.rate is not None and not view.slope:
            return e / (m * view.rate)  # e > 0, so a rate of 0 gives inf, as there
        a = (now if view.clock == "since_start" else
             now - self.entered.take(rows) if view.clock == "since_entry"
             else self.age0.take(rows) + now)
        hazard = view.hazard if self.ratios[r] is None else \
            TimeScaledHazard(view.hazard, self.ratios[r].take(rows))
        if view.slope:
            return hazard.time_to_reach_growing_array(
                e, a, m * np.exp(view.slope * now), view.slope, limit)
        return hazard.time_to_reach_array(e / m, a)

    def step(self, live: np.ndarray) -> np.ndarray:
        """One round for every live patient, each in its own state; returns the patients
        still live after it."""
        n, state = live.size, self.state.take(live)
        now = self.now.take(live)
        # (position among the state's risks, patient); a state with no risk keeps inf, so
        # the horizon comes first
        times, draws = np.full((self.width, n), inf), np.empty((self.width, n))
        change = np.full(n, self.end)
        for i in np.flatnonzero(np.bincount(state)).tolist():
            risks = self.from_state[i]
            pos = np.flatnonzero(state == i)
            rows, at = live.take(pos), now.take(pos)
            if self.waiting[i]:  # the deadline ends the wait, whatever happens before it
                change[pos] = np.minimum(self.end, self.deadline.take(rows))
            if not risks:
                continue
            g = self.owners[i]
            u = event_kernels.draws(self.seed, self.keys[g], self.slots[i], self.ids, rows,
                                    self.rounds[g], self.cached[g], self.blocks[g])
            e = -np.log(u)  # numpy's logarithm on an array, as the event engine's draws
            draws[:len(risks), pos] = e
            m, off, bound = event_kernels.multipliers(self.risk_arrays[i], rows, at,
                                                      change.take(pos), self.plans,
                                                      self.counts, self.last)
            change[pos] = bound
            # how far a numerical root must be searched: just past the change point
            limit = bound - at + 2.0 * TIE * bound if self.numerical[i] else inf
            for j, r in enumerate(risks):
                t = self.latent(r, rows, e[j], m[j], at, limit)
                times[j, pos] = t if self.views[r].on_factor is None else np.where(off[j], inf, t)
        best, first, close = event_kernels.choose(times, now, change, TIE)
        if close.any():
            self.decide_by_scalar_code(live, state, np.flatnonzero(close), draws, now, first,
                                       best, change)
        records, live = event_kernels.settle(
            live, state, first, best, change, now, self.end, self.width, self.risk_at,
            self.targets, self.bumps, self.absorbing, self.now, self.state, self.entered,
            self.counts, self.last, self.waiting, self.delay_to, self.deadline, self.delay)
        self.records.append(records)
        return live

    def decide_by_scalar_code(self, live, state, close, draws, now, first, best, change):
        """Rounds whose outcome is a near-tie, decided by `event_engine.latent_time` exactly
        as the event engine decides them (in place: first, best, change)."""
        for p in close.tolist():
            b = int(live[p])
            counts = self.counts[:, b].tolist()
            last = [None if np.isnan(x) else x for x in self.last[:, b].tolist()]
            window = (float(self.on[b]), float(self.off[b]))
            t, entered, age0 = float(now[p]), float(self.entered[b]), float(self.age0[b])
            soonest, winner, bound = inf, 0, min(self.end, self.deadline[b]) if self.waiting[
                state[p]] else self.end
            views = plan.patient_views(self.views, self.levels, self.mult, b)
            for j, r in enumerate(self.from_state[state[p]]):
                dt, bound = latent_time(views[r], float(draws[j, p]), float(self.static[r, b]),
                                        t, entered, age0, self.memory[r], counts, last, bound,
                                        window)
                if dt < soonest:
                    soonest, winner = dt, j
            first[p], best[p], change[p] = winner, soonest, bound


def simulate_events_vectorised(model: BoundModel, mult: Multipliers, patient_ids: np.ndarray,
                               seed: int) -> Histories:
    """Run one batch of patients through the rate model, a round at a time; the histories of
    `microsim.engines.event_engine.simulate_events` for the same arguments (see the module
    docstring for the tolerance on times)."""
    ids = np.asarray(patient_ids)
    batch = _Batch(model, mult, ids, seed)
    live = np.flatnonzero(~batch.absorbing[batch.state])
    with np.errstate(divide="ignore", invalid="ignore"):  # inf - inf, e / 0: as in Python
        while live.size:
            live = batch.step(live)
    return from_records(batch.records, len(ids))
