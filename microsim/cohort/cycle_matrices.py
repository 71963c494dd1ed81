"""Cycle models: the per-cycle transition matrices a bound model implies, per patient.

Within a cycle a patient in expanded state (i, d, counts) takes one of the transitions out
of i (the "remainder" takes what the others leave) and, independently, each event of i
happens or not; counts and time-in-state then move on, and an event that starts or stops
treatment passes the patient to the next phase's copy of the cycle's end state
(`BoundModel.phase_on`). Covariate and memory multipliers act on the rate scale, each move
on its own, p' = 1 - (1 - p)^m (common practice; e.g. Briggs, Claxton & Sculpher 2006,
"Decision Modelling for Health Economic Evaluation", ch. 3), or, under the competing rule,
the row's moves combined through their rates (`microsim.hazards.cycle_probabilities`). The
cycle engines follow exactly these rules.
"""
from __future__ import annotations

import itertools
from typing import Callable

import numpy as np

from microsim.binding import BoundModel, BoundRisk
from microsim.cohort.expand import Expansion
from microsim.patients.multipliers import LevelRows, Multipliers
from microsim.hazards.cycle_probabilities import LIMIT, competing, overflow, separate
from microsim.scenario.spec import COMPETING, TableSpec


def table_band(table: TableSpec, time: float, age, time_in_state: float):
    """The band of a table at the point on its own axis (band i holds from starts[i]; a
    table by level alone has one band)."""
    if table.by is None:
        return 0
    x = {"time": time, "age": age, "time_in_state": time_in_state}[table.by]
    return np.maximum(np.searchsorted(np.asarray(table.starts), x, side="right") - 1, 0)


def on_rate_scale(p, log, m):
    """Apply hazard multiplier m to a per-cycle probability p (cumulative hazard L):
    1 - (1 - p)^m, the file's p itself where m is 1."""
    m = np.asarray(m, float)
    return np.where(m == 1.0, p, separate(log, m))


def risk_probability(risk: BoundRisk, band_at: Callable, duration: int,
                     rows: LevelRows | None = None):
    """Base per-cycle probability of a (non-remainder) risk for a batch of patients over a
    block of cycles, and its L = -ln(1 - p) (the competing rule's weight); `band_at(table,
    duration)` is the band of a table in each cycle for each patient (`table_band`);
    `rows`: the patients' rows of the risk's table by level."""
    base = risk.probability
    if not isinstance(base, TableSpec):
        return base, risk.logs[0]
    band = band_at(base, duration)
    if rows is not None:
        p = rows.band_values(band)
        with np.errstate(divide="ignore"):
            return p, -np.log1p(-p)
    return np.asarray(base.values)[band], np.asarray(risk.logs)[band]


def moves_phase(model: BoundModel, r: int) -> bool:
    """True when risk r is an event that moves the treatment phase on (`BoundModel.phase_on`
    is not the identity for it)."""
    return model.phase_on is not None and bool(
        np.any(model.phase_on[r] != np.arange(model.n_states)))


def cycle_matrices(exp: Expansion, n: int, mult: Multipliers):
    """Transition matrices (B, E, E) of cycle n and each risk's probability (B, E, R)."""
    moves, risk_p = cycle_moves(exp, np.array([n]), mult)
    P = np.zeros((exp.size, exp.size, risk_p.shape[3]))
    for e, f, weight in moves:
        P[e, f] += np.broadcast_to(weight, (1, P.shape[2]))[0]
    return np.moveaxis(P, 2, 0), np.moveaxis(risk_p[:, :, 0], 2, 0)


def cycle_moves(exp: Expansion, cycles: np.ndarray, mult: Multipliers):
    """The nonzero entries of the transition matrices of a block of cycles, as (from, to,
    weight (T, B): per cycle of the block and patient, or a scalar) with repeats summed by
    the user, and each risk's probability (E, R, T, B): a sparse form, since a row reaches
    few expanded states and a product with it then costs its entries only. The cycles of a
    block share one pass over the expanded states, whose Python work then does not grow
    with the horizon. Absorbing states keep their patients (weight 1.0)."""
    model = exp.model
    times = model.cycle * np.asarray(cycles, float)[:, None]  # (T, 1)
    m_all = mult.over(times[:, 0])  # (T, B, R)
    batch = m_all.shape[1]
    ages = None if mult.entry_age is None else mult.entry_age + times
    bands = {}

    def band_at(table: TableSpec, duration: int):
        """`table_band` in each cycle of the block, once per table and time in state."""
        key = (id(table), duration if table.by == "time_in_state" else None)
        if key not in bands:
            bands[key] = table_band(table, times, ages, duration * model.cycle)
        return bands[key]

    # state-major, patients last, so each entry is one contiguous run of patients
    entries = []
    risk_p = np.zeros((exp.size, len(model.risks), len(cycles), batch))
    for e, (i, d, counts) in enumerate(exp.expanded):
        if model.absorbing[i]:
            entries.append((e, e, 1.0))
            continue
        row = [(r, risk) for r, risk in enumerate(model.risks) if risk.source == i]
        combined = model.probability_rule == COMPETING and sum(
            not risk.remainder and not risk.is_event for _, risk in row) > 1
        moves, events, weighed, remainder = [], [], [], None
        for r, risk in row:
            if risk.remainder:
                remainder = r
                continue
            m = m_all[:, :, r] * exp.memory_factor(risk, counts)
            p, log = risk_probability(risk, band_at, d, mult.level_rows(r))
            if risk.is_event:
                risk_p[e, r] = p = on_rate_scale(p, log, m)
                events.append((r, risk, p))
            else:
                weighed.append((r, risk, (p, log, m)))
        chances = (competing([w for *_, w in weighed]) if combined
                   else [on_rate_scale(p, log, m) for *_, (p, log, m) in weighed])
        total = 0.0
        for (r, risk, _), p in zip(weighed, chances):
            risk_p[e, r] = p
            moves.append((risk, p))
            total = total + p
        stay = 1.0 - total
        if not np.min(stay) >= 1.0 - LIMIT:
            t, k = np.unravel_index(np.argmin(stay), np.shape(stay))
            raise overflow(f"transitions.{model.states[i]}->*", float(1.0 - stay[t, k]),
                           f"the cohort's patient row {k}", int(cycles[t]))
        stay = np.maximum(stay, 0.0)
        if remainder is not None:
            risk_p[e, remainder] = stay
            moves.append((model.risks[remainder], stay))
        elif np.max(stay) > 0:
            moves.append((None, stay))  # a state with no way out keeps its patients
        # Staying put, named or not, is no occurrence: it is neither counted nor recorded.
        moves = [(None if risk is not None and risk.target == i else risk, p) for risk, p in moves]
        for r, risk in enumerate(model.risks):
            if risk.source == i and risk.target == i:
                risk_p[e, r] = 0.0
        # Events that move no count and not the treatment phase are summed over; the others
        # split each move by which of them happened in the same cycle (each independently
        # of the move and of one another, as the engines draw them). One that moves the
        # phase on sends the cycle's end state to its copy in the next phase.
        split = [(r, risk, p) for r, risk, p in events
                 if risk.name in exp.tracked or moves_phase(model, r)]
        for risk, p in moves:
            j = (i if model.stay_to is None else model.stay_to[i]) if risk is None else risk.target
            for pattern in itertools.product((False, True), repeat=len(split)):
                weight, to = p, j
                occurred = [] if risk is None else [risk]
                for happened, (r, event, pe) in zip(pattern, split):
                    weight = weight * (pe if happened else 1.0 - pe)
                    if happened:
                        occurred.append(event)
                        if model.phase_on is not None:
                            to = int(model.phase_on[r, to])
                entries.append((e, exp.target(i, d, counts, to, tuple(occurred)), weight))
    return entries, risk_p
