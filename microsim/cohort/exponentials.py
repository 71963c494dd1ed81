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
exponential, and the exponentials of all rows are computed together (scipy.linalg.expm on a
stack), so a heterogeneous population costs a few small exponentials per patient rather
than a Python loop over patients. Expected occurrences of each risk are the time in each
expanded state times its rate there.
"""
from __future__ import annotations

import numpy as np
import scipy.linalg

from microsim.cohort.expand import Expansion
from microsim.cohort.forward_equations import CLOCK_FLOOR, flows
from microsim.patients.multipliers import Multipliers
from microsim.results.bands import Bands, band_edges, band_of, entry_ages
from microsim.results.outcomes import Exposure

CHUNK = 4096  # rows marched together: the per-step arrays are (rows, expanded states, ...)


def row_nodes(exp: Expansion, mult: Multipliers, times: np.ndarray,
              edges: np.ndarray | None = None) -> np.ndarray:
    """(B, K) sorted times of each row: the grid, its tables' breaks, its window's ends
    and its band `edges` of costs and utilities, all within [0, end] (points outside the
    horizon become the end: empty steps)."""
    model = exp.model
    end = model.n_cycles * model.cycle
    B = mult.size
    columns = [np.broadcast_to(times, (B, len(times)))]
    if edges is not None:
        columns.append(edges)
    for risk in model.risks:
        if risk.table is not None:
            starts = np.asarray(risk.table.starts, float)
            shift = mult.entry_age[:, None] if risk.clock == "age" else np.zeros((B, 1))
            columns.append(starts[None, :] - shift)
    if mult.window is not None:
        columns += [mult.window.on[:, None], mult.window.off[:, None]]
    nodes = np.concatenate(columns, axis=1)
    nodes = np.where((nodes > 0) & (nodes < end), nodes, np.where(nodes <= 0, 0.0, end))
    return np.sort(nodes, axis=1)


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
    parts = [exponential_chunk(exp, mult.take(slice(lo, lo + CHUNK)), times, rates)
             for lo in range(0, mult.size, CHUNK)]
    return (np.concatenate([trace for trace, _ in parts]),
            Exposure.join([exposure for _, exposure in parts]))


def exponential_chunk(exp: Expansion, mult: Multipliers, times: np.ndarray,
                      rates: tuple[float, ...]) -> tuple[np.ndarray, Exposure]:
    model = exp.model
    f = flows(exp)
    B, E, R = mult.size, exp.size, len(model.risks)
    edges = band_edges(model, mult.entry_age, mult.size)
    nodes = row_nodes(exp, mult, times, edges)
    start, length = nodes[:, :-1], np.diff(nodes, axis=1)  # (B, K)
    hazards = hazards_on_steps(exp, mult, start)
    # one exponential per distinct (row, hazards, step length)
    keys = np.concatenate([np.arange(B)[:, None, None].repeat(start.shape[1], 1).astype(float),
                           hazards, length[..., None]], axis=2).reshape(-1, R + 2)
    unique, inverse = np.unique(keys, axis=0, return_inverse=True)
    inverse = inverse.reshape(B, -1)
    h, dt = unique[:, 1:R + 1], unique[:, R + 1]
    Q = np.zeros((len(unique), E, E))
    flow = h[:, f.risk] * f.factor  # (U, flows)
    for k in range(len(f.source)):
        Q[:, f.source[k], f.target[k]] += flow[:, k]
    Q -= np.eye(E) * Q.sum(axis=2)[:, :, None]  # moves to itself (events) cancel
    by_risk = np.zeros((len(unique), E, R))  # the rate of each risk from each expanded state
    np.add.at(by_risk, (slice(None), f.source, f.risk), flow)
    distinct = sorted(set(rates))
    blocks = {delta: van_loan(Q, delta, dt) for delta in distinct}
    propagate = blocks[0.0][0] if 0.0 in blocks else van_loan(Q, 0.0, dt)[0]
    collapse = exp.collapse()
    pi = exp.start_rows(mult.start, B)
    history = np.empty((B, nodes.shape[1], E))
    history[:, 0] = pi
    n_bands = 1 if edges is None else edges.shape[1] - 1
    occupancy = np.zeros((B, E, n_bands, 3))
    on_treatment = np.zeros((B, E, n_bands, 3))
    occurrences = np.zeros((B, R, n_bands, 3))
    active = (np.zeros_like(start, bool) if mult.window is None else
              (mult.window.on[:, None] <= start) & (start < mult.window.off[:, None]))
    band = np.zeros(start.shape, int) if edges is None else band_of(edges, start)
    rows = np.arange(B)
    for k in range(start.shape[1]):
        step = inverse[:, k]
        for w, delta in enumerate(rates):
            time_in = np.exp(-delta * start[:, k])[:, None] * np.einsum(
                "be,bef->bf", pi, blocks[delta][1][step])
            occupancy[rows, :, band[:, k], w] += time_in
            on_treatment[rows, :, band[:, k], w] += np.where(active[:, k, None], time_in, 0.0)
            occurrences[rows, :, band[:, k], w] += np.einsum("be,ber->br", time_in,
                                                             by_risk[step])
        pi = np.einsum("be,bef->bf", pi, propagate[step])
        history[:, k + 1] = pi
    at = np.stack([np.searchsorted(row, times, side="left") for row in nodes])  # (B, T)
    trace = np.take_along_axis(history, at[:, :, None], axis=1) @ collapse
    occupancy = np.einsum("bekw,es->bskw", occupancy, collapse)
    on_treatment = np.einsum("bekw,es->bskw", on_treatment, collapse)
    bands = None if edges is None else Bands(edges, entry_ages(mult.entry_age, B), occupancy,
                                             on_treatment, occurrences)
    return trace, Exposure(occupancy.sum(axis=2), occurrences.sum(axis=2),
                           on_treatment.sum(axis=2), bands=bands)


def van_loan(Q: np.ndarray, delta: float, dt: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For each (E, E) generator and step length: exp(Q dt) (undiscounted propagation; with
    delta > 0 this block is exp((Q - delta I) dt)) and the discounted integral
    integral_0^dt exp((Q - delta I) u) du, from one block exponential each."""
    U, E, _ = Q.shape
    block = np.zeros((U, 2 * E, 2 * E))
    block[:, :E, :E] = Q - delta * np.eye(E)
    block[:, :E, E:] = np.eye(E)
    moved = scipy.linalg.expm(block * dt[:, None, None])
    return moved[:, :E, :E], moved[:, :E, E:]
