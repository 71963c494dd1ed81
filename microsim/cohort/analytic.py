"""The analytic counterpart of a bound model, for a cohort or for each generated patient.

One entry point, `analytic`, picks the exact method the model allows and names it:
- cycle models: products of per-cycle matrices over the expanded state space, compiled
  (`microsim.cohort.compiled_products`; `matrix_products` in numpy is the reference);
- rate models whose hazards are piecewise constant in time (constant rates, life tables by
  age or by time): matrix exponentials, exact (`microsim.cohort.exponentials`);
- other Markov rate models (Weibull or Gompertz on the time-since-start or age clock,
  proportional hazards on attained age): the forward equations integrated numerically to
  a relative tolerance of 1e-10.
Memory of finite size is carried by the expanded chain (`microsim.cohort.expand`); when
some memory has no finite expansion the result says so (`exact` False, with reasons).
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Callable

import numpy as np
import pandas as pd
from scipy import sparse

from microsim.binding import BoundModel
from microsim.cohort.compiled_products import compiled_products
from microsim.cohort.cycle_matrices import cycle_moves
from microsim.cohort.expand import Expansion, expand
from microsim.cohort.exponentials import exponential_rows
from microsim.cohort.forward_equations import hazards_at, solve_rates, flows
from microsim.cohort.time_dependence import time_dependence
from microsim.patients.multipliers import Multipliers, cohort_multipliers, multipliers
from microsim.patients.treatment import uniform_multipliers
from microsim.markov import discrete_outcomes
from microsim.results.bands import Bands, band_edges, band_of, entry_ages
from microsim.results.outcomes import Exposure
from microsim.scenario.errors import ScenarioError

@dataclass(frozen=True)
class CohortResult:
    """Expected results per patient row (one row for a uniform cohort): the trace (B, T, S)
    and the expected exposure (cycle models apply the scenario's within-cycle rule)."""
    times: np.ndarray
    trace: np.ndarray  # (B, T, S)
    exposure: Exposure
    method: str
    exact: bool
    reasons: tuple[str, ...]


def discount_rates(model: BoundModel) -> tuple[float, float, float]:
    return 0.0, model.discount_costs, model.discount_effects


BLOCK_ELEMENTS = 2 ** 22  # numbers per array of a block of cycles (32 MB): its cycles


def matrix_products(exp: Expansion, mult: Multipliers) -> tuple[np.ndarray, np.ndarray]:
    """The trace (B, T + 1, S) and each cycle's expected occurrences of each risk (T, B, R)
    by numpy products of each block of cycles' matrices (`cycle_moves`) with every patient
    row's distribution over the expanded states: the reference evaluation, which
    `compiled_products` must equal."""
    model = exp.model
    batch = mult.log_static.shape[0]
    # state-major with patients last (pi (E, B), weights (K, T, B)): every product runs
    # over contiguous patients
    expanded = [exp.start_rows(mult.start, batch).T.copy()]
    flows_per_cycle = []
    block = max(1, BLOCK_ELEMENTS // (exp.size * max(len(model.risks), 1) * batch))
    for first in range(0, model.n_cycles, block):
        cycles = np.arange(first, min(first + block, model.n_cycles))
        moves, risk_p = cycle_moves(exp, cycles, mult)
        sources = np.array([e for e, _, _ in moves])
        weights = np.empty((len(moves), len(cycles), batch))
        for k, (_, _, weight) in enumerate(moves):
            weights[k] = weight
        # the sum of the entries into each target: one sparse product (E, K) per cycle
        into = sparse.csr_array((np.ones(len(moves)), ([f for _, f, _ in moves],
                                                       np.arange(len(moves)))),
                                shape=(exp.size, len(moves)))
        for t in range(len(cycles)):
            expanded.append(into @ (expanded[-1][sources] * weights[:, t]))
        # each cycle's flows: the shares at its start times its risks' probabilities
        starts = np.array(expanded[-len(cycles) - 1:-1])
        flows_per_cycle.extend(np.einsum("teb,ertb->tbr", starts, risk_p))
    trace = (np.array(expanded).transpose(0, 2, 1) @ exp.collapse()).transpose(1, 0, 2)
    flow = np.array(flows_per_cycle).reshape(model.n_cycles, batch, len(model.risks))
    return trace, flow


def cycle_result(exp: Expansion, mult: Multipliers,
                 products: Callable = compiled_products) -> tuple:
    """The trace and expected exposure of every patient row of a cycle model; `products`
    evaluates the cycle-by-cycle products (`matrix_products` is the reference)."""
    model = exp.model
    batch = mult.log_static.shape[0]
    trace, flow = products(exp, mult)
    on = np.zeros(trace.shape[:2]) if mult.window is None else mult.window.on_grid(model.times)
    ends = model.cycle * np.arange(1, model.n_cycles + 1)
    rates = discount_rates(model)
    # (T + 1, 3) each cycle point's weight and (T, 3) each cycle end's discount, by rate
    weights = np.stack([discrete_outcomes.cycle_weights(model.n_cycles, model.cycle, rate,
                                                        correction=model.correction)
                        for rate in rates], axis=1)
    discounts = np.stack([discrete_outcomes.discount_factors(ends, rate) for rate in rates], axis=1)
    occupancy = trace.transpose(0, 2, 1) @ weights
    on_treatment = (np.zeros_like(occupancy) if mult.window is None
                    else (trace * on[:, :, None]).transpose(0, 2, 1) @ weights)
    # over (T, R x B), the compiled products' own layout (a copy for the reference's)
    by_cycle = flow.transpose(0, 2, 1).reshape(model.n_cycles, -1)
    occurrences = np.ascontiguousarray((discounts.T @ by_cycle).reshape(
        len(rates), len(model.risks), batch).transpose(2, 1, 0))
    edges = band_edges(model, mult.entry_age, batch)
    bands = None if edges is None else cycle_bands(model, edges, mult, trace, on, flow)
    return trace, Exposure(occupancy, occurrences, on_treatment, bands=bands)


def cycle_bands(model, edges: np.ndarray, mult: Multipliers, trace: np.ndarray,
                on: np.ndarray, flow: np.ndarray) -> Bands:
    """The exposure split by bands of time: each cycle point in its band, each one-off
    value at the end of its cycle (as the simulated histories are split)."""
    batch, K = edges.shape[0], edges.shape[1] - 1
    ends = model.cycle * np.arange(1, model.n_cycles + 1)
    points, moves = (one_hot(band_of(edges, np.broadcast_to(times, (batch, len(times)))), K)
                     for times in (model.times, ends))
    occupancy = np.empty((batch, model.n_states, K, 3))
    on_treatment = np.empty((batch, model.n_states, K, 3))
    occurrences = np.empty((batch, len(model.risks), K, 3))
    for w, rate in enumerate(discount_rates(model)):
        weights = discrete_outcomes.cycle_weights(model.n_cycles, model.cycle, rate,
                                                  correction=model.correction)
        occupancy[..., w] = np.einsum("t,bts,btk->bsk", weights, trace, points)
        on_treatment[..., w] = np.einsum("t,bts,bt,btk->bsk", weights, trace, on, points)
        occurrences[..., w] = np.einsum("t,tbr,btk->brk", discrete_outcomes.discount_factors(
            ends, rate), flow, moves)
    return Bands(edges, entry_ages(mult.entry_age, batch), occupancy, on_treatment, occurrences)


def one_hot(index: np.ndarray, n: int) -> np.ndarray:
    """(..., n) 1 at each index, 0 elsewhere."""
    return (index[..., None] == np.arange(n)).astype(float)


def piece_breaks(exp: Expansion, mult: Multipliers) -> np.ndarray:
    """Times since start at which some table changes value, with 0 and the horizon."""
    model = exp.model
    end = model.n_cycles * model.cycle
    breaks = {0.0, end}
    if mult.window is not None:
        breaks.update(t for t in (mult.window.on[0], mult.window.off[0]) if 0 < t < end)
    for risk in model.risks:
        if risk.table is not None:
            shift = mult.entry_age[0] if risk.clock == "age" else 0.0
            breaks.update(s - shift for s in risk.table.starts if 0 < s - shift < end)
    return np.array(sorted(breaks))


def generators(exp: Expansion, mult: Multipliers, breaks: np.ndarray) -> np.ndarray:
    """The expanded generator on each piece, and each risk's rate matrix (K, E, E), (K, E, R)."""
    f = flows(exp)
    Q = np.zeros((len(breaks) - 1, exp.size, exp.size))
    rates = np.zeros((len(breaks) - 1, exp.size, len(exp.model.risks)))
    for k, t in enumerate(breaks[:-1]):
        h = f.rates(hazards_at(exp, t, mult)[0])
        np.add.at(Q[k], (f.source, f.target), h)
        counted = f.of_risks
        np.add.at(rates[k], (f.source[counted], f.risk[counted]), h[counted])
        Q[k] -= np.diag(Q[k].sum(axis=1))
    return Q, rates


def piecewise_constant(exp: Expansion, mult: Multipliers) -> bool:
    """True when every hazard is constant between table and window breaks (exact
    exponentials apply)."""
    return not time_dependence(exp, mult).smooth


ODE_CHUNK = 64  # patients solved together: each one's table breaks slow the others' steps


def solved_numerically(model: BoundModel) -> bool:
    """True when the rate model's counterpart is the forward equations, solved for each
    distinct patient (hazards that change smoothly with time or age), which costs far more
    per patient than a simulation; judged on the average patient, as the forms of the
    hazards, not the patients' values, decide it."""
    return not model.discrete and not piecewise_constant(expand(model), cohort_multipliers(model))


def rows_result(exp: Expansion, mult: Multipliers, times: np.ndarray) -> tuple:
    """The rate-model result for distinct patient rows: exact exponentials for all rows at
    once when hazards are piecewise constant, else the forward equations in chunks of rows."""
    if piecewise_constant(exp, mult):
        rates = tuple(np.log1p(discount_rates(exp.model)))
        trace, exposure = exponential_rows(exp, mult, times, rates)
        return trace, exposure, "matrix exponential of the rate matrix"
    else:
        parts = [solve_rates(exp, mult.take(slice(lo, lo + ODE_CHUNK)), times)
                 for lo in range(0, mult.size, ODE_CHUNK)]
        method = "forward equations solved numerically (rtol 1e-10)"
    trace = np.concatenate([p[0] for p in parts])
    return trace, Exposure.join([p[1] for p in parts]), method


def analytic(model: BoundModel, patients: pd.DataFrame | None = None,
             mult: Multipliers | None = None, times: np.ndarray | None = None) -> CohortResult:
    """Expected trace and outcome integrals per patient (or for the uniform cohort).

    Patients with identical multipliers (and entry age and treatment window) share one
    computation, so a population that differs only by a yes/no factor costs two."""
    exp = expand(model)
    if mult is None:
        if patients is not None and model.treatment is not None:
            raise ValueError("a strategy's patients need their treatment windows: pass "
                             "mult=strategies.patient_multipliers(model, patients, seed)")
        mult = uniform_multipliers(model) if patients is None else multipliers(model, patients)
    if model.discrete and mult.window is not None:
        mult = replace(mult, window=mult.window.on_grid_points(model.times))
    distinct, inverse = mult.unique()
    memory = "" if exp.trivial else (f" over {exp.size} expanded states (tunnel/count/window "
                                     "memory" + (", a delay's stages)" if model.waiting.any()
                                                 else ")"))
    if model.discrete:
        trace, exposure = cycle_result(exp, distinct)
        times, method = model.times, "cycle-by-cycle matrix products"
    else:
        times = model.times if times is None else np.asarray(times, float)
        trace, exposure, method = rows_result(exp, distinct, times)
    exposure = replace(exposure, levels=distinct.levels).take(inverse)
    return CohortResult(times, cleaned(trace, model, times)[inverse], exposure, method + memory,
                        exp.exact, exp.reasons)


SHARE_ROUNDOFF = 1e-7  # how far outside [0, 1] a computed share may be taken by round-off


def cleaned(trace: np.ndarray, model: BoundModel, times: np.ndarray) -> np.ndarray:
    """State shares put back into [0, 1] where numerical error took them out by at most
    SHARE_ROUNDOFF: matrix products stay within 1e-12, but the forward equations solved to
    a relative tolerance of 1e-10 over long horizons drift by a few 1e-9 (measured: -3.3e-9
    for a share near 0 after 33 years of Weibull hazards with discounting). Anything further
    out means the numbers cannot be trusted, and is refused."""
    low, high = float(trace.min(initial=0.0)), float(trace.max(initial=1.0))
    if low < -SHARE_ROUNDOFF or high > 1.0 + SHARE_ROUNDOFF:
        b, t, s = np.unravel_index(np.argmax(np.maximum(-trace, trace - 1.0)), trace.shape)
        value = float(trace[b, t, s])
        off = f"{-value:.3g} below 0" if value < 0 else f"{value - 1:.3g} above 1"
        raise ScenarioError("", f"the analytic counterpart puts state {model.states[s]!r} at "
                            f"time {times[t]:g} {off}, beyond the numerical tolerance "
                            f"({SHARE_ROUNDOFF:g}); the forward equations cannot follow this "
                            "model accurately (hazards that differ by many orders of magnitude "
                            "or become huge within the horizon): shorten the horizon or cap, or "
                            "use a table of rates for the extreme part")
    return np.clip(trace, 0.0, 1.0)
