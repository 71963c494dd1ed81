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
risk are the time in each expanded state times its rate there.
"""
from __future__ import annotations

import numpy as np

from microsim.cohort.expand import Expansion
from microsim.cohort.forward_equations import CLOCK_FLOOR, flows
from microsim.cohort.uniformised import exponential_and_integral
from microsim.patients.multipliers import Multipliers
from microsim.results.outcomes import Exposure

CHUNK = 4096  # rows marched together: the per-step arrays are (rows, expanded states, ...)


def row_nodes(exp: Expansion, mult: Multipliers, times: np.ndarray) -> np.ndarray:
    """(B, K) sorted times of each row: the grid, its tables' breaks and its window's ends,
    all within [0, end] (points outside the horizon become the end: empty steps)."""
    model = exp.model
    end = model.n_cycles * model.cycle
    B = mult.size
    columns = [np.broadcast_to(times, (B, len(times)))]
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


def shared_steps(hazards: np.ndarray, length: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Which exponential each (row, step) uses, (B, K), and the (flattened) step that
    computes each: a step shares its predecessor's when it has the same hazards and length,
    as the grid steps within a piece do. (A step whose twin is not next to it gets an
    exponential of its own: the same numbers, computed twice.)"""
    same = np.zeros(length.shape, bool)
    same[:, 1:] = ((length[:, 1:] == length[:, :-1])
                   & (hazards[:, 1:] == hazards[:, :-1]).all(axis=2))
    computed = ~same.ravel()
    return (np.cumsum(computed) - 1).reshape(length.shape), np.flatnonzero(computed)


def exponential_chunk(exp: Expansion, mult: Multipliers, times: np.ndarray,
                      rates: tuple[float, ...]) -> tuple[np.ndarray, Exposure]:
    model = exp.model
    f = flows(exp)
    B, E, R = mult.size, exp.size, len(model.risks)
    nodes = row_nodes(exp, mult, times)
    start, length = nodes[:, :-1], np.diff(nodes, axis=1)  # (B, K)
    hazards = hazards_on_steps(exp, mult, start)
    inverse, first = shared_steps(hazards, length)
    h, dt = hazards.reshape(-1, R)[first], length.ravel()[first]
    Q = np.zeros((len(first), E, E))
    flow = h[:, f.risk] * f.factor  # (U, flows)
    for k in range(len(f.source)):
        Q[:, f.source[k], f.target[k]] += flow[:, k]
    Q -= np.eye(E) * Q.sum(axis=2)[:, :, None]  # moves to itself (events) cancel
    by_risk = np.zeros((len(first), E, R))  # the rate of each risk from each expanded state
    np.add.at(by_risk, (slice(None), f.source, f.risk), flow)
    distinct = sorted(set(rates))
    blocks = {delta: van_loan(Q, delta, dt) for delta in distinct}
    propagate = blocks[0.0][0] if 0.0 in blocks else van_loan(Q, 0.0, dt)[0]
    collapse = exp.collapse()
    pi = exp.start_rows(mult.start, B)
    history = np.empty((B, nodes.shape[1], E))
    history[:, 0] = pi
    occupancy = np.zeros((B, E, 3))
    on_treatment = np.zeros((B, E, 3))
    occurrences = np.zeros((B, R, 3))
    active = (np.zeros_like(start, bool) if mult.window is None else
              (mult.window.on[:, None] <= start) & (start < mult.window.off[:, None]))
    for k in range(start.shape[1]):
        step = inverse[:, k]
        for w, delta in enumerate(rates):
            time_in = np.exp(-delta * start[:, k])[:, None] * np.einsum(
                "be,bef->bf", pi, blocks[delta][1][step])
            occupancy[:, :, w] += time_in
            on_treatment[:, :, w] += np.where(active[:, k, None], time_in, 0.0)
            occurrences[:, :, w] += np.einsum("be,ber->br", time_in, by_risk[step])
        pi = np.einsum("be,bef->bf", pi, propagate[step])
        history[:, k + 1] = pi
    at = np.stack([np.searchsorted(row, times, side="left") for row in nodes])  # (B, T)
    trace = np.take_along_axis(history, at[:, :, None], axis=1) @ collapse
    return trace, Exposure(np.einsum("bew,es->bsw", occupancy, collapse), occurrences,
                           np.einsum("bew,es->bsw", on_treatment, collapse))


def van_loan(Q: np.ndarray, delta: float, dt: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For each (E, E) generator and step length: exp(Q dt) (undiscounted propagation; with
    delta > 0 this block is exp((Q - delta I) dt)) and the discounted integral
    integral_0^dt exp((Q - delta I) u) du: the two blocks of Van Loan's exponential."""
    return exponential_and_integral(Q - delta * np.eye(Q.shape[1]), dt)
