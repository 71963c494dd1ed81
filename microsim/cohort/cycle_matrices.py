"""Cycle models: the per-cycle transition matrices a bound model implies, per patient.

Within a cycle a patient in expanded state (i, d, counts) takes one of the transitions out
of i (the "remainder" takes what the others leave) and, independently, each event of i
happens or not; counts and time-in-state then move on. Covariate and memory multipliers act
on the rate scale, p' = 1 - (1 - p)^m, so a hazard ratio keeps a probability in [0, 1]
(common practice; e.g. Briggs, Claxton & Sculpher 2006, "Decision Modelling for Health
Economic Evaluation", ch. 3). The cycle engine follows exactly these rules.
"""
from __future__ import annotations

import itertools

import numpy as np

from microsim.binding import BoundRisk
from microsim.cohort.expand import Expansion
from microsim.patients.multipliers import Multipliers
from microsim.scenario.errors import ScenarioError
from microsim.scenario.spec import TableSpec


def table_value(table: TableSpec, time: float, age, time_in_state: float):
    """A table's value at the point on its own axis (value i holds from starts[i])."""
    x = {"time": time, "age": age, "time_in_state": time_in_state}[table.by]
    index = np.searchsorted(np.asarray(table.starts), x, side="right") - 1
    return np.asarray(table.values)[np.maximum(index, 0)]


def on_rate_scale(p, m):
    """Apply hazard multiplier m to a per-cycle probability p: 1 - (1 - p)^m."""
    m = np.asarray(m, float)
    return np.where(m == 1.0, p, 1.0 - np.power(1.0 - np.asarray(p, float), m))


def risk_probability(risk: BoundRisk, time: float, ages, duration: int, cycle: float, m):
    """Per-cycle probability of a (non-remainder) risk for a batch of patients."""
    base = risk.probability
    if isinstance(base, TableSpec):
        base = table_value(base, time, ages, duration * cycle)
    return on_rate_scale(base, m)


def cycle_matrices(exp: Expansion, n: int, mult: Multipliers):
    """Transition matrices (B, E, E) of cycle n and each risk's probability (B, E, R)."""
    model = exp.model
    time = n * model.cycle
    m_all = mult.at(time)
    batch = m_all.shape[0]
    ages = None if mult.entry_age is None else mult.entry_age + time
    P = np.zeros((batch, exp.size, exp.size))
    risk_p = np.zeros((batch, exp.size, len(model.risks)))
    for e, (i, d, counts) in enumerate(exp.expanded):
        if model.absorbing[i]:
            P[:, e, e] = 1.0
            continue
        moves, events, total, remainder = [], [], 0.0, None
        for r, risk in enumerate(model.risks):
            if risk.source != i:
                continue
            if risk.remainder:
                remainder = r
                continue
            m = m_all[:, r] * exp.memory_factor(risk, counts)
            p = risk_probability(risk, time, ages, d, model.cycle, m)
            risk_p[:, e, r] = p
            if risk.is_event:
                events.append((risk, p))
            else:
                moves.append((risk, p))
                total = total + p
        stay = 1.0 - total
        if np.min(stay) < -1e-9:
            raise ScenarioError(
                f"transitions from '{model.states[i]}'",
                f"probabilities reach {1 - np.min(stay):.6g} at cycle {n} after covariate "
                "or memory effects; lower them or mark one transition as 'remainder'")
        stay = np.maximum(stay, 0.0)
        if remainder is not None:
            risk_p[:, e, remainder] = stay
            moves.append((model.risks[remainder], stay))
        elif np.max(stay) > 0:
            moves.append((None, stay))  # a state with no way out keeps its patients
        # Staying put, named or not, is no occurrence: it is neither counted nor recorded.
        moves = [(None if risk is not None and risk.target == i else risk, p) for risk, p in moves]
        for r, risk in enumerate(model.risks):
            if risk.source == i and risk.target == i:
                risk_p[:, e, r] = 0.0
        # Events that move no count are summed over; the others split each move by which
        # of them happened in the same cycle.
        counting = [(risk, p) for risk, p in events if risk.name in exp.tracked]
        for risk, p in moves:
            j = i if risk is None else risk.target
            d_next = min(d + 1, exp.durations[i] - 1) if j == i else 0
            for pattern in itertools.product((False, True), repeat=len(counting)):
                weight = p
                occurred = [] if risk is None else [risk]
                for happened, (event, pe) in zip(pattern, counting):
                    weight = weight * (pe if happened else 1.0 - pe)
                    if happened:
                        occurred.append(event)
                P[:, e, exp.index(j, d_next, exp.after_move(counts, i, occurred))] += weight
    return P, risk_p
