"""The capacity engine: patients as SimPy processes that share SimPy resources.

Each patient lives on its own clock (0 at arrival) exactly as in the event engine: the k-th
round of latent times in a state reads occurrence k of each risk's purpose, the earliest
wins, and change points (memory windows, treatment) start a new round
(`microsim.engines.event_engine`, whose draws and arithmetic this engine reuses). What is
new happens where a patient would enter a state that holds a unit of a resource: with a
free unit it enters; without one it waits in the resource's first waiting state (or is
turned away when the queue is full), where its own risks keep running, until the
resource admits it, it gives up, or a risk takes it out of the queue. A patient who holds
a unit gives it back when it leaves the state, or loses it to a higher class when the
resource pre-empts (its service then starts afresh; for exponential service times that is
the same in law as resuming it).

So where no resource ever runs out, nobody waits and every history is the event engine's,
draw for draw; `tests/test_capacity_engine.py` checks that.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from math import inf

import numpy as np
import pandas as pd
import simpy

from microsim.capacity.binding import BoundResource, CapacityModel
from microsim.capacity.resources import SharedResource, Ticket, give_back, keep_capacity
from microsim.engines import plan
from microsim.engines.event_engine import Batch, latent_time
from microsim.engines.histories import START, Histories, Recorder
from microsim.patients.multipliers import Multipliers

# the risk column of moves a resource makes (the model's risks are 0, 1, ...; START is -1)
ADMITTED, TURNED_AWAY, GAVE_UP, PREEMPTED = -2, -3, -4, -5
MOVES = {ADMITTED: "admitted", TURNED_AWAY: "turned away", GAVE_UP: "gave up waiting",
         PREEMPTED: "pre-empted"}
# how a visit (one time a patient needs a unit) ends
SERVED, LEFT, TURNED, WAITING = 0, 1, 2, 3
CHUNK = 2000  # patients whose draws are prepared together


class Ledger:
    """What happened at one resource: each visit (a patient needing a unit: when it asked,
    when that ended, how, in which class) and each hold of a unit (patient, from, to)."""

    def __init__(self):
        self.visits: list[list] = []
        self.holds: list[list] = []

    def visit(self, patient: int, time: float, klass: int) -> list:
        row = [patient, time, inf, WAITING, klass]
        self.visits.append(row)
        return row

    def hold(self, patient: int, time: float) -> list:
        row = [patient, time, inf]
        self.holds.append(row)
        return row

    def log(self) -> "ResourceLog":
        visits = np.array(self.visits, float).reshape(-1, 5)
        holds = np.array(self.holds, float).reshape(-1, 3)
        return ResourceLog(visits[:, 0].astype(np.int64), visits[:, 1], visits[:, 2],
                           visits[:, 3].astype(np.int8), visits[:, 4].astype(np.int64),
                           holds[:, 0].astype(np.int64), holds[:, 1], holds[:, 2])


@dataclass(frozen=True)
class ResourceLog:
    """A resource's visits and holds in calendar time; `inf` ends are still open at the end
    of the run (still waiting, still holding)."""
    patient: np.ndarray
    asked: np.ndarray
    ended: np.ndarray
    outcome: np.ndarray  # SERVED, LEFT, TURNED, WAITING
    klass: np.ndarray  # priority class at joining (0 first)
    holder: np.ndarray
    held_from: np.ndarray
    held_to: np.ndarray


@dataclass(frozen=True)
class ServiceRun:
    """One replication: its patients in arrival order, their histories on their own clocks
    (time since arrival) and what happened at each resource."""
    replication: int
    patients: pd.DataFrame  # ids and attributes
    arrival: np.ndarray  # calendar time of each patient's arrival
    histories: Histories
    mult: Multipliers
    logs: tuple[ResourceLog, ...]
    end: float
    cut_at: float | None = None  # when a limit on arrivals stopped them (else None)


@dataclass
class Station:
    """A resource while a service runs: the SimPy resource, its rule, its ledger."""
    spec: BoundResource
    resource: SharedResource
    classes: np.ndarray | None  # each patient's class under a priority by attribute
    ledger: Ledger = field(default_factory=Ledger)
    waiting: int = 0

    def klass(self, b: int, state: int) -> int:
        if self.spec.priority_states:
            return self.spec.priority_states.index(state)
        return 0 if self.classes is None else int(self.classes[b])


def priority_classes(resource: BoundResource, patients: pd.DataFrame) -> np.ndarray | None:
    """Each patient's class (0 first) under a priority by an attribute's levels."""
    if resource.priority_attribute is None:
        return None
    column = patients[resource.priority_attribute]
    if column.dtype == bool:
        column = column.map({True: "yes", False: "no"})
    return column.astype(str).map({level: k for k, level in
                                   enumerate(resource.priority_levels)}).to_numpy(np.int64)


class Draws:
    """A patient's rounds of latent times, drawn as the event engine draws them: batches of
    CHUNK patients prepared on first use (`event_engine.Batch`)."""

    def __init__(self, cm: CapacityModel, mult: Multipliers, ids: np.ndarray, seed: int):
        self.model, self.mult, self.ids, self.seed = cm.model, mult, ids, seed
        self.batches: dict[int, Batch] = {}
        window = mult.window
        self.risks = [plan.RiskView(risk, float(mult.age_slope[r]),
                                    *((window.on_factor[r], window.off_factor[r])
                                      if window is not None
                                      and window.on_factor[r] != window.off_factor[r]
                                      else (None, None)))
                      for r, risk in enumerate(cm.model.risks)]

    def patient(self, b: int) -> "PatientDraws":
        c, row = divmod(b, CHUNK)
        if c not in self.batches:
            part = slice(c * CHUNK, (c + 1) * CHUNK)
            self.batches[c] = Batch(self.model, self.mult.take(part), self.ids[part], self.seed)
        return PatientDraws(self.batches[c], row, self.mult, b, self.risks)

    def next_round(self, p: "PatientDraws", state: int, k: int, now: float, entered: float,
                   counts, last, end: float) -> tuple[float, int | None, float]:
        """(time to the earliest risk, the risk, the next change point) of round k."""
        batch = p.batch
        if batch.simple[state]:
            times = p.times[state]
            if times is None:
                return inf, None, end
            if k == len(times):
                more_times, more_winners = batch.more_rounds(p.row, state, k, k)
                times += more_times
                p.winners[state] += more_winners
            return times[k], p.winners[state][k], end
        best, winner, change = inf, None, end
        for r in batch.from_state[state]:
            draws = p.draws[r]
            if k == len(draws):
                draws += batch.more_draws(p.row, r, k, k)
            dt, change = latent_time(p.views[r], draws[k], p.static[r], now, entered, p.age0,
                                     batch.memory[r], counts, last, change, p.window)
            if dt < best:
                best, winner = dt, r
        return best, winner, change


class PatientDraws:
    __slots__ = ("batch", "row", "times", "winners", "draws", "static", "window", "age0",
                 "start", "views")

    def __init__(self, batch: Batch, row: int, mult: Multipliers, b: int, views):
        self.batch, self.row = batch, row
        self.views = plan.patient_views(views, {}, mult, b)  # with the patient's time ratios
        self.times = [t[row] if t else None for t in batch.times]
        self.winners = [w[row] if w else None for w in batch.winners]
        self.draws = {r: d[row] for r, d in batch.draws.items()}
        self.static = batch.statics[row].tolist()
        window = mult.window
        self.window = (inf, inf) if window is None else (float(window.on[b]),
                                                         float(window.off[b]))
        self.age0 = 0.0 if mult.entry_age is None else float(mult.entry_age[b])
        self.start = batch.starts[row]


class Service:
    """One replication of the service in one SimPy environment."""

    def __init__(self, cm: CapacityModel, patients: pd.DataFrame, arrival: np.ndarray,
                 mult: Multipliers, seed: int):
        model = cm.model
        self.env = env = simpy.Environment()
        self.cm, self.arrival, self.end = cm, arrival, cm.end
        self.draws = Draws(cm, mult, patients["patient"].to_numpy(), seed)
        self.stations = []
        for spec in cm.resources:
            resource = SharedResource(env, spec.capacity.most, spec.preemptive)
            if not spec.capacity.constant:
                env.process(keep_capacity(env, resource, spec.capacity))
            self.stations.append(Station(spec, resource, priority_classes(spec, patients)))
        self.holder = [cm.holder(s) for s in range(model.n_states)]
        self.queue = [cm.queue_of(s) for s in range(model.n_states)]
        self.targets = [r.source if r.target is None else r.target for r in model.risks]
        self.absorbing = model.absorbing.tolist()
        self.tracked = plan.tracked_names(model)
        self.name_bumps = [tuple(i for i, t in enumerate(self.tracked) if t == r.name)
                           for r in model.risks]
        self.state_bumps = [tuple(i for i, t in enumerate(self.tracked) if t == name)
                            for name in model.states]
        self.record = Recorder(len(patients))

    def run(self) -> None:
        self.env.process(self.source())
        with plan.paused_gc():
            self.env.run()

    def source(self):
        """Patients enter at their arrival times, in order."""
        env = self.env
        for b, t in enumerate(self.arrival.tolist()):
            if t > env.now:
                yield env.timeout(t - env.now)
            env.process(self.patient(b))

    def gate(self, b: int, target: int):
        """Where a patient who would enter `target` now goes: into it (with a unit when it
        holds one), else into the queue's first waiting state, or where patients turned away
        go; returns (state, station, ticket, row) where row is the hold or the visit."""
        now = self.env.now
        while (k := self.holder[target]) is not None:
            station = self.stations[k]
            spec = station.spec
            visit = station.ledger.visit(b, now, station.klass(b, spec.waiting[0]))
            ticket = Ticket(station.resource, visit[4], now)
            if ticket.triggered:
                visit[2], visit[3] = now, SERVED
                return target, station, ticket, station.ledger.hold(b, now)
            if spec.queue_limit is not None and station.waiting >= spec.queue_limit:
                give_back(ticket)
                visit[2], visit[3] = now, TURNED
                target = spec.turned_away
                continue
            station.waiting += 1
            return spec.waiting[0], station, ticket, visit
        return target, None, None, None

    def patient(self, b: int):
        env, draws, record = self.env, self.draws, self.record.rows[b].append
        p = draws.patient(b)
        arrival = float(self.arrival[b])
        end = self.end - arrival  # on the patient's own clock
        absorbing, targets, queue = self.absorbing, self.targets, self.queue
        state, station, ticket, row = self.gate(b, p.start)
        counts, last = plan.initial_memory(self.cm.model, self.tracked, state)
        record((0.0, START, state, START))
        rounds = [0] * len(absorbing)
        now = entered = 0.0

        def bump(indices, at):
            for i in indices:
                counts[i] += 1
                last[i] = at

        while not absorbing[state]:
            k = rounds[state]
            rounds[state] = k + 1
            dt, winner, change = draws.next_round(p, state, k, now, entered, counts, last, end)
            risky = now + dt < change
            waiting = queue[state] is not None
            if waiting or (station is not None and station.spec.preemptive):
                # a resource can end this sojourn too: wait for it up to the end of the run
                limit = now + dt if risky else change
                give_up = None
                if waiting and station.spec.patience is not None:
                    give_up = row[1] - arrival + station.spec.patience
                    if give_up < limit:
                        limit = give_up
                timed_out = limit >= end
                if timed_out:
                    limit = end
                delay = max(limit - now, 0.0)  # a patience already spent by round-off
                try:
                    if waiting:
                        yield ticket | env.timeout(delay)
                    else:
                        yield env.timeout(delay)
                except simpy.Interrupt:  # pre-empted (the resource took the unit): queue again
                    row[2] = env.now
                    now = entered = env.now - arrival
                    spec = station.spec
                    row = station.ledger.visit(b, env.now, station.klass(b, spec.waiting[0]))
                    ticket = Ticket(station.resource, row[4], env.now)
                    station.waiting += 1
                    state = spec.waiting[0]
                    record((now, spec.state, state, PREEMPTED))
                    bump(self.state_bumps[state], now)
                    continue
                if waiting and ticket.triggered:  # admitted
                    station.waiting -= 1
                    row[2], row[3] = env.now, SERVED
                    row = station.ledger.hold(b, env.now)
                    now = entered = env.now - arrival
                    record((now, state, station.spec.state, ADMITTED))
                    state = station.spec.state
                    bump(self.state_bumps[state], now)
                    continue
                if timed_out:
                    return
                if give_up is not None and limit == give_up:
                    station.waiting -= 1
                    give_back(ticket)
                    row[2], row[3] = env.now, LEFT
                    before, now = state, give_up
                    state, station, ticket, row = self.gate(b, station.spec.leave_to)
                    record((now, before, state, GAVE_UP))
                    entered = now
                    bump(self.state_bumps[state], now)
                    continue
                if not risky:
                    now = change
                    continue
                now += dt
            else:
                if not risky:
                    if change >= end:
                        return
                    yield env.timeout(change - now)
                    now = change
                    continue
                yield env.timeout(dt)
                now += dt
            target = targets[winner]
            bump(self.name_bumps[winner], now)
            if target == state:  # an event: the patient stays, in the queue too
                record((now, state, state, winner))
                continue
            if waiting and queue[target] == queue[state]:  # moves on within the queue
                record((now, state, target, winner))
                klass = station.klass(b, target)
                if klass != row[4]:  # a new class keeps the time the patient joined
                    give_back(ticket)
                    ticket = Ticket(station.resource, klass, row[1])
                    row[4] = klass
                state = target
            else:
                if waiting:  # out of the queue
                    station.waiting -= 1
                    row[3] = LEFT
                if station is not None:
                    give_back(ticket)
                    row[2] = env.now
                before = state
                state, station, ticket, row = self.gate(b, target)
                record((now, before, state, winner))
            entered = now
            bump(self.state_bumps[state], now)


def simulate_service(cm: CapacityModel, patients: pd.DataFrame, arrival: np.ndarray,
                     mult: Multipliers, seed: int, replication: int = 0,
                     cut_at: float | None = None) -> ServiceRun:
    """Run one replication: `patients` (ids and attributes) arriving at `arrival`."""
    service = Service(cm, patients, arrival, mult, seed)
    service.run()
    return ServiceRun(replication, patients, arrival, service.record.histories(), mult,
                      tuple(s.ledger.log() for s in service.stations), cm.end, cut_at)
