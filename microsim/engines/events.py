"""The continuous-time SimPy engine: one process per patient, competing risks sampled exactly.

In each state every way out (and every event) gets a latent time by inverting its
cumulative hazard, given the patient's clocks, covariate multiplier and memory; the
earliest wins (the competing-risks construction of e.g. Beyersmann, Allignol & Schumacher
2012, "Competing Risks and Multistate Models with R", ch. 3). After every occurrence, and
when a time-limited memory effect runs out, all latent times are drawn afresh from the
residual distributions given survival so far, which is exact for independent risks.
"""
from __future__ import annotations

from math import exp, inf, log

import numpy as np
import simpy

from microsim.binding import BoundModel
from microsim.effects import Multipliers
from microsim.engines import plan
from microsim.engines.histories import START, Histories, Recorder

DEPTH = 32  # draws per purpose precomputed per patient; more are computed on demand


def state_plans(model: BoundModel, names: tuple[str, ...]) -> list[tuple]:
    """For each state: its risks as (risk, purpose, target, clock, constant rate or None,
    sampler, memory terms)."""
    tracked = plan.tracked_names(model)
    memory = plan.memory_terms(model, tracked)
    plans = []
    for i in range(model.n_states):
        rows = []
        for r, risk in enumerate(model.risks):
            if risk.source != i or model.absorbing[i]:
                continue
            constant = risk.family == "constant"
            rows.append((r, names.index(risk.name), i if risk.target is None else risk.target,
                         plan.CLOCKS[risk.clock], risk.params["rate"] if constant else None,
                         risk.hazard.sample_time, memory[r]))
        plans.append(tuple(rows))
    return plans


def simulate_events(model: BoundModel, mult: Multipliers, patient_ids: np.ndarray,
                    seed: int) -> Histories:
    """Run one batch of patients through the continuous-time model with SimPy."""
    names = plan.purposes(model)
    draws = plan.BatchDraws.make(seed, patient_ids, names, DEPTH)
    plans = state_plans(model, names)
    tracked = plan.tracked_names(model)
    bumps = plan.bumps(model, tracked)
    slopes = mult.age_slope.tolist()
    statics = plan.static_multipliers(mult)
    ages = [0.0] * len(patient_ids) if mult.entry_age is None else mult.entry_age.tolist()
    starts = plan.start_states(model, draws)
    absorbing = model.absorbing.tolist()
    end = model.n_cycles * model.cycle
    record = Recorder()
    env = simpy.Environment()
    timeout = env.timeout
    add_patient, add_time = record.patient.append, record.time.append
    add_source, add_target, add_risk = record.source.append, record.target.append, record.risk.append

    def patient(b: int):
        rows, used, static, age0 = draws.rows[b], [1] + [0] * (len(names) - 1), statics[b], ages[b]
        state, entered = starts[b], 0.0
        counts, last = plan.initial_memory(model, tracked, state)
        add_patient(b), add_time(0.0), add_source(START), add_target(state), add_risk(START)
        now = 0.0
        while not absorbing[state]:
            best, winner, change = inf, None, end
            for step in plans[state]:
                r, p, target, clock, rate, sample, memory = step
                k = used[p]
                used[p] = k + 1
                u = rows[p][k] if k < DEPTH else draws.spill(b, p, k)
                m = static[r]
                for index, multipliers, within, multiplier in memory:
                    if multipliers is not None:
                        m *= multipliers[min(counts[index], len(multipliers) - 1)]
                    elif last[index] is not None and now - last[index] < within:
                        m *= multiplier
                        change = min(change, last[index] + within)
                slope = slopes[r]
                if slope == 0.0 and rate is not None:
                    dt = -log(u) / (rate * m) if rate > 0.0 else inf
                else:
                    a = now if clock == 0 else (now - entered if clock == 1 else age0 + now)
                    dt = sample(u, m * exp(slope * now) if slope else m, a, slope)
                if dt < best:
                    best, winner = dt, step
            if now + best >= change:
                if change >= end:
                    return
                yield timeout(change - now)
                now = change
                continue
            yield timeout(best)
            now += best
            r, target = winner[0], winner[2]
            add_patient(b), add_time(now), add_source(state), add_target(target), add_risk(r)
            for index in bumps[r]:
                counts[index] += 1
                last[index] = now
            if target != state:
                state, entered = target, now

    for b in range(len(patient_ids)):
        env.process(patient(b))
    env.run()
    return record.histories(len(patient_ids))
