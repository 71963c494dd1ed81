"""The compiled cycle engine: the SimPy cycle engine's rules and draws, one patient after
another in machine code.

`microsim.engines.cycle_engine` runs one SimPy process per patient and is the readable
reference; this engine runs the same loop for a whole batch, compiled by numba, and returns
the same histories record for record and bit for bit. What keeps the floats identical:

- the draws are the same numbers: `philox_compiled` evaluates the streams' Philox for the
  (patient, purpose, cycle) a patient reads, and only those (nothing is drawn for a patient
  once absorbed, nor for purposes its state does not read);
- each multiplier is built in the reference's order (static part, age factor, treatment
  factor, memory factors); the age factor exp(slope * t) is one number per risk and cycle,
  from `math.exp` here as there;
- the per-cycle probabilities come from the same compiled functions
  (`microsim.hazards.cycle_probabilities.separate_one` and `competing_scale`), whose Python
  originals the SimPy engine calls: both evaluate `math.expm1`, the C library's. A
  chance is worked out again only when its argument changed since it was last worked out
  (each risk's m L, each row's R): a function of the same number is the same number, so
  keeping the last one changes no bit and saves most of the `expm1` calls.

The model is laid out once per batch as flat arrays (`layout`): each state's moves and
events, each risk's base values by band and level, multipliers, memory terms and what an
occurrence advances. Records go into buffers that grow when a patient could overflow them,
already grouped by patient and in time order.
"""
from __future__ import annotations

from math import exp
from typing import NamedTuple

import numpy as np
from numba import njit

from microsim import streams
from microsim.binding import BoundModel
from microsim.engines import plan
from microsim.engines.cycle_engine import AXES, MOVE, row_name
from microsim.engines.histories import START, Histories
from microsim.engines.philox_compiled import first_units, open_unit, philox_block
from microsim.hazards.cycle_probabilities import LIMIT, competing_scale, overflow, separate_one
from microsim.patients.multipliers import Multipliers
from microsim.scenario.spec import COMPETING, TableSpec

NO_BAND, COUNT, WITHIN = -1, 0, 1


class _Rows(NamedTuple):
    """Per state: its moves and events (risk numbers, CSR), the competing rule, the
    remainder (risk, target; -1 for none), the countdown's next state, absorbing."""
    move_ptr: np.ndarray
    moves: np.ndarray
    event_ptr: np.ndarray
    events: np.ndarray
    combined: np.ndarray
    remainder_risk: np.ndarray
    remainder_target: np.ndarray
    stay_to: np.ndarray
    absorbing: np.ndarray


class _Risks(NamedTuple):
    """Per risk: target, where a cycle's end state goes when it happens (the identity but
    for an event that moves the treatment phase on, `BoundModel.phase_on`), draw slot, base
    values and L by (level row, band), the band's axis and starts, the multipliers' static
    part, age factor per cycle and treatment factors, memory terms (CSR) and the tracked
    names an occurrence advances (CSR)."""
    target: np.ndarray
    phase_on: np.ndarray  # (risks, states)
    slot: np.ndarray
    value_ptr: np.ndarray
    n_bands: np.ndarray
    values: np.ndarray
    logs: np.ndarray
    band_axis: np.ndarray
    start_ptr: np.ndarray
    starts: np.ndarray
    level_row: np.ndarray  # (risks, patients): a table by level's row, else 0
    static: np.ndarray  # (patients, risks)
    sloped: np.ndarray
    age_factor: np.ndarray  # (risks, cycles)
    windowed: np.ndarray
    on_factor: np.ndarray
    off_factor: np.ndarray
    memory_ptr: np.ndarray
    memory_index: np.ndarray
    memory_kind: np.ndarray
    memory_within: np.ndarray
    memory_multiplier: np.ndarray
    factor_ptr: np.ndarray  # memory term -> its multipliers by count (COUNT terms)
    factors: np.ndarray
    bump_ptr: np.ndarray
    bumps: np.ndarray


class _Patients(NamedTuple):
    """Per patient: id, entry age, treatment window; the draw keys of the slots."""
    ids: np.ndarray
    age0: np.ndarray
    on: np.ndarray
    off: np.ndarray
    seed: np.uint64
    keys: np.ndarray  # (slots,) purpose ids: slot 0 is the move


def _csr(groups) -> tuple[np.ndarray, np.ndarray]:
    sizes = [len(g) for g in groups]
    flat = [x for g in groups for x in g]
    return np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64), flat


def layout(model: BoundModel, mult: Multipliers, ids: np.ndarray, seed: int):
    """The model and the batch as the kernel reads them (see the classes above)."""
    n_risks, size = len(model.risks), mult.size
    purposes = plan.risk_purposes(model)
    event_purposes = sorted({purposes[r] for r, risk in enumerate(model.risks) if risk.is_event})
    slot = [1 + event_purposes.index(purposes[r]) if risk.is_event else 0
            for r, risk in enumerate(model.risks)]
    moves, events, combined, rem_risk, rem_target = [], [], [], [], []
    for i in range(model.n_states):
        row = [] if model.absorbing[i] else [r for r, risk in enumerate(model.risks)
                                             if risk.source == i]
        rem = [r for r in row if model.risks[r].remainder]
        moves.append([r for r in row if not model.risks[r].remainder and not model.risks[r].is_event])
        events.append([r for r in row if model.risks[r].is_event])
        combined.append(model.probability_rule == COMPETING and len(moves[-1]) > 1)
        rem_risk.append(rem[0] if rem else -1)
        rem_target.append(model.risks[rem[0]].target if rem else -1)
    move_ptr, move_flat = _csr(moves)
    event_ptr, event_flat = _csr(events)
    stay_to = np.arange(model.n_states) if model.stay_to is None else model.stay_to
    rows = _Rows(move_ptr, np.array(move_flat, np.int64), event_ptr, np.array(event_flat, np.int64),
                 np.array(combined), np.array(rem_risk, np.int64), np.array(rem_target, np.int64),
                 np.asarray(stay_to, np.int64), np.asarray(model.absorbing, bool))

    levels = plan.level_plans(mult)
    values, logs, value_ptr, n_bands, axis, starts = [], [], [], [], [], []
    level_row = np.zeros((n_risks, size), np.int64)
    for r, risk in enumerate(model.risks):
        value_ptr.append(len(values))
        probability = risk.probability
        bands = None
        if isinstance(probability, TableSpec) and probability.by is not None:
            bands = (AXES[probability.by], list(probability.starts))
        if r in levels:
            by_row, log_rows, row = levels[r]
            level_row[r] = row
            values += [v for v in by_row for v in v]
            logs += [x for x in log_rows for x in x]
            n_bands.append(len(by_row[0]))
        elif risk.remainder or probability is None:
            values.append(np.nan), logs.append(np.nan), n_bands.append(1)
        else:
            base = list(probability.values) if isinstance(probability, TableSpec) else [probability]
            values += base
            logs += list(risk.logs)
            n_bands.append(len(base))
        axis.append(NO_BAND if bands is None else bands[0])
        starts.append([] if bands is None else bands[1])
    start_ptr, start_flat = _csr(starts)

    tracked = plan.tracked_names(model)
    memory = plan.memory_terms(model, tracked)
    memory_ptr, terms = _csr(memory)
    factor_ptr, factor_flat = _csr([() if term[1] is None else term[1] for term in terms])
    bump_ptr, bump_flat = _csr(plan.bumps(model, tracked))
    window = mult.window
    on_factor = np.ones(n_risks) if window is None else np.asarray(window.on_factor, float)
    off_factor = np.ones(n_risks) if window is None else np.asarray(window.off_factor, float)
    slopes = mult.age_slope.tolist()
    age_factor = np.ones((n_risks, max(model.n_cycles, 1)))  # exp(slope * t) as the reference
    for r, slope in enumerate(slopes):
        if slope:
            age_factor[r] = [exp(slope * (n * model.cycle)) for n in range(age_factor.shape[1])]
    windowed = np.array([window is not None and window.on_factor[r] != window.off_factor[r]
                         for r in range(n_risks)], bool).reshape(-1)
    phase_on = (np.tile(np.arange(model.n_states), (n_risks, 1)) if model.phase_on is None
                else model.phase_on)
    risks = _Risks(
        np.array([-1 if risk.target is None else risk.target for risk in model.risks], np.int64),
        np.ascontiguousarray(phase_on, np.int64),
        np.array(slot, np.int64), np.array(value_ptr, np.int64), np.array(n_bands, np.int64),
        np.array(values, float), np.array(logs, float), np.array(axis, np.int64),
        start_ptr, np.array(start_flat, float), level_row,
        np.exp(mult.log_static),  # plan.static_multipliers' numbers
        np.array([s != 0.0 for s in slopes]), age_factor, windowed, on_factor, off_factor, memory_ptr,
        np.array([term[0] for term in terms], np.int64),
        np.array([COUNT if term[1] is not None else WITHIN for term in terms], np.int64),
        np.array([np.nan if term[2] is None else term[2] for term in terms], float),
        np.array([np.nan if term[3] is None else term[3] for term in terms], float),
        factor_ptr, np.array(factor_flat, float), bump_ptr, np.array(bump_flat, np.int64))

    age0 = np.zeros(size) if mult.entry_age is None else np.asarray(mult.entry_age, float)
    on = np.full(size, np.inf) if window is None else np.asarray(window.on, float)
    off = np.full(size, np.inf) if window is None else np.asarray(window.off, float)
    keys = np.array([streams.purpose_id(p) for p in (MOVE, *event_purposes)], np.uint64)
    patients = _Patients(np.asarray(ids).astype(np.uint64), age0, on, off,
                         np.uint64(int(seed)), keys)
    return rows, risks, patients, len(tracked)


@njit(cache=True, nogil=True, _nrt=False)
def _band(risks, r, t, age, in_state, hints):
    """The band of risk r's table at time t, as `bisect_right(starts, x) - 1`, at least 0.
    `hints[r]` is the band found last: a patient's age and time only grow, so it usually
    still holds, and checking it costs two comparisons where the search costs several
    unpredictable branches."""
    axis = risks.band_axis[r]
    if axis == NO_BAND:
        return 0
    x = t if axis == 0 else (age if axis == 1 else in_state)
    first, n = risks.start_ptr[r], risks.start_ptr[r + 1] - risks.start_ptr[r]
    k = hints[r]
    if (k == 0 or risks.starts[first + k] <= x) and (k == n - 1 or x < risks.starts[first + k + 1]):
        return k
    lo, hi = first, first + n
    while lo < hi:
        mid = (lo + hi) // 2
        if x < risks.starts[mid]:
            hi = mid
        else:
            lo = mid + 1
    hints[r] = max(lo - first - 1, 0)
    return hints[r]


@njit(cache=True, nogil=True, _nrt=False, inline="always")
def base_index(risks, r, b, t, age, in_state, hints):
    """Where risk r's base value and L for patient b at time t sit in `risks.values` and
    `risks.logs`: its level row's run, at the band of the time, age or time in state."""
    return (risks.value_ptr[r] + risks.level_row[r, b] * risks.n_bands[r]
            + _band(risks, r, t, age, in_state, hints))


@njit(cache=True, nogil=True, _nrt=False, inline="always")
def outer_multiplier(risks, r, b, n, t, on, off):
    """Risk r's multiplier for patient b at cycle n before memory: the static part, the
    age factor, the treatment factor, multiplied in that order."""
    m = risks.static[b, r]
    if risks.sloped[r]:
        m *= risks.age_factor[r, n]
    if risks.windowed[r]:
        m *= risks.on_factor[r] if on <= t < off else risks.off_factor[r]
    return m


@njit(cache=True, nogil=True, _nrt=False)
def _weigh(risks, r, b, n, t, age, in_state, on, off, counts, last, cycle, hints):
    """(base probability, L, multiplier) of risk r for patient b at cycle n, in the
    reference's order of operations (`cycle_engine.simulate_cycles`, weigh)."""
    k = base_index(risks, r, b, t, age, in_state, hints)
    m = outer_multiplier(risks, r, b, n, t, on, off)
    for j in range(risks.memory_ptr[r], risks.memory_ptr[r + 1]):
        index = risks.memory_index[j]
        if risks.memory_kind[j] == COUNT:
            lo, hi = risks.factor_ptr[j], risks.factor_ptr[j + 1]
            m *= risks.factors[lo + min(counts[b, index], hi - lo - 1)]
        elif t - last[b, index] < risks.memory_within[j] - 1e-9 * cycle:  # nan: never
            m *= risks.memory_multiplier[j]
    return risks.values[k], risks.logs[k], m


@njit(cache=True, nogil=True, _nrt=False)
def _chance(risks, r, b, n, t, age, in_state, on, off, counts, last, cycle, memo, hints):
    """Risk r's chance by the separate rule for patient b at cycle n: its base value where
    the multiplier is 1, else `separate_one`, a function of m L alone. `memo` keeps each
    risk's last m L and chance, so a chance that does not change from one cycle (or
    patient) to the next costs no `expm1`: the same argument gives the same number."""
    p, log, m = _weigh(risks, r, b, n, t, age, in_state, on, off, counts, last, cycle, hints)
    if m == 1.0:
        return p
    if m * log != memo[0, r]:
        memo[0, r], memo[1, r] = m * log, separate_one(log, m)
    return memo[1, r]


@njit(cache=True, nogil=True, _nrt=False)
def _run(rows, risks, people, cycle, n_cycles, limit, per_patient, start, counts, last, first,
         on_points, rec_patient, rec_time, rec_source, rec_target, rec_risk, n_rec, scratch):
    """Simulate patients first.. of the batch until done or until the record buffers could
    overflow. Returns (next patient, records used, failed patient or -1, its cycle, its
    row's total): a caller grows the buffers and calls again from the next patient.

    Compiled without numba's reference counting (`_nrt=False`, so nothing is allocated
    here: `scratch` holds the working arrays): counting references to the many arrays of
    the layout cost more than the arithmetic."""
    size = start.size
    words, held, chances, weights, hits, memo, scales, hints = scratch
    for b in range(first, size):
        if n_rec + per_patient > rec_time.size:
            return b, n_rec, -1, 0, 0.0
        held[:] = -1
        state, in_cycles = start[b], 0
        on, off, age0 = people.on[b], people.off[b], people.age0[b]
        rec_patient[n_rec], rec_time[n_rec], rec_source[n_rec] = b, 0.0, START
        rec_target[n_rec], rec_risk[n_rec] = state, START
        n_rec += 1
        on_points[b, 0] = state
        for n in range(n_cycles):
            if rows.absorbing[state]:
                on_points[b, n + 1:] = state
                break
            t = n * cycle
            age = age0 + t
            in_state = in_cycles * cycle
            block, lane = n // 4, n % 4
            lo, hi = rows.move_ptr[state], rows.move_ptr[state + 1]
            total_weight = 0.0
            for j in range(lo, hi):
                if rows.combined[state]:
                    _, log, m = _weigh(risks, rows.moves[j], b, n, t, age, in_state, on, off,
                                       counts, last, cycle, hints)
                    weights[j - lo] = log * m
                    total_weight += weights[j - lo]  # 0 + w is w: the reference's sum
                else:
                    chances[j - lo] = _chance(risks, rows.moves[j], b, n, t, age, in_state,
                                              on, off, counts, last, cycle, memo, hints)
            if rows.combined[state]:
                if total_weight != scales[0, state]:  # the row's last R and scale, kept
                    scales[0, state] = total_weight
                    scales[1, state] = competing_scale(total_weight)
                scale = scales[1, state]
                for j in range(lo, hi):
                    chances[j - lo] = weights[j - lo] * scale
            if held[0] != block:
                philox_block(people.ids[b], np.uint64(block), people.seed, people.keys[0], words[0])
                held[0] = block
            u = open_unit(words[0, lane])
            chosen, total = -1, 0.0
            for j in range(lo, hi):
                total += chances[j - lo]
                if chosen < 0 and u < total:
                    chosen = rows.moves[j]
            if not total <= limit:
                return b, n_rec, b, n, total
            target = state
            if chosen >= 0:
                target = risks.target[chosen]
            elif rows.remainder_risk[state] >= 0:
                chosen, target = rows.remainder_risk[state], rows.remainder_target[state]
            end = t + cycle
            n_hits = 0  # every weight of the cycle is taken before memory moves on
            for j in range(rows.event_ptr[state], rows.event_ptr[state + 1]):
                r = rows.events[j]
                chance = _chance(risks, r, b, n, t, age, in_state, on, off, counts, last,
                                 cycle, memo, hints)
                s = risks.slot[r]
                if held[s] != block:
                    philox_block(people.ids[b], np.uint64(block), people.seed, people.keys[s],
                                 words[s])
                    held[s] = block
                if open_unit(words[s, lane]) < chance:
                    hits[n_hits] = r
                    n_hits += 1
            for q in range(n_hits):
                rec_patient[n_rec], rec_time[n_rec], rec_source[n_rec] = b, end, state
                rec_target[n_rec], rec_risk[n_rec] = state, hits[q]
                n_rec += 1
                _occur(risks, hits[q], b, end, counts, last)
            if chosen >= 0 and target != state:
                target = _phase_after(risks, hits, n_hits, target)
                rec_patient[n_rec], rec_time[n_rec], rec_source[n_rec] = b, end, state
                rec_target[n_rec], rec_risk[n_rec] = target, chosen
                n_rec += 1
                _occur(risks, chosen, b, end, counts, last)
                state, in_cycles = target, 0
            else:
                in_cycles += 1
                if rows.stay_to[state] != state:  # a countdown's cycle
                    rec_patient[n_rec], rec_time[n_rec], rec_source[n_rec] = b, end, state
                    rec_target[n_rec], rec_risk[n_rec] = rows.stay_to[state], START
                    n_rec += 1
                    state = rows.stay_to[state]
                moved = _phase_after(risks, hits, n_hits, state)
                if moved != state:  # an event moved the treatment phase on
                    rec_patient[n_rec], rec_time[n_rec], rec_source[n_rec] = b, end, state
                    rec_target[n_rec], rec_risk[n_rec] = moved, START
                    n_rec += 1
                    state = moved
            on_points[b, n + 1] = state
    return size, n_rec, -1, 0, 0.0


@njit(cache=True, nogil=True, _nrt=False)
def _phase_after(risks, hits, n_hits, state):
    """The state a cycle that ended in `state` ends in once the events `hits` happened
    (`cycle_engine.simulate_cycles`, phase_after)."""
    for q in range(n_hits):
        state = risks.phase_on[hits[q], state]
    return state


@njit(cache=True, nogil=True, _nrt=False)
def _occur(risks, r, b, end, counts, last):
    """Risk r happened to patient b at `end`: the memory it advances moves on."""
    for j in range(risks.bump_ptr[r], risks.bump_ptr[r + 1]):
        counts[b, risks.bumps[j]] += 1
        last[b, risks.bumps[j]] = end


def simulate_cycles_compiled(model: BoundModel, mult: Multipliers, patient_ids: np.ndarray,
                             seed: int) -> Histories:
    """Run one batch of patients through the cycle model; the same histories as
    `microsim.engines.cycle_engine.simulate_cycles` for the same arguments."""
    ids = np.asarray(patient_ids)
    rows, risks, people, n_tracked = layout(model, mult, ids, seed)
    start = np.asarray(plan.start_states(model, first_units(
        people.ids, people.seed, np.uint64(streams.purpose_id(plan.START_PURPOSE))), mult),
        np.int64).reshape(-1)
    counts, last = (np.ascontiguousarray(a.T).reshape(len(ids), n_tracked)
                    for a in plan.initial_memory_arrays(model, plan.tracked_names(model), start))
    on_points = np.empty((len(ids), model.n_cycles + 1), np.int16)
    # at most a start, and per cycle every event of the state and a move, or a countdown
    # step and a phase moved on by an event
    per_patient = 1 + model.n_cycles * (2 + max(np.diff(rows.event_ptr), default=0))
    buffers = _buffers(4 * len(ids) + per_patient)
    slots, row_length = len(people.keys), max(len(rows.moves), len(rows.events), 1)
    scratch = (np.empty((slots, 4), np.uint64),  # the words of a Philox block per slot,
               np.empty(slots, np.int64),  # and the block they are from
               np.empty(row_length), np.empty(row_length), np.empty(row_length, np.int64),
               np.full((2, len(model.risks)), np.nan),  # each risk's last m L and chance,
               np.full((2, model.n_states), np.nan),  # each row's last R and scale,
               np.zeros(len(model.risks), np.int64))  # and each risk's last band
    first, used = 0, 0
    while True:
        first, used, failed, cycle, total = _run(
            rows, risks, people, float(model.cycle), model.n_cycles, LIMIT, per_patient, start,
            counts, last, first, on_points, *buffers, used, scratch)
        if failed >= 0:
            raise overflow(row_name(model, int(on_points[failed, cycle])), float(total),
                           f"patient {ids[failed]}", int(cycle))
        if first == len(ids):
            break
        buffers = tuple(np.concatenate([a[:used], np.empty(len(a), a.dtype)]) for a in buffers)
    patient, time, source, target, risk = (a[:used] for a in buffers)
    return Histories(patient, time, source, target, risk, len(ids), on_points)


def _buffers(capacity: int):
    """Room for `capacity` records: patient row, time, from state, to state, risk."""
    return (np.empty(capacity, np.int64), np.empty(capacity), np.empty(capacity, np.int16),
            np.empty(capacity, np.int16), np.empty(capacity, np.int32))
