"""Histories -> per-patient time in state, occurrences, and states on a time grid.

The per-patient arrays have the layout of the analytic cohort's (`CohortResult`), so the
same valuation (`microsim.results.outcomes`) and the same comparison apply to both. Time in state
is integrated exactly over each sojourn with continuous discounting in rate models, and by
the scenario's within-cycle rule on the cycle points in cycle models.
"""
from __future__ import annotations

import numpy as np

from microsim.binding import BoundModel
from microsim.patients.multipliers import Window
from microsim.engines.histories import Histories
from microsim.markov import discrete_outcomes as cycle_outcomes
from microsim.results.outcomes import Exposure


def discount_rates(model: BoundModel) -> np.ndarray:
    """Continuous rates delta = ln(1 + d) for no discount, the cost and the effect rate."""
    return np.log1p([0.0, model.discount_costs, model.discount_effects])


def next_times(h: Histories, end: float) -> np.ndarray:
    """When each record's sojourn ends: the patient's next record, or the horizon."""
    following = np.append(h.time[1:], end)
    last = np.append(h.patient[1:] != h.patient[:-1], True)
    return np.minimum(np.where(last, end, following), end)


def grid_states(h: Histories, grid: np.ndarray) -> np.ndarray:
    """(B, T) state of each patient at each grid time (the last record at or before it;
    -1 before a patient's first record). Each record marks the first grid time at or after
    it (the last record of a patient to reach a grid time wins), and the marks are carried
    forward along the grid."""
    T = len(grid)
    at = np.searchsorted(grid, h.time, side="left")
    key = h.patient.astype(np.int64) * (T + 1) + at  # records are in time order per patient
    last = np.append(key[1:] != key[:-1], True) & (at < T)
    marked = np.full((h.n_patients, T), -1, np.int64)  # index of the record that holds
    marked[h.patient[last], at[last]] = np.flatnonzero(last)
    np.maximum.accumulate(marked, axis=1, out=marked)
    states = np.where(marked >= 0, h.target[np.maximum(marked, 0)], -1)
    return states.astype(np.int16)


def occurrences(model: BoundModel, h: Histories) -> np.ndarray:
    """(B, R, 3) occurrences of each risk: counted, and discounted at the two rates."""
    out = np.zeros((h.n_patients, len(model.risks), 3))
    happened = h.risk >= 0
    weights = np.exp(-np.outer(h.time[happened], discount_rates(model)))
    np.add.at(out, (h.patient[happened], h.risk[happened]), weights)
    return out


def sojourn_integrals(model: BoundModel, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(n, 3) integrals of 1, e^{-delta_c t}, e^{-delta_e t} over each [a, b) (0 if empty)."""
    deltas = discount_rates(model)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = np.where(deltas > 0,
                         (np.exp(-np.outer(a, deltas)) - np.exp(-np.outer(b, deltas))) / deltas,
                         (b - a)[:, None])
    return np.where((b > a)[:, None], value, 0.0)


def cycle_occupancy(model: BoundModel, states: np.ndarray, on: np.ndarray | None = None) -> np.ndarray:
    """(B, S, 3) time in state by the cycle rule on the cycle points (only the points where
    `on` (B, T) holds, when given). Each patient's sum runs over its own cycle points in
    time order, one point at a time for the whole batch, so it does not depend on the
    batch (a point not counted adds nothing)."""
    B, S = states.shape[0], model.n_states
    weights = np.stack([cycle_outcomes.cycle_weights(model.n_cycles, model.cycle, rate,
                                                     correction=model.correction)
                        for rate in (0.0, model.discount_costs, model.discount_effects)], axis=1)
    out = np.zeros((3, B * S))
    rows = np.arange(B) * S
    for t in range(states.shape[1]):
        counted = states[:, t] >= 0 if on is None else (states[:, t] >= 0) & on[:, t]
        cell = (rows + states[:, t])[counted]  # one cell per patient: no repeats
        for w in range(3):
            out[w, cell] += weights[t, w]
    return np.ascontiguousarray(np.moveaxis(out.reshape(3, B, S), 0, -1))


def exposure(model: BoundModel, h: Histories, window: Window | None = None,
             states: np.ndarray | None = None) -> Exposure:
    """Per-patient time in state (and on treatment) and occurrences from histories (cycle
    models: `states` on the cycle points, when the caller has them already)."""
    if model.discrete:
        states = grid_states(h, model.times) if states is None else states
        occupancy = cycle_occupancy(model, states)
        on = (np.zeros_like(occupancy) if window is None
              else cycle_occupancy(model, states, window.on_grid(model.times)))
        return Exposure(occupancy, occurrences(model, h), on)
    end = model.n_cycles * model.cycle
    a, b = h.time, next_times(h, end)
    occupancy = np.zeros((h.n_patients, model.n_states, 3))
    np.add.at(occupancy, (h.patient, h.target), sojourn_integrals(model, a, b))
    on = np.zeros_like(occupancy)
    if window is not None:
        start, stop = window.on[h.patient], window.off[h.patient]
        np.add.at(on, (h.patient, h.target),
                  sojourn_integrals(model, np.maximum(a, start), np.minimum(b, stop)))
    return Exposure(occupancy, occurrences(model, h), on)
