"""Exact results of rate models whose hazards are piecewise constant, for many patient rows
at once.

Each row (a distinct patient) has its own pieces: the grid times, the times its tables
change value (an age table's bands move with the row's entry age) and its treatment window's
start and stop. Between two consecutive of these the generator Q is constant, so one step
moves the distribution by exp(Q dt) and adds the discounted time in each state, the integral
of pi(s) e^{-delta s} ds over the step, from one exponential of a block matrix (Van Loan
1978, "Computing integrals involving the matrix exponential", IEEE Trans. Automatic
Control):

    exp([[A, I], [0, 0]] dt) = [[exp(A dt), integral_0^dt exp(A u) du], [0, I]],  A = Q - delta I.

Steps that share a row's generator and length (the grid steps within a piece) share one
exponential, and the exponentials of all rows are computed together, by stacked matrix
products (`microsim.cohort.uniformised`), so a heterogeneous population costs a few small
exponentials per patient and no Python loop over patients. Expected occurrences of each
risk are the time in each expanded state times its rate there. Where a cost or utility is
read from a table by age or time, each row's band edges (`microsim.results.bands`) are
break nodes too, no run of shared steps crosses one, and the exposure is summed per band.
"""
from __future__ import annotations

import numpy as np

from microsim.cohort.expand import Expansion
from microsim.cohort.forward_equations import CLOCK_FLOOR, flows
from microsim.cohort.uniformised import exponential_and_integrals
from microsim.patients.multipliers import Multipliers
from microsim.results.bands import Bands, band_edges, band_of, entry_ages
from microsim.results.outcomes import Exposure

CHUNK = 4096  # the most rows marched together
CELLS = 2 ** 24  # the most numbers a chunk's arrays hold at once (128 MB of doubles)


def row_breaks(exp: Expansion, mult: Multipliers, edges: np.ndarray | None = None) -> np.ndarray:
    """(B, J) the times at which each row's hazards may change besides the grid: its tables'
    breaks and its window's ends, and its band `edges` of costs and utilities, within
    [0, end] (points outside the horizon become 0 or the end: empty steps); and time 0,
    where every row starts, whatever the grid."""
    model = exp.model
    end = model.n_cycles * model.cycle
    B = mult.size
    columns = [np.zeros((B, 1))] if edges is None else [np.zeros((B, 1)), edges]
    for risk in model.risks:
        if risk.table is not None:
            starts = np.asarray(risk.table.starts, float)
            shift = mult.entry_age[:, None] if risk.clock == "age" else np.zeros((B, 1))
            columns.append(starts[None, :] - shift)
    if mult.window is not None:
        columns += [mult.window.on[:, None], mult.window.off[:, None]]
    breaks = np.concatenate(columns, axis=1)
    return np.where((breaks > 0) & (breaks < end), breaks, np.where(breaks <= 0, 0.0, end))


def hazards_on_steps(exp: Expansion, mult: Multipliers, start: np.ndarray) -> np.ndarray:
    """(B, K, R) each row's hazard of each risk on each step (constant over the step, read
    at its start; multipliers, tables on their clocks, the treatment window)."""
    model = exp.model
    out = np.exp(mult.log_static)[:, None, :] * np.ones((1, start.shape[1], 1))
    if mult.window is not None:
        w = mult.window
        active = (w.on[:, None] <= start) & (start < w.off[:, None])
        out *= np.where(active[..., None], w.on_factor, w.off_factor)
    for r, risk in enumerate(model.risks):
        clock = start + mult.entry_age[:, None] if risk.clock == "age" else start
        hazard = risk.hazard if (rows := mult.level_rows(r)) is None else rows  # per patient
        out[:, :, r] *= hazard.hazard_array(np.maximum(clock, CLOCK_FLOOR))
    return out


def exponential_rows(exp: Expansion, mult: Multipliers, times: np.ndarray,
                     rates: tuple[float, ...]) -> tuple[np.ndarray, Exposure]:
    """The trace (B, T, S) and the expected exposure of every row, exactly; `rates` are the
    continuous discount rates delta of the three weightings (none, costs, effects)."""
    rows = chunk_rows(exp, mult, times)
    parts = [exponential_chunk(exp, mult.take(slice(lo, lo + rows)), times, rates)
             for lo in range(0, mult.size, rows)]
    return (np.concatenate([trace for trace, _ in parts]),
            Exposure.join([exposure for _, exposure in parts]))


def chunk_rows(exp: Expansion, mult: Multipliers, times: np.ndarray) -> int:
    """Rows per chunk, so that a chunk's arrays stay within CELLS numbers: per row, three of
    (nodes, expanded states) and some eight of (exponentials, E, E), with at most three
    exponentials per break and three more (a row's steps share theirs between breaks)."""
    one = mult.take(slice(0, 1))
    breaks = row_breaks(exp, one, band_edges(exp.model, one.entry_age, 1)).shape[1]
    E = exp.size
    per_row = 3 * (len(times) + breaks) * E + 8 * (3 * breaks + 3) * E * E
    return int(np.clip(CELLS // per_row, 1, CHUNK))


def shared_steps(hazards: np.ndarray, length: np.ndarray,
                 band: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Which exponential each (row, step) uses, (B, K), and the (flattened) step that
    computes each: a step shares its predecessor's when it has the same hazards and length
    and lies in the same `band` of costs and utilities, as the grid steps within a piece
    do (so each exponential's exposure belongs to one band). (A step whose twin is not next
    to it gets an exponential of its own: the same numbers, computed twice.)"""
    same = np.zeros(length.shape, bool)
    same[:, 1:] = ((length[:, 1:] == length[:, :-1]) & (band[:, 1:] == band[:, :-1])
                   & (hazards[:, 1:] == hazards[:, :-1]).all(axis=2))
    computed = ~same.ravel()
    return (np.cumsum(computed) - 1).reshape(length.shape), np.flatnonzero(computed)


def exponential_chunk(exp: Expansion, mult: Multipliers, times: np.ndarray,
                      rates: tuple[float, ...]) -> tuple[np.ndarray, Exposure]:
    model = exp.model
    f = flows(exp)
    B, E, R = mult.size, exp.size, len(model.risks)
    edges = band_edges(model, mult.entry_age, B)
    breaks = row_breaks(exp, mult, edges)
    nodes = np.sort(np.concatenate([np.broadcast_to(times, (B, len(times))), breaks], axis=1),
                    axis=1)
    start, length = nodes[:, :-1], np.diff(nodes, axis=1)  # (B, K)
    hazards = hazards_on_steps(exp, mult, start)
    band = np.zeros(start.shape, int) if edges is None else band_of(edges, start)
    n_bands = 1 if edges is None else edges.shape[1] - 1
    inverse, first = shared_steps(hazards, length, band)
    # the (row, band) whose exposure each exponential adds to, in order
    group = (first // start.shape[1]) * n_bands + band.ravel()[first]
    h, dt = hazards.reshape(-1, R)[first], length.ravel()[first]
    Q = np.zeros((len(first), E, E))
    flow = f.rates(h)  # (U, flows)
    for k in range(len(f.source)):
        Q[:, f.source[k], f.target[k]] += flow[:, k]
    Q -= np.eye(E) * Q.sum(axis=2)[:, :, None]  # moves to itself (events) cancel
    by_risk = np.zeros((len(first), E, R))  # the rate of each risk from each expanded state
    counted = f.of_risks
    np.add.at(by_risk, (slice(None), f.source[counted], f.risk[counted]), flow[:, counted])
    distinct = sorted(set(rates))
    propagate, integrals = exponential_and_integrals(Q, dt, tuple(distinct))
    history = np.empty((B, nodes.shape[1], E))  # the distribution at each node
    history[:, 0] = exp.start_rows(mult.start, B)
    for k in range(start.shape[1]):
        history[:, k + 1] = np.matmul(history[:, k, None, :], propagate[inverse[:, k]])[:, 0]
    # each grid time's node: the grid times before it and the breaks before it
    at = np.searchsorted(times, times)[None, :] + (breaks[:, :, None] < times).sum(axis=1)
    collapse = exp.collapse()
    trace = np.take_along_axis(history, at[:, :, None], axis=1) @ collapse
    active = (None if mult.window is None else
              (mult.window.on[:, None] <= start) & (start < mult.window.off[:, None]))
    exposure = {delta: step_exposure(history[:, :-1] * np.exp(-delta * start)[..., None],
                                     active, first, group, B * n_bands, integral, by_risk)
                for delta, integral in zip(distinct, integrals)}
    occupancy, occurrences, on_treatment = (
        np.stack([exposure[d][i] for d in rates], axis=-1).reshape(B, n_bands, -1, 3)
        .swapaxes(1, 2) for i in range(3))  # (B, E or R, bands, weightings)
    occupancy = np.einsum("bekw,es->bskw", occupancy, collapse)
    on_treatment = np.einsum("bekw,es->bskw", on_treatment, collapse)
    bands = None if edges is None else Bands(edges, entry_ages(mult.entry_age, B), occupancy,
                                             on_treatment, occurrences)
    return trace, Exposure(occupancy.sum(axis=2), occurrences.sum(axis=2),
                           on_treatment.sum(axis=2), bands=bands)


def step_exposure(weighted: np.ndarray, active: np.ndarray | None, first: np.ndarray,
                  group: np.ndarray, n_groups: int, integrals: np.ndarray,
                  by_risk: np.ndarray) -> tuple:
    """Each group's (a row's band) discounted time in each expanded state (G, E), expected
    occurrences of each risk (G, R) and time on treatment (G, E), from the distribution at
    each step's start discounted to time 0 (B, K, E): the steps that share an exponential
    (runs from `first`) share its integral, so their distributions are summed first, and one
    product per exponential gives the time in each state; `group` (non-decreasing) is the
    group each exponential adds to, and a group none adds to (an empty band) stays 0."""
    starts = np.flatnonzero(np.diff(group, prepend=-1))
    into = group[starts]

    def by_group(per_exponential):
        out = np.zeros((n_groups, per_exponential.shape[1]))
        out[into] = np.add.reduceat(per_exponential, starts, axis=0)
        return out

    def time_in(weights):
        summed = np.add.reduceat(weights.reshape(-1, weights.shape[-1]), first, axis=0)
        return np.matmul(summed[:, None, :], integrals)[:, 0]  # (U, E)

    per_exponential = time_in(weighted)
    occupancy = by_group(per_exponential)
    occurrences = by_group(np.einsum("ue,uer->ur", per_exponential, by_risk))
    on = (np.zeros_like(occupancy) if active is None else
          by_group(time_in(weighted * active[..., None])))
    return occupancy, occurrences, on
