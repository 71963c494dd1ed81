"""The cycle SimPy engine: fixed steps with per-cycle probabilities.

Each cycle a patient takes one way out of its state, chosen by one uniform against the
cumulative probabilities (under the scenario's probability rule,
`microsim.hazards.cycle_probabilities`; the remainder takes what the others leave), and
each event of the state happens or not by its own uniform; counts and time in state then
move on. Under treatment phases a cycle end may also pass a patient to another copy of its
state: a countdown's cycle (`BoundModel.stay_to`), or an event that starts or stops
treatment (`BoundModel.phase_on`: the cycle ends in the next phase's copy of where the
move led). A row that sums above 1 is never capped: it raises, since the scenario checks
refuse every row that could.
These are exactly the rules of `microsim.cohort.cycle_matrices`, so the expected simulated trace
is the analytic one. Draws are keyed by cycle number (occurrence = cycle), so strategies
share them cycle by cycle (common random numbers).
"""
from __future__ import annotations

from bisect import bisect_right
from math import exp

import numpy as np
import simpy

from microsim.binding import BoundModel, BoundRisk
from microsim.patients.multipliers import Multipliers
from microsim import streams
from microsim.engines import plan
from microsim.engines.histories import START, Histories, Recorder
from microsim.hazards.cycle_probabilities import LIMIT, competing_scale, overflow, separate_one
from microsim.scenario.spec import COMPETING, TableSpec

# the Python originals of the compiled engine's functions: the same C library expm1
separate, scale_of = separate_one.py_func, competing_scale.py_func

MOVE = "cycle:move"
AXES = {"time": 0, "age": 1, "time_in_state": 2}


def base_values(risk: BoundRisk):
    """(values, logs, bands) of a risk's base probability: the value is values[band], band 0
    for a number, the band of (axis, starts) for a table (bands None for a number or a table
    by level alone); logs holds L = -ln(1 - p) of each value. A table by level has each
    patient's own values and logs (`plan.level_plans`), so None here."""
    probability = risk.probability
    if not isinstance(probability, TableSpec):
        return [probability], list(risk.logs), None
    bands = None if probability.by is None else (AXES[probability.by], list(probability.starts))
    if probability.attribute is not None:
        return None, None, bands
    return list(probability.values), list(risk.logs), bands


def state_plans(model: BoundModel, names: tuple[str, ...]):
    """For each state: (moves, remainder, events, competing); moves and events as
    (risk, purpose, target, values, logs, bands, memory) (see `base_values`). A row
    combines its moves by the competing rule when the model says so and it has two or
    more moves (with one move both rules agree)."""
    tracked = plan.tracked_names(model)
    memory = plan.memory_terms(model, tracked)
    plans = []
    for i in range(model.n_states):
        row = [] if model.absorbing[i] else [(r, risk) for r, risk in enumerate(model.risks)
                                             if risk.source == i]
        n_moves = sum(not risk.remainder and not risk.is_event for _, risk in row)
        combined = model.probability_rule == COMPETING and n_moves > 1
        moves, events, remainder = [], [], None
        for r, risk in row:
            if risk.remainder:
                remainder = (r, risk.target)
                continue
            step = (r, names.index(plan.risk_purpose(model, risk)), risk.target,
                    *base_values(risk), memory[r])
            (events if risk.is_event else moves).append(step)
        plans.append((tuple(moves), remainder, tuple(events), combined))
    return plans


def row_name(model: BoundModel, state: int) -> str:
    return f"transitions.{model.states[state]}->*"


def simulate_cycles(model: BoundModel, mult: Multipliers, patient_ids: np.ndarray,
                    seed: int) -> Histories:
    """Run one batch of patients through the cycle model with SimPy."""
    names = (MOVE, *plan.risk_purposes(model))
    draws = streams.block(seed, patient_ids, names, max(model.n_cycles, 1)).tolist()  # [b][p][cycle]
    plans = state_plans(model, names)
    tracked = plan.tracked_names(model)
    bumps = plan.bumps(model, tracked)
    slopes = mult.age_slope.tolist()
    statics = plan.static_multipliers(mult)
    levels = plan.level_plans(mult)
    ages = [0.0] * len(patient_ids) if mult.entry_age is None else mult.entry_age.tolist()
    starts = plan.start_states(model, streams.uniforms(seed, patient_ids, plan.START_PURPOSE),
                               mult)
    absorbing = model.absorbing.tolist()
    stay_to = None if model.stay_to is None else model.stay_to.tolist()
    phase_on = None if model.phase_on is None else model.phase_on.tolist()
    ids = np.asarray(patient_ids).tolist()
    cycle, n_cycles = model.cycle, model.n_cycles
    record = Recorder(mult.size)
    env = simpy.Environment()
    move_purpose = names.index(MOVE)

    window = mult.window
    windowed = [window is not None and window.on_factor[r] != window.off_factor[r]
                for r in range(len(model.risks))]
    on_factor = None if window is None else window.on_factor.tolist()
    off_factor = None if window is None else window.off_factor.tolist()
    windows = ([(np.inf, np.inf)] * mult.size if window is None
               else list(zip(window.on.tolist(), window.off.tolist())))

    def weigh(step, static, t, age, duration, counts, last, on, off, own):
        """(base probability, L, multiplier) of a risk for one patient now (`own`: the
        patient's rows of tables by level)."""
        r, _, _, values, logs, bands, memory = step
        if r in own:
            values, logs = own[r]
        k = 0
        if bands is not None:
            axis, starts = bands
            k = max(bisect_right(starts, (t, age, duration * cycle)[axis]) - 1, 0)
        m = static[r]
        if slopes[r]:
            m *= exp(slopes[r] * t)
        if windowed[r]:
            m *= on_factor[r] if on <= t < off else off_factor[r]
        for index, multipliers, within, multiplier in memory:
            if multipliers is not None:
                m *= multipliers[min(counts[index], len(multipliers) - 1)]
            elif last[index] is not None and t - last[index] < within - 1e-9 * cycle:
                # t and last are whole cycles: the tolerance keeps "less than within
                # has passed" exact when within is a whole number of cycles
                m *= multiplier
        return values[k], logs[k], m

    def add(b, t, source, target, r):
        record.rows[b].append((t, source, target, r))

    def phase_after(happened, state):
        """The state a cycle that ended in `state` ends in once its events have happened:
        its copy in the next phase after an event that moves the phase on (at most once)."""
        if phase_on is not None:
            for step in happened:
                state = phase_on[step[0]][state]
        return state

    def occur(b, t, source, target, r, counts, last):
        add(b, t, source, target, r)
        for index in bumps[r]:
            counts[index] += 1
            last[index] = t

    def patient(b: int):
        rows, static, age0 = draws[b], statics[b], ages[b]
        own = {r: (values[row[b]], logs[row[b]]) for r, (values, logs, row) in levels.items()}
        on, off = windows[b]
        state, duration = starts[b], 0
        counts, last = plan.initial_memory(model, tracked, state)
        add(b, 0.0, START, state, START)
        for n in range(n_cycles):
            if absorbing[state]:
                return
            t = n * cycle
            moves, remainder, events, combined = plans[state]
            age = age0 + t
            row = [weigh(step, static, t, age, duration, counts, last, on, off, own)
                   for step in moves]
            if combined:
                weights = [log * m for _, log, m in row]
                total = 0.0
                for weight in weights:
                    total += weight
                scale = scale_of(total)
                chances = [weight * scale for weight in weights]
            else:
                chances = [p if m == 1.0 else separate(log, m) for p, log, m in row]
            u = rows[move_purpose][n]
            chosen, total = None, 0.0
            for step, p in zip(moves, chances):
                total += p
                if chosen is None and u < total:
                    chosen = (step[0], step[2])
            if not total <= LIMIT:  # never capped (and a nan is caught too)
                raise overflow(row_name(model, state), total, f"patient {ids[b]}", n)
            if chosen is None:
                chosen = remainder
            happened = []
            for step in events:
                p, log, m = weigh(step, static, t, age, duration, counts, last, on, off, own)
                if rows[step[1]][n] < (p if m == 1.0 else separate(log, m)):
                    happened.append(step)
            end = t + cycle
            for step in happened:
                occur(b, end, state, state, step[0], counts, last)
            if chosen is not None and chosen[1] != state:
                target = phase_after(happened, chosen[1])
                occur(b, end, state, target, chosen[0], counts, last)
                state, duration = target, 0
            else:
                duration += 1
                if stay_to is not None and stay_to[state] != state:  # a countdown's cycle
                    add(b, end, state, stay_to[state], START)
                    state = stay_to[state]
                moved = phase_after(happened, state)
                if moved != state:  # an event moved the treatment phase on
                    add(b, end, state, moved, START)
                    state = moved
            yield env.timeout(cycle)

    for b in range(len(patient_ids)):
        env.process(patient(b))
    with plan.paused_gc():
        env.run()
    return record.histories()
