"""Continuous-time models: the Kolmogorov forward equations of a bound model, per patient.

For a Markov model whose hazards may change with time or attained age (life tables,
Weibull or Gompertz hazards on the time-since-start or age clock, proportional hazards on
attained age), the state distribution solves dpi/dt = pi Q(t) (Kolmogorov forward equation;
e.g. Ross 2014, "Introduction to Probability Models", ch. 6). We integrate it for a whole
batch of patients at once, with the integrals the outcomes need carried along: time in
each state and the expected number of each risk's occurrences, undiscounted and discounted
continuously at the cost and effect rates. When Q is piecewise constant the exact matrix
exponential path in `microsim.cohort.exponentials` is used instead (see `microsim.cohort.analytic`).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.integrate import solve_ivp

from microsim.cohort.expand import Expansion
from microsim.hazards.parametric import ConstantHazard
from microsim.patients.multipliers import Multipliers
from microsim.results.bands import Bands, band_edges, entry_ages
from microsim.results.outcomes import Exposure

RTOL, ATOL = 1e-10, 1e-12


STAGE = -1  # the risk of a flow from one stage of a delay's wait to the next (no risk)


@dataclass(frozen=True)
class Flows:
    """Every (expanded source, expanded target, risk, memory factor) move of the chain; a
    flow of risk STAGE is a stage of a delay (`expand.DELAY_STAGES`) at rate `factor`."""
    source: np.ndarray
    target: np.ndarray
    risk: np.ndarray
    factor: np.ndarray

    @property
    def of_risks(self) -> np.ndarray:
        """Which flows are occurrences of the model's risks (counted), not stages."""
        return self.risk != STAGE

    def net_change(self, n_expanded: int) -> sparse.csr_array:
        """(E, flows): what each flow takes from its source and adds to its target, so
        that the change of the state distribution is this matrix times the fluxes (one
        sparse product where adding flow by flow dominated the solver's time)."""
        moving = np.flatnonzero(self.source != self.target)
        rows = np.concatenate([self.source[moving], self.target[moving]])
        ones = np.ones(len(moving))
        return sparse.csr_array((np.concatenate([-ones, ones]), (rows, np.tile(moving, 2))),
                                shape=(n_expanded, len(self.source)))

    def occurrences(self, n_risks: int) -> sparse.csr_array:
        """(R, flows): which risk each flow is an occurrence of (stages: none)."""
        counted = np.flatnonzero(self.of_risks)
        return sparse.csr_array((np.ones(len(counted)), (self.risk[counted], counted)),
                                shape=(n_risks, len(self.source)))

    def rates(self, hazards: np.ndarray) -> np.ndarray:
        """(..., flows) the rate of each flow, given each risk's hazard (..., R)."""
        return np.where(self.of_risks, hazards[..., self.risk], 1.0) * self.factor


def flows(exp: Expansion) -> Flows:
    model = exp.model
    rows = []
    for e, (i, stage, counts) in enumerate(exp.expanded):
        if model.absorbing[i]:
            continue
        for r, risk in enumerate(model.risks):
            if risk.source == i:
                j = i if risk.is_event else risk.target
                kept = stage if model.waiting[i] and model.waiting[j] else 0  # the wait goes on
                rows.append((e, exp.index(j, kept, exp.after_move(counts, i, (risk,))), r,
                             exp.memory_factor(risk, counts)))
        if model.waiting[i]:  # the next stage of the wait, or after the last the treatment
            n = exp.durations[i]
            after = (exp.index(i, stage + 1, counts) if stage + 1 < n
                     else exp.index(int(model.delay_to[i]), 0, counts))
            rows.append((e, after, STAGE, n / model.delay))
    source, target, risk, factor = (np.array(c) for c in zip(*rows)) if rows else [np.zeros(0)] * 4
    return Flows(source.astype(int), target.astype(int), risk.astype(int), factor.astype(float))


CLOCK_FLOOR = 1e-12  # time units: where a falling hazard (Weibull shape < 1) is infinite at 0


def hazards_at(exp: Expansion, t: float, mult: Multipliers) -> np.ndarray:
    """Each patient's hazard of each risk at time t since start: (B, R), time ratios included.

    A clock at exactly 0 is read at CLOCK_FLOOR, so that a hazard that is infinite at 0
    but integrable (Weibull or log-logistic with shape < 1) stays finite for the solver;
    the cumulative hazard this leaves out is H(1e-12), below 1e-8 for shapes above 0.7."""
    return hazard_reader(exp, mult)(t)


def hazard_reader(exp: Expansion, mult: Multipliers):
    """`hazards_at` as a function of t alone, for a solver that asks at every step: each
    risk's hazard as these patients have it is found once, and the constant rates are one
    vector by which the multipliers are scaled (the same products, in the same order)."""
    model = exp.model
    hazards = [mult.hazard_for(r, risk.hazard) for r, risk in enumerate(model.risks)]
    fixed = [isinstance(hazard, ConstantHazard) for hazard in hazards]
    scale = np.array([hazard.rate if still else 1.0 for hazard, still in zip(hazards, fixed)])
    moving = [(r, risk.clock == "age", hazard)
              for r, (risk, hazard, still) in enumerate(zip(model.risks, hazards, fixed))
              if not still]

    def at(t: float) -> np.ndarray:
        out = mult.at(t) * scale
        for r, by_age, hazard in moving:
            clock = mult.entry_age + t if by_age else np.full(out.shape[0], t)
            out[:, r] *= hazard.hazard_array(np.maximum(clock, CLOCK_FLOOR))
        return out
    return at


def solve_rates(exp: Expansion, mult: Multipliers, times: np.ndarray) -> tuple[np.ndarray, Exposure]:
    """Integrate the forward equations (with outcome integrals) for a batch of patients:
    the trace (B, T, S) and the expected exposure."""
    model = exp.model
    f = flows(exp)
    collapse = exp.collapse()
    batch = mult.size
    E, S, R = exp.size, model.n_states, len(model.risks)
    rates = np.log1p([0.0, model.discount_costs, model.discount_effects])
    window = mult.window
    sizes = [E, 3 * S, 3 * S, 3 * R]
    cuts = np.cumsum(sizes)[:-1]

    hazards = hazard_reader(exp, mult)
    net, occurrences = f.net_change(E), f.occurrences(R)

    def derivative(t, y):
        pi = y.reshape(batch, -1)[:, :E]
        flux = pi[:, f.source] * f.rates(hazards(t))
        d_pi = (net @ flux.T).T
        discount = np.exp(-rates * t)
        d_occ = (pi @ collapse)[:, :, None] * discount
        d_on = d_occ * (0.0 if window is None else window.active(t)[:, None, None])
        d_count = (occurrences @ flux.T).T[:, :, None] * discount
        return np.concatenate([d_pi, d_occ.reshape(batch, -1), d_on.reshape(batch, -1),
                               d_count.reshape(batch, -1)], axis=1).ravel()

    y0 = np.zeros((batch, sum(sizes)))
    y0[:, :E] = exp.start_rows(mult.start, batch)
    # the outcome integrals are running totals from time 0: read at every row's band edges
    # too, their differences split them by band (costs and utilities by age or time)
    edges = band_edges(model, mult.entry_age, batch)
    if edges is not None:
        edges = np.clip(edges, 0.0, times[-1])
    read = times if edges is None else np.union1d(times, edges)
    solution = solve_ivp(derivative, (0.0, times[-1]), y0.ravel(), method="DOP853",
                         t_eval=read, rtol=RTOL, atol=ATOL, max_step=model.cycle)
    if not solution.success:
        raise RuntimeError(f"forward equations did not solve: {solution.message}")
    ys = solution.y.T.reshape(len(read), batch, -1)
    trace = np.einsum("tbe,es->bts", ys[np.searchsorted(read, times), :, :E], collapse)
    _, occ, on, count = np.split(ys[-1], cuts, axis=1)
    bands = None
    if edges is not None:
        totals = ys[np.searchsorted(read, edges), np.arange(batch)[:, None]]  # (B, K + 1, y)
        _, b_occ, b_on, b_count = np.split(np.diff(totals, axis=1), cuts, axis=2)
        K = edges.shape[1] - 1
        bands = Bands(edges, entry_ages(mult.entry_age, batch),
                      b_occ.reshape(batch, K, S, 3).swapaxes(1, 2),
                      b_on.reshape(batch, K, S, 3).swapaxes(1, 2),
                      b_count.reshape(batch, K, R, 3).swapaxes(1, 2))
    return trace, Exposure(occ.reshape(batch, S, 3), count.reshape(batch, R, 3),
                           on.reshape(batch, S, 3), bands=bands)
