"""The analytic side of a scenario as tidy tables: cohort trace, chain summary, outcomes.

These are what `microsim trace` and `microsim chain` print and write; they take a bound
model, so a PSA draw or a strategy is summarised the same way as the base case.

The chain summary answers "where does a patient go, and for how long" in the form the model
allows. A chain that stays the same over time (`time_dependence`) has a steady state and a
closed-form absorption table (Kemeny & Snell's fundamental matrix, exact on an unlimited
horizon). A chain that changes over time has neither; its answer is the model's own cohort
trace (`analytic`) integrated up to the end of the horizon or lifetime cap, which is shown
for time-homogeneous models with a finite horizon too, so a reader sees both.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from microsim.binding import BoundModel
from microsim.cohort.analytic import CohortResult, analytic, generators, piece_breaks
from microsim.cohort.cycle_matrices import cycle_matrices
from microsim.cohort.expand import Expansion, expand
from microsim.cohort.time_dependence import time_dependence
from microsim.markov import (NoUniqueSteadyState, absorption, absorption_continuous,
                             steady_state, steady_state_continuous)
from microsim.patients.multipliers import Multipliers
from microsim.patients.treatment import uniform_multipliers
from microsim.results.outcomes import outcome_table


def cohort_trace(model: BoundModel, times: np.ndarray | None = None) -> pd.DataFrame:
    """The analytic cohort trace, tidy: time, state, share."""
    result = analytic(model, times=times)
    t, s = np.meshgrid(result.times, np.arange(model.n_states), indexing="ij")
    return pd.DataFrame({"time": t.ravel(), "state": np.array(model.states)[s.ravel()],
                         "share": result.trace[0].ravel()})


def expected_outcomes(model: BoundModel) -> pd.DataFrame:
    """Expected life years, QALYs, costs (and discounted) and event counts for the cohort."""
    result = analytic(model)
    return outcome_table(model, result.exposure)


@dataclass(frozen=True)
class Part:
    """One item of the chain summary: a table under its heading (with words under it), or,
    where no table can be given, the words that say why (`table` None)."""
    name: str
    heading: str
    table: pd.DataFrame | None
    note: str = ""


@dataclass(frozen=True)
class ChainSummary:
    parts: tuple[Part, ...]
    notes: tuple[str, ...]  # what holds for every part (a memory with no exact expansion)

    def part(self, name: str) -> Part:
        return next(p for p in self.parts if p.name == name)

    def tables(self) -> dict[str, pd.DataFrame]:
        return {p.name: p.table for p in self.parts if p.table is not None}


def chain_summary(model: BoundModel) -> ChainSummary:
    """Per-cycle probabilities (rate models), steady state and absorption of the cohort's
    chain, each in the form the model's time dependence allows."""
    exp = expand(model)
    mult = uniform_multipliers(model)
    dependence = time_dependence(exp, mult)
    to_end = model.absorbing.any() and not (dependence.homogeneous and model.lifetime)
    starts = (range(model.n_states) if not model.discrete
              else transient_states(model) if to_end else ())
    runs = {i: analytic(entered_afresh(model, i)) for i in starts}
    parts = []
    if not model.discrete:
        parts.append(cycle_probabilities(model, runs, dependence.homogeneous, exp.exact))
    if dependence.homogeneous:
        matrix = chain_matrix(exp, mult)
        parts.append(steady_state_part(model, exp, matrix))
        if model.absorbing.any():
            parts.append(closed_form_absorption(model, exp, matrix))
    else:
        parts.append(Part("steady_state", "Steady state", None,
                          "none, because the chain changes over time ("
                          + "; ".join(dependence.reasons) + "), so no distribution of the "
                          "cohort stays put; `microsim trace` shows where the cohort goes"))
    if to_end:
        parts.append(absorption_to_end(model, mult, runs, dependence.homogeneous))
    notes = () if exp.exact else (
        "not exact: " + "; ".join(exp.reasons) + ". These figures are those of the analytic "
        "side's Markov approximation of the model, as the reasons say.",)
    return ChainSummary(tuple(parts), notes)


def chain_matrix(exp: Expansion, mult: Multipliers) -> np.ndarray:
    """The one-step matrix (cycle models) or rate matrix at time 0 over the expanded states:
    the chain itself when it is time-homogeneous."""
    if exp.model.discrete:
        return cycle_matrices(exp, 0, mult)[0][0]
    Q, _ = generators(exp, mult, piece_breaks(exp, mult)[:2])
    return Q[0]


def entered_afresh(model: BoundModel, state: int) -> BoundModel:
    """The model with everyone in `state` at time 0, its memory as on entering it."""
    return replace(model, start=np.eye(model.n_states)[state], start_effects=())


def transient_states(model: BoundModel) -> list[int]:
    return [i for i in range(model.n_states) if not model.absorbing[i]]


def time_columns(model: BoundModel, total: float, per_state: np.ndarray) -> dict:
    """Expected time before absorption and in each non-absorbing state, in time units."""
    unit = model.scenario.time.unit
    return {f"expected_time_{unit}": total,
            **{f"time_in_{model.states[i]}_{unit}": per_state[i] for i in transient_states(model)}}


def steady_state_part(model: BoundModel, exp: Expansion, matrix: np.ndarray) -> Part:
    names = [model.states[i] for i, _, _ in exp.expanded]
    try:
        pi = (steady_state(matrix, names) if model.discrete
              else steady_state_continuous(matrix, names))
    except NoUniqueSteadyState as why:
        return Part("steady_state", "Steady state", None, str(why))
    return Part("steady_state", "Steady state (the chain is the same at all times)",
                pd.DataFrame({"state": model.states, "share": pi @ exp.collapse()}))


def closed_form_absorption(model: BoundModel, exp: Expansion, matrix: np.ndarray) -> Part:
    """Expected time to absorption, time in each state and where patients end, by start
    state, from the fundamental matrix (Kemeny & Snell 1960, "Finite Markov Chains", ch. 3;
    continuous time: Neuts 1981, "Matrix-Geometric Solutions in Stochastic Models")."""
    heading = ("Absorption, closed form (fundamental matrix of the chain; exact on an "
               "unlimited horizon" + ("; whole cycles counted, the start cycle included, no "
                                      "within-cycle correction)" if model.discrete else ")"))
    try:
        names = [model.states[i] for i, *_ in exp.expanded]  # expanded states by their state
        a = (absorption(matrix, names) if model.discrete
             else absorption_continuous(matrix, names))
    except ValueError as why:
        return Part("absorption", heading, None, str(why))
    scale = model.cycle if model.discrete else 1.0
    collapse = exp.collapse()
    absorbing_states = [model.states[exp.expanded[j][0]] for j in a.absorbing]
    rows = []
    for i in transient_states(model):
        start = expand(entered_afresh(model, i)).start()
        per_state = start[a.transient] @ a.fundamental @ collapse[a.transient] * scale
        ends = pd.Series(a.probabilities_from(start), index=absorbing_states).groupby(level=0).sum()
        rows.append({"from_state": model.states[i],
                     **time_columns(model, a.expected_time_from(start) * scale, per_state),
                     **{f"ends_in_{k}": v for k, v in ends.items()}})
    return Part("absorption", heading, pd.DataFrame(rows))


def absorption_to_end(model: BoundModel, mult: Multipliers, runs: dict[int, CohortResult],
                      homogeneous: bool) -> Part:
    """For each non-absorbing start state entered afresh at time 0 (at the cohort's start
    age): undiscounted expected time in each state up to the end, the share in each absorbing
    state at the end and the share not absorbed, from the model's own analytic result for
    that start (`runs`: cycle products, matrix exponentials or forward equations), so it
    holds whatever the model's time dependence."""
    unit = model.scenario.time.unit
    end = model.n_cycles * model.cycle
    absorbing = [j for j in range(model.n_states) if model.absorbing[j]]
    rows = []
    for i in transient_states(model):
        per_state, shares = runs[i].exposure.occupancy[0, :, 0], runs[i].trace[0, -1]
        rows.append({"from_state": model.states[i],
                     **time_columns(model, per_state[transient_states(model)].sum(), per_state),
                     **{f"in_{model.states[j]}_at_end": shares[j] for j in absorbing},
                     "not_absorbed_at_end": 1.0 - shares[absorbing].sum()})
    limit = (f"the lifetime cap, {end:g} {unit}" if model.lifetime
             else f"the end of the horizon, {end:g} {unit}")
    age = "" if mult.entry_age is None else f", age {mult.entry_age[0]:g}"
    integral = (f"cycle sums with the '{model.correction}' within-cycle correction"
                if model.discrete else "exact integrals of the trace")
    heading = (f"Absorption up to {limit} (each state entered afresh at time 0{age}; from "
               f"the model's cohort trace; undiscounted; {integral})")
    note = (f"not_absorbed_at_end: the share not yet absorbed at {end:g} {unit}. The times "
            + ("above stop at the lifetime cap, so whatever time this share has left is what "
               "the cap cuts off." if model.lifetime else
               "above stop at the horizon; the time this share has left lies beyond it."))
    if not homogeneous:
        note += (" The chain changes over time, so it has no closed form for an unlimited "
                 "horizon; these figures come from the model's own cohort trace.")
    return Part("absorption_to_end", heading, pd.DataFrame(rows), note)


def cycle_probabilities(model: BoundModel, runs: dict[int, CohortResult], homogeneous: bool,
                        exact: bool) -> Part:
    """Transition probabilities of a rate model over its first cycle, from each state
    entered afresh at time 0, read off the model's own trace for that start (`runs`, on the
    cycle grid): exact, with competing risks and several moves within a cycle (not the
    one-rate-at-a-time 1 - exp(-r t)); for a time-homogeneous chain this is the matrix
    exponential expm(Q * cycle), the same in every cycle."""
    rows = [{"from_state": name, **dict(zip(model.states, runs[i].trace[0, 1]))}
            for i, name in enumerate(model.states)]
    unit = model.scenario.time.unit
    exactly = "exact, " if exact else ""
    heading = (f"Per-cycle transition probabilities (cycle {model.cycle:g} {unit}; {exactly}the "
               "matrix exponential of the rate matrix)" if homogeneous else
               f"Transition probabilities over the first cycle, from time 0 to "
               f"{model.cycle:g} {unit} ({exactly}from the model's cohort trace; the model "
               "changes over time, so later cycles differ)")
    return Part("cycle_probabilities", heading, pd.DataFrame(rows))
