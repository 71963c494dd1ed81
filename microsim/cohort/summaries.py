"""The analytic side of a scenario as tidy tables: cohort trace, chain summary, outcomes.

These are what `microsim trace` and `microsim summary` print and write; they take a bound
model, so a PSA draw or a strategy is summarised the same way as the base case.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from microsim.binding import BoundModel
from microsim.cohort.analytic import analytic, generators, piece_breaks
from microsim.cohort.cycle_matrices import cycle_matrices
from microsim.cohort.expand import Expansion, expand
from microsim.markov import (NoUniqueSteadyState, absorption, absorption_continuous,
                             probabilities_from_rates, steady_state, steady_state_continuous)
from microsim.results.outcomes import outcome_table
from microsim.patients.treatment import uniform_multipliers


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


def chain_at_start(model: BoundModel) -> tuple[np.ndarray, Expansion]:
    """The one-step matrix (cycle models) or rate matrix of the cohort at time 0, over the
    expanded states, for questions about the chain itself (steady state, absorption)."""
    exp = expand(model)
    mult = uniform_multipliers(model)
    if model.discrete:
        return cycle_matrices(exp, 0, mult)[0][0], exp
    Q, _ = generators(exp, mult, piece_breaks(exp, mult)[:2])
    return Q[0], exp


def chain_summary(model: BoundModel) -> dict[str, pd.DataFrame | str]:
    """Steady state and absorption of the chain at time 0, as tables with a note."""
    matrix, exp = chain_at_start(model)
    collapse = exp.collapse()
    names = [model.states[i] for i, _, _ in exp.expanded]
    unit = model.scenario.time.unit
    varying = model.scenario.tables or any(r.effects for r in model.risks)
    note = ("The model changes with age or time; steady state and absorption describe the "
            "chain as it is at time 0." if varying else "")
    out: dict[str, pd.DataFrame | str] = {"note": note}
    if not model.discrete:
        out["cycle_probabilities"] = cycle_probabilities(model, matrix, exp)
    try:
        pi = (steady_state(matrix, names) if model.discrete
              else steady_state_continuous(matrix, names))
        out["steady_state"] = pd.DataFrame({"state": model.states, "share": pi @ collapse})
    except NoUniqueSteadyState as why:
        out["steady_state_note"] = str(why)
    if model.absorbing.any():
        try:
            a = absorption(matrix) if model.discrete else absorption_continuous(matrix)
        except ValueError as why:
            out["absorption_note"] = str(why)
        else:
            out["absorption"] = absorption_table(model, exp, a, unit)
    return out


def absorption_table(model: BoundModel, exp: Expansion, a, unit: str) -> pd.DataFrame:
    """Expected time to absorption (in time units) and where patients end, by start state."""
    scale = model.cycle if model.discrete else 1.0
    absorbing_states = [model.states[exp.expanded[j][0]] for j in a.absorbing]
    rows = []
    for i, name in enumerate(model.states):
        if model.absorbing[i]:
            continue
        start = np.zeros(exp.size)
        start[exp.entry(i)] = 1.0
        ends = pd.Series(a.probabilities_from(start), index=absorbing_states).groupby(level=0).sum()
        rows.append({"from_state": name, f"expected_time_{unit}": a.expected_time_from(start) * scale,
                     **{f"ends_in_{k}": v for k, v in ends.items()}})
    return pd.DataFrame(rows)


def cycle_probabilities(model: BoundModel, generator: np.ndarray, exp: Expansion) -> pd.DataFrame:
    """Per-cycle transition probabilities of a rate model at time 0, exactly: the matrix
    exponential expm(Q * cycle) of the rate matrix, which accounts for competing risks and
    several moves within a cycle (not the one-rate-at-a-time 1 - exp(-r t)), from each
    state entered afresh, collapsed onto the model's states."""
    P = probabilities_from_rates(generator, model.cycle) @ exp.collapse()
    rows = []
    for i, name in enumerate(model.states):
        rows.append({"from_state": name, **dict(zip(model.states, P[exp.entry(i)]))})
    return pd.DataFrame(rows)
