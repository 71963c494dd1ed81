"""Transitions and events that a treatment of a sequence adds for its own time on treatment,
against hand-built expanded chains.

Reference: the chain of the strategy written out by hand as a matrix, with a copy of each
state per treatment phase and each added transition or event only in the copies of its own
treatment's phase (common practice: health states by line of therapy), solved by scipy's
matrix exponential (rate models) or numpy matrix powers (cycle models) as reference
libraries. The strategy's exact counterpart must equal it to round-off, and the simulation
must agree with its exact counterpart within |z| < 4 (the comparison's Bonferroni verdict).
"""
import numpy as np
import pytest
from scipy.linalg import expm

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.patients.population import cohort_patients
from microsim.results.comparison import compare
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import horizon, move, nested, rate, scenario_text, start, state, strategy

COMPARATOR = strategy("usual", comparator=True)


def expm_trace(generator: np.ndarray, start_shares: np.ndarray, times: np.ndarray) -> np.ndarray:
    """(T, S) shares at `times` of the chain with this generator (scipy.linalg.expm)."""
    return np.stack([start_shares @ expm(generator * t) for t in times])


def generator(states: list[str], rates: dict[tuple[str, str], float]) -> np.ndarray:
    """The rate matrix of `rates` between named states, each row summing to 0."""
    q = np.zeros((len(states), len(states)))
    for (source, target), value in rates.items():
        q[states.index(source), states.index(target)] += value
    q -= np.diag(q.sum(axis=1))
    return q


def test_a_first_treatment_transition_acts_in_no_copy_outside_its_phase():
    # the added transition leaves 'stable', which is never treated (treatment starts on
    # entering 'progressed'): no patient may take it, before or after the fix of a binding
    # in which its hazard was 0 on and off treatment and so read by the engines as unchanged
    text = scenario_text(
        horizon(10), start(stable=1), state("stable"), state("progressed"), state("ae"),
        state("dead", absorbing=True), rate("stable", "progressed", 0.1),
        rate("stable", "dead", 0.05), rate("progressed", "dead", 0.2), rate("ae", "dead", 0.5),
        COMPARATOR, strategy("treat", start_on="progressed", changes=[nested(cost=1)],
                             transitions=[move("stable", "ae", rate=0.3, name="toxicity")]))
    model = bind(parse_scenario(text), strategy="treat")
    names = ["stable", "progressed+treat", "dead"]
    by_hand = expm_trace(generator(names, {
        ("stable", "progressed+treat"): 0.1, ("stable", "dead"): 0.05,
        ("progressed+treat", "dead"): 0.2}), np.array([1.0, 0, 0]), model.times)
    np.testing.assert_allclose(analytic(model).trace[0][:, [model.states.index(n) for n in names]],
                               by_hand, atol=1e-9)
    sim = simulate(model, cohort_patients(2000), seed=4)
    assert not any(n.startswith("ae") for n in model.states)  # no copy of 'ae' is reachable
    result = compare(sim)
    assert result.exact and result.agrees, result.verdict
