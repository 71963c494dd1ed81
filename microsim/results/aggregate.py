"""Histories -> per-patient time in state, occurrences, and states on a time grid.

The per-patient arrays have the layout of the analytic cohort's (`CohortResult`), so the
same valuation (`microsim.results.outcomes`) and the same comparison apply to both. Time in state
is integrated exactly over each sojourn with continuous discounting in rate models, and by
the scenario's within-cycle rule on the cycle points in cycle models.
"""
from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from numba import njit

from microsim.binding import BoundModel
from microsim.patients.multipliers import Multipliers, Window
from microsim.engines.histories import Histories
from microsim.markov import discrete_outcomes as cycle_outcomes
from microsim.results.bands import Bands, band_edges, band_of, entry_ages
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


def occurrences(model: BoundModel, h: Histories, edges: np.ndarray | None = None) -> np.ndarray:
    """(B, R, 3) occurrences of each risk: counted, and discounted at the two rates (each
    patient's in record order); with band `edges` (B, K + 1), (B, R, K, 3) by the band
    each happened in."""
    R, K = len(model.risks), 1 if edges is None else edges.shape[1] - 1
    out = np.zeros((h.n_patients, R * K, 3))
    if edges is None:
        _count_records(out, h.patient, h.risk, h.time, discount_rates(model))
        return out
    happened = np.flatnonzero(h.risk >= 0)
    patient, time = h.patient[happened], h.time[happened]
    weights = np.exp(-np.outer(time, discount_rates(model)))
    cell = h.risk[happened] * K + (0 if edges is None else band_of(edges[patient], time))
    _add_rows(out, patient, cell, weights)
    return out if edges is None else out.reshape(h.n_patients, R, K, 3)


@njit(cache=True, nogil=True)
def _count_records(out, patient, risk, time, rates):
    """out[patient, risk] += (e^{-rate t} at each rate) for each record of a risk, in record
    order: the counts and their discounted sums in one pass, without the arrays of the
    records' weights (a rate of 0 counts 1)."""
    for q in range(risk.size):
        r = risk[q]
        if r < 0:
            continue
        for w in range(rates.size):
            out[patient[q], r, w] += 1.0 if rates[w] == 0.0 else math.exp(-(time[q] * rates[w]))


@njit(cache=True, nogil=True)
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


def banded_sojourns(model: BoundModel, h: Histories, a: np.ndarray, b: np.ndarray,
                    edges: np.ndarray) -> np.ndarray:
    """(B, S, K, 3) the sojourns [a, b) of the records in their states, split at each
    patient's band edges (B, K + 1)."""
    out = np.zeros((h.n_patients, model.n_states, edges.shape[1] - 1, 3))
    lows, highs = edges[h.patient, :-1], edges[h.patient, 1:]
    for k in range(edges.shape[1] - 1):
        np.add.at(out, (h.patient, h.target, k), sojourn_integrals(
            model, np.maximum(a, lows[:, k]), np.minimum(b, highs[:, k])))
    return out


@lru_cache(maxsize=64)
def point_weights(n_cycles: int, cycle: float, rates: tuple[float, ...], correction: str) -> np.ndarray:
    """(T, len(rates)) each cycle point's weight by the cycle rule at each discount rate,
    made once for a model and shared by its batches (read only)."""
    weights = np.stack([cycle_outcomes.cycle_weights(n_cycles, cycle, rate, correction=correction)
                        for rate in rates], axis=1)
    weights.flags.writeable = False
    return weights


def cycle_occupancy(model: BoundModel, states: np.ndarray, window: Window | None = None,
                    edges: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(B, S, 3) time in state by the cycle rule on the cycle points, and the same over the
    points where a patient is on treatment (`window`; zeros without one); with band `edges`
    (B, K + 1), each (B, S, K, 3) by the band of each point. Each patient's sums run over its
    own cycle points in time order, so they do not depend on the batch."""
    weights = point_weights(model.n_cycles, model.cycle,
                            (0.0, model.discount_costs, model.discount_effects), model.correction)
    B, S = states.shape[0], model.n_states
    times = np.asarray(model.times, float)
    on = np.full(B, np.inf) if window is None else np.asarray(window.on, float)
    off = np.full(B, np.inf) if window is None else np.asarray(window.off, float)
    K = 1 if edges is None else edges.shape[1] - 1
    band = (np.zeros((0, 0), np.int64) if edges is None
            else band_of(edges, np.broadcast_to(times, states.shape)))
    shape = (B, S, 3) if edges is None else (B, S, K, 3)
    every, treated = np.zeros(shape), np.zeros(shape)
    rest = np.concatenate([np.cumsum(weights[::-1], axis=0)[::-1], np.zeros((1, 3))])
    _occupancy(states, weights, rest, np.asarray(model.absorbing, bool), S, K, band, times,
               on, off, every.reshape(B, S * K, 3), treated.reshape(B, S * K, 3))
    return every, treated


@njit(cache=True, nogil=True)
def _occupancy(states, weights, rest, absorbing, n_states, n_bands, band, times, on, off,
               every, treated):
    """every[b, s * n_bands + band[b, t]] += weights[t] over the points t where patient b is
    in s, and treated[...] the same where on[b] <= t < off[b], added in time order (band
    empty: a single band); a point with state -1 adds nothing. From the point a patient is
    absorbed on (single band) it is in that state at every later point, so the rest of the
    weights (`rest[t]`, their sum from point t on) is added at once: the dead cost no work
    per point."""
    B, T = states.shape
    for b in range(B):
        for t in range(T):
            s = states[b, t]
            if s < 0:
                continue
            if n_bands == 1 and absorbing[s]:
                lo = max(t, np.searchsorted(times, on[b]))  # on[b] <= times[i] < off[b]
                hi = max(lo, np.searchsorted(times, off[b]))
                for w in range(weights.shape[1]):
                    every[b, s, w] += rest[t, w]
                    treated[b, s, w] += rest[lo, w] - rest[hi, w]
                break
            cell = s * n_bands + (band[b, t] if n_bands > 1 else 0)
            for w in range(weights.shape[1]):
                every[b, cell, w] += weights[t, w]
            if on[b] <= times[t] < off[b]:
                for w in range(weights.shape[1]):
                    treated[b, cell, w] += weights[t, w]


def exposure(model: BoundModel, h: Histories, mult: Multipliers | None = None,
             states: np.ndarray | None = None) -> Exposure:
    """Per-patient time in state (and on treatment, under `mult`'s window) and occurrences
    from histories (cycle models: `states` on the cycle points, when the caller has them
    already), with `mult`'s weights on the levels of the tables of costs and utilities,
    and split by their bands of time where they are by age or time."""
    window = None if mult is None else mult.window
    entry_age = None if mult is None else mult.entry_age
    edges = band_edges(model, entry_age, h.n_patients)
    levels = {} if mult is None else mult.levels
    if model.discrete:
        states = grid_states(h, model.times) if states is None else states
        occupancy, on = cycle_occupancy(model, states, window)
        bands = None
        if edges is not None:
            split, split_on = cycle_occupancy(model, states, window, edges)
            bands = Bands(edges, entry_ages(entry_age, h.n_patients), split, split_on,
                          occurrences(model, h, edges))
        return Exposure(occupancy, occurrences(model, h), on, levels, bands)
    end = model.n_cycles * model.cycle
    a, b = h.time, next_times(h, end)
    occupancy = np.zeros((h.n_patients, model.n_states, 3))
    np.add.at(occupancy, (h.patient, h.target), sojourn_integrals(model, a, b))
    on = np.zeros_like(occupancy)
    if window is not None:
        start, stop = window.on[h.patient], window.off[h.patient]
        on_from, on_to = np.maximum(a, start), np.minimum(b, stop)
        np.add.at(on, (h.patient, h.target), sojourn_integrals(model, on_from, on_to))
    bands = None
    if edges is not None:
        split = banded_sojourns(model, h, a, b, edges)
        bands = Bands(edges, entry_ages(entry_age, h.n_patients), split,
                      np.zeros_like(split) if window is None
                      else banded_sojourns(model, h, on_from, on_to, edges),
                      occurrences(model, h, edges))
    return Exposure(occupancy, occurrences(model, h), on, levels, bands)
