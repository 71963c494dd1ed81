"""Histories -> per-patient time in state, occurrences, and states on a time grid.

The per-patient arrays have the layout of the analytic cohort's (`CohortResult`), so the
same valuation (`microsim.results.outcomes`) and the same comparison apply to both. Time in state
is integrated exactly over each sojourn with continuous discounting in rate models, and by
the scenario's within-cycle rule on the cycle points in cycle models.
"""
from __future__ import annotations

import numpy as np
from numba import njit

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
    """(B, R, 3) occurrences of each risk: counted, and discounted at the two rates (each
    patient's in record order)."""
    out = np.zeros((h.n_patients, len(model.risks), 3))
    happened = np.flatnonzero(h.risk >= 0)
    weights = np.exp(-np.outer(h.time[happened], discount_rates(model)))
    _add_rows(out, h.patient[happened], h.risk[happened], weights)
    return out


@njit(cache=True)
def _add_rows(out, first, second, weights):
    """out[first[q], second[q]] += weights[q] for each q in order (numpy's add.at)."""
    for q in range(first.size):
        for w in range(weights.shape[1]):
            out[first[q], second[q], w] += weights[q, w]


def sojourn_integrals(model: BoundModel, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(n, 3) integrals of 1, e^{-delta_c t}, e^{-delta_e t} over each [a, b) (0 if empty)."""
    deltas = discount_rates(model)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = np.where(deltas > 0,
                         (np.exp(-np.outer(a, deltas)) - np.exp(-np.outer(b, deltas))) / deltas,
                         (b - a)[:, None])
    return np.where((b > a)[:, None], value, 0.0)


def cycle_occupancy(model: BoundModel, states: np.ndarray, window: Window | None = None) -> np.ndarray:
    """(B, S, 3) time in state by the cycle rule on the cycle points (only the points where
    a patient is on treatment, when a `window` is given). Each patient's sum runs over its
    own cycle points in time order, so it does not depend on the batch."""
    weights = np.stack([cycle_outcomes.cycle_weights(model.n_cycles, model.cycle, rate,
                                                     correction=model.correction)
                        for rate in (0.0, model.discount_costs, model.discount_effects)], axis=1)
    B = states.shape[0]
    on = np.full(B, -np.inf) if window is None else np.asarray(window.on, float)
    off = np.full(B, np.inf) if window is None else np.asarray(window.off, float)
    return _occupancy(states, weights, model.n_states, np.asarray(model.times, float), on, off)


@njit(cache=True)
def _occupancy(states, weights, n_states, times, on, off):
    """out[b, s] = sum over the points t where patient b is in s and on[b] <= t < off[b]
    of weights[t], added in time order; a point with state -1 adds nothing."""
    B, T = states.shape
    out = np.zeros((B, n_states, weights.shape[1]))
    for b in range(B):
        for t in range(T):
            s = states[b, t]
            if s >= 0 and on[b] <= times[t] < off[b]:
                for w in range(weights.shape[1]):
                    out[b, s, w] += weights[t, w]
    return out


def exposure(model: BoundModel, h: Histories, window: Window | None = None,
             states: np.ndarray | None = None) -> Exposure:
    """Per-patient time in state (and on treatment) and occurrences from histories (cycle
    models: `states` on the cycle points, when the caller has them already)."""
    if model.discrete:
        states = grid_states(h, model.times) if states is None else states
        occupancy = cycle_occupancy(model, states)
        on = np.zeros_like(occupancy) if window is None else cycle_occupancy(model, states, window)
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
