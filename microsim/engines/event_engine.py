"""The continuous-time SimPy engine: one process per patient, competing risks sampled exactly.

In each state every way out (and every event) gets a latent time by inverting its
cumulative hazard, given the patient's clocks, covariate multiplier and memory; the
earliest wins (the competing-risks construction of e.g. Beyersmann, Allignol & Schumacher
2012, "Competing Risks and Multistate Models with R", ch. 3). After every occurrence, and
when a time-limited memory effect runs out, all latent times are drawn afresh from the
residual distributions given survival so far, which is exact for independent risks.

Draws: the k-th round of draws in state i (k-th time the patient's latent times there
are drawn) uses occurrence k of each of i's risks' purposes. A copy of a state in a
treatment phase reads the state's purposes and counts its rounds with the state's other
copies (`plan.risk_purpose`, `plan.round_owners`): a patient whose phase changes after
round k of a state takes round k + 1 in the new copy, as it would in the state itself
under a strategy without phases. So where every way out of a
state is a constant rate, the winner and the time of every round can be computed for the
whole batch with numpy before SimPy starts, and the patient process only looks them up.
Draws are unit exponentials e = -log(u): a time to event solves m (H(a + s) - H(a)) = e.

A delay to treatment (`BoundModel.delay`) is a deterministic competitor: a patient entering
the waiting copies carries the deadline entry + delay, and in each round there the earliest
of the latent times and the deadline wins. The deadline winning moves the patient to the
treated copy of its state (recorded as a phase change, risk START: no event, no cost; the
time in state runs on), and the next round's latent times are drawn afresh as after any
round.
"""
from __future__ import annotations

from math import exp, inf

import numpy as np
import simpy

from microsim.binding import BoundModel
from microsim.patients.multipliers import Multipliers
from microsim import streams
from microsim.engines import plan
from microsim.engines.histories import START, Histories, Recorder

DEPTH = 32  # rounds per state precomputed per patient; later ones are drawn on demand
GROUP = 16  # patients simulated together in one SimPy environment


def latent_time(risk, e, m, now, entered, age0, memory, counts, last, change, window):
    """Time from now to a risk (the general path), and the next change point."""
    if risk.on_factor is not None:  # the strategy's treatment changes this risk
        on, off = window
        if on <= now < off:
            m *= risk.on_factor
            change = min(change, off)
        else:
            m *= risk.off_factor
            if now < on:
                change = min(change, on)
        if m == 0.0:
            return inf, change
    for index, multipliers, within, multiplier in memory:
        if multipliers is not None:
            m *= multipliers[min(counts[index], len(multipliers) - 1)]
        elif last[index] is not None and now < last[index] + within:
            # the same sum as the change point, so at the change point it is over
            m *= multiplier
            change = min(change, last[index] + within)
    clock = risk.clock
    a = now if clock == "since_start" else (now - entered if clock == "since_entry" else age0 + now)
    if slope := risk.slope:
        return risk.hazard.time_to_reach_growing(e, a, m * exp(slope * now), slope), change
    if risk.rate is not None:  # the same arithmetic as the precomputed rounds
        rate = m * risk.rate
        return (e / rate if rate > 0.0 else inf), change
    return risk.hazard.time_to_reach(e / m, a), change


class Batch:
    """Everything the patient processes of one batch read, precomputed with numpy."""

    def __init__(self, model: BoundModel, mult: Multipliers, patient_ids: np.ndarray, seed: int):
        self.model, self.seed, self.ids = model, seed, np.asarray(patient_ids)
        self.purposes = plan.risk_purposes(model)
        self.owners = plan.round_owners(model)
        self.tracked = plan.tracked_names(model)
        self.memory = plan.memory_terms(model, self.tracked)
        self.bumps = plan.bumps(model, self.tracked)
        self.slopes = mult.age_slope
        self.window = mult.window
        rates = np.array([r.params["rate"] if r.family == "constant" else np.nan
                          for r in model.risks])
        self.statics = np.exp(mult.log_static)
        self.rates = (self.statics * rates)  # multiplied rate of each constant risk
        self.from_state = [[r for r, risk in enumerate(model.risks) if risk.source == i]
                           for i in range(model.n_states)]
        # a state with no way out and no event is not simple: the general path keeps its
        # patients there to the horizon
        self.simple = [bool(rs) and all(self.is_simple(r) for r in rs) for rs in self.from_state]
        self.starts = plan.start_states(model, streams.uniforms(seed, self.ids, plan.START_PURPOSE),
                                        mult)
        # copies of a state share its purposes: each distinct one is drawn once
        distinct = tuple(dict.fromkeys(self.purposes))
        e = -np.log(streams.block(seed, self.ids, distinct, DEPTH))
        e = e[:, [distinct.index(p) for p in self.purposes]]  # (B, R, DEPTH)
        self.times, self.winners = self.simple_rounds(e)
        self.draws = {r: e[:, r].tolist() for rs, simple in zip(self.from_state, self.simple)
                      if not simple for r in rs}

    def is_simple(self, r: int) -> bool:
        risk = self.model.risks[r]
        return (risk.family == "constant" and not risk.memory and self.slopes[r] == 0.0
                and not self.windowed(r))

    def windowed(self, r: int) -> bool:
        w = self.window
        return w is not None and w.on_factor[r] != w.off_factor[r]

    def simple_rounds(self, e: np.ndarray):
        """For each all-constant state: time and winner of every precomputed round."""
        times, winners = [None] * self.model.n_states, [None] * self.model.n_states
        for i, rs in enumerate(self.from_state):
            if self.simple[i] and rs and not self.model.absorbing[i]:
                with np.errstate(divide="ignore"):
                    latent = e[:, rs] / self.rates[:, rs, None]  # (B, risks, DEPTH); inf at rate 0
                times[i] = latent.min(axis=1).tolist()
                winners[i] = np.asarray(rs)[latent.argmin(axis=1)].tolist()
        return times, winners

    def more_draws(self, b: int, r: int, start: int, reach: int) -> list[float]:
        """Occurrences start .. reach + 4 DEPTH - 1 of risk r's purpose for patient row b
        (a copy's rounds may start past its first draws: they continue the state's)."""
        u = streams.sequence(self.seed, int(self.ids[b]), self.purposes[r], start,
                             reach + 4 * DEPTH - start)
        return (-np.log(u)).tolist()

    def more_rounds(self, b: int, i: int, start: int, reach: int) -> tuple[list, list]:
        """Rounds start .. reach + 4 DEPTH - 1 of an all-constant state, for patient row b."""
        rs = self.from_state[i]
        with np.errstate(divide="ignore"):
            latent = (np.array([self.more_draws(b, r, start, reach) for r in rs])
                      / self.rates[b, rs, None])
        return latent.min(axis=0).tolist(), np.asarray(rs)[latent.argmin(axis=0)].tolist()


def simulate_events(model: BoundModel, mult: Multipliers, patient_ids: np.ndarray,
                    seed: int) -> Histories:
    """Run one batch of patients through the continuous-time model with SimPy."""
    batch = Batch(model, mult, patient_ids, seed)
    window = mult.window
    risks = plan.risk_views(model, mult)
    levels = plan.level_views(risks, mult)
    windows = ([(np.inf, np.inf)] * mult.size if window is None
               else list(zip(window.on.tolist(), window.off.tolist())))
    targets = [risk.source if risk.target is None else risk.target for risk in model.risks]
    simple, from_state = batch.simple, batch.from_state
    waiting = model.waiting.tolist()
    # a state with no way out and no event keeps its patients to the end, as if absorbing
    # (unless they wait there for treatment)
    final = [bool(a) or not (rs or w) for a, rs, w in zip(model.absorbing, from_state, waiting)]
    memory, bumps, tracked = batch.memory, batch.bumps, batch.tracked
    end = model.n_cycles * model.cycle
    statics = batch.statics.tolist()
    record = Recorder(mult.size)
    tracking = bool(tracked)
    delay_to = None if model.delay_to is None else model.delay_to.tolist()
    owners = batch.owners  # whose count of rounds each state continues

    def patient(b: int, timeout):
        times = [t[b] if t else None for t in batch.times]  # extended when used up
        winners = [w[b] if w else None for w in batch.winners]
        draws = {r: d[b] for r, d in batch.draws.items()}
        static = statics[b]
        views = plan.patient_views(risks, levels, mult, b)  # own level rows and time ratios
        age0 = 0.0 if mult.entry_age is None else float(mult.entry_age[b])
        rounds = [0] * model.n_states
        state, entered, now = batch.starts[b], 0.0, 0.0
        counts, last = plan.initial_memory(model, tracked, state)
        add = record.rows[b].append
        add((0.0, START, state, START))
        deadline = model.delay if waiting[state] else inf  # the end of a wait for treatment
        while not final[state]:
            k = rounds[owners[state]]
            rounds[owners[state]] = k + 1
            limit = min(end, deadline) if waiting[state] else end
            if simple[state]:  # a round computed beforehand; nothing changes within it
                if k >= len(times[state]):
                    more_times, more_winners = batch.more_rounds(b, state, len(times[state]), k)
                    times[state] += more_times
                    winners[state] += more_winners
                best, winner = times[state][k], winners[state][k]
                if now + best >= limit:
                    if limit >= end:
                        return
                    yield timeout(limit - now)
                    now = limit
                    state = pass_to_treatment(add, now, state)
                    continue
            else:
                best, winner, change = inf, None, limit
                for r in from_state[state]:
                    if k >= len(draws[r]):
                        draws[r] += batch.more_draws(b, r, len(draws[r]), k)
                    dt, change = latent_time(views[r], draws[r][k], static[r], now, entered,
                                             age0, memory[r], counts, last, change, windows[b])
                    if dt < best:
                        best, winner = dt, r
                if now + best >= change:
                    if change >= end:
                        return
                    yield timeout(change - now)
                    now = change
                    if waiting[state] and now == deadline:
                        state = pass_to_treatment(add, now, state)
                    continue
            yield timeout(best)
            now += best
            target = targets[winner]
            add((now, state, target, winner))
            if tracking:
                for index in bumps[winner]:
                    counts[index] += 1
                    last[index] = now
            if target != state:
                if waiting[target] and not waiting[state]:
                    deadline = now + model.delay
                state, entered = target, now

    def pass_to_treatment(add, now: float, state: int) -> int:
        """The wait's end: a phase change without a move, into the treated copy (the time
        in state runs on)."""
        add((now, state, delay_to[state], START))
        return delay_to[state]

    # Patients run in small groups, each in its own environment: the event queue stays
    # short (a heap of thousands of patients costs more than the model's arithmetic), and
    # results cannot depend on it because every draw is keyed by the patient.
    with plan.paused_gc():
        for lo in range(0, len(patient_ids), GROUP):
            env = simpy.Environment()
            for b in range(lo, min(lo + GROUP, len(patient_ids))):
                env.process(patient(b, env.timeout))
            env.run()
    return record.histories()
