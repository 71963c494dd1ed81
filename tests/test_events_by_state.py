"""Events whose probability or rate differs by state, against closed forms and against the
same model written with one single-state event per state.

References: with no moves between two states a and b and a constant death rate mu_s in
each, a patient starting in s is alive at t with probability exp(-mu_s t), so the expected
number of events at rate lambda_s by T is lambda_s (1 - exp(-mu_s T)) / mu_s (closed form,
common practice). In a cycle model with death probability d_s per cycle and event
probability q_s, the expected count over n cycles is q_s sum_{k<n} (1 - d_s)^k.
"""
import math

import numpy as np
import pytest

from microsim.cohort.analytic import analytic
from microsim.patients.population import cohort_patients
from microsim.results.comparison import compare
from microsim.results.outcomes import occurrence_counts, outcome_values
from microsim.simulation import simulate
from support import (Z, after, assert_engines_agree, assert_refused, event, horizon, model_of,
                     nested, parameters, probability, rate, scenario_text, start, state,
                     strategy)

SHARE_A, MU, LAMBDA, T = 0.4, {"a": 0.1, "b": 0.3}, {"a": 0.5, "b": 2.0}, 6.0

RATES = scenario_text(
    horizon(T), start(a=SHARE_A, b=1 - SHARE_A), state("a"), state("b"),
    state("dead", absorbing=True),
    rate("a", "dead", MU["a"]), rate("b", "dead", MU["b"]),
    event("flare", None, rate={"a": LAMBDA["a"], "b": "flare_in_b"}, cost=10),
    parameters(flare_in_b=LAMBDA["b"]))


def expected_flares() -> float:
    return sum(share * LAMBDA[s] * (1 - math.exp(-MU[s] * T)) / MU[s]
               for s, share in (("a", SHARE_A), ("b", 1 - SHARE_A)))


def test_rate_model_count_equals_the_closed_form_by_state():
    model = model_of(RATES)
    result = analytic(model)
    assert occurrence_counts(model, result.exposure)["flare"][0] == pytest.approx(
        expected_flares(), rel=1e-10)
    assert outcome_values(model, result.exposure)["costs"][0] == pytest.approx(
        10 * expected_flares(), rel=1e-10)


def test_simulated_count_agrees_with_the_closed_form():
    model = model_of(RATES)
    sim = simulate(model, cohort_patients(4000), 17, keep_exposure=True)
    counts = occurrence_counts(model, sim.exposure)["flare"]
    se = counts.std(ddof=1) / math.sqrt(len(counts))
    assert abs(counts.mean() - expected_flares()) < Z * se
    assert compare(sim).agrees


D, Q, CYCLES = {"a": 0.05, "b": 0.2}, {"a": 0.1, "b": 0.6}, 9

CYCLES_MODEL = scenario_text(
    horizon(CYCLES), start(a=SHARE_A, b=1 - SHARE_A), state("a"), state("b"),
    state("dead", absorbing=True),
    probability("a", "dead", D["a"]), probability("a", "a", "remainder"),
    probability("b", "dead", D["b"]), probability("b", "b", "remainder"),
    event("flare", None, probability={"a": Q["a"], "b": Q["b"]}))


def test_cycle_model_count_equals_the_sum_over_cycles():
    model = model_of(CYCLES_MODEL)
    expected = sum(share * Q[s] * sum((1 - D[s]) ** k for k in range(CYCLES))
                   for s, share in (("a", SHARE_A), ("b", 1 - SHARE_A)))
    counts = occurrence_counts(model, analytic(model).exposure)
    assert counts["flare"][0] == pytest.approx(expected, rel=1e-12)


MOVING = [horizon(8), start(a=1), state("a"), state("b"), state("dead", absorbing=True),
          rate("a", "b", 0.3), rate("a", "dead", 0.05), rate("b", "dead", 0.2)]


def test_equals_one_single_state_event_per_state_with_memory():
    # reference: the same model with an event of its own in each state; the count by state
    # is their sum. Patients start in 'b' and never return to it, so a memory of the event
    # on the way out of 'b' counts the flares in 'b' only, as its split twin does
    common = [horizon(8), start(b=1), state("a"), state("b"), state("dead", absorbing=True),
              rate("a", "dead", 0.05), rate("b", "dead", 0.2)]
    by_state = scenario_text(
        *common, event("flare", None, rate={"a": 0.4, "b": 1.5}),
        rate("b", "a", 0.3, memory=[after("flare", multipliers=[1, 1.5, 2])]))
    split = scenario_text(
        *common, event("flare_a", ["a"], rate=0.4), event("flare_b", ["b"], rate=1.5),
        rate("b", "a", 0.3, memory=[after("flare_b", multipliers=[1, 1.5, 2])]))
    one, two = (analytic(model_of(t)) for t in (by_state, split))
    np.testing.assert_allclose(one.trace, two.trace, rtol=1e-9, atol=1e-12)
    counts = occurrence_counts(model_of(split), two.exposure)
    assert occurrence_counts(model_of(by_state), one.exposure)["flare"][0] == pytest.approx(
        counts["flare_a"][0] + counts["flare_b"][0], rel=1e-9)


def test_a_strategy_changes_the_event_in_every_state():
    text = scenario_text(
        *MOVING, event("flare", None, rate={"a": 0.4, "b": 1.5}),
        strategy("usual", comparator=True),
        strategy("calm", changes=[nested(transition="flare", hazard_ratio=0.5)]))
    from microsim.binding import bind
    from microsim.scenario import parse_scenario
    model = bind(parse_scenario(text), strategy="calm")
    assert [f for f, r in zip(model.treatment.on_factor, model.risks) if r.name == "flare"] \
        == [0.5, 0.5]


def test_a_certain_event_in_one_state_and_none_in_the_other():
    text = scenario_text(
        horizon(5), start(a=1), state("a"), state("b"),
        probability("a", "b", 0.5), probability("a", "a", "remainder"),
        event("visit", None, probability={"a": 1.0, "b": 0.0}))
    model = model_of(text)
    sim = simulate(model, cohort_patients(200), 4, keep_exposure=True)
    counts = occurrence_counts(model, sim.exposure)["visit"]
    # every cycle that starts in 'a' has a visit: the count is the cycles started in 'a'
    started_in_a = (sim.states[:, :-1] == 0).sum(axis=1)
    assert np.array_equal(counts, started_in_a) and counts.min() >= 1


@pytest.mark.parametrize("text", [RATES, CYCLES_MODEL], ids=["rates", "cycles"])
def test_vectorised_engines_give_the_simpy_histories(text):
    assert_engines_agree(model_of(text), np.arange(800) * 3 + 1, 6, rtol=1e-12)


BASE = [horizon(5), start(a=1), state("a"), state("b"), state("dead", absorbing=True),
        rate("a", "b", 0.1), rate("b", "dead", 0.1)]


@pytest.mark.parametrize("flare, path, phrase", [
    (event("flare", None, rate={"a": 0.1, "bb": 0.2}), "events.flare.rate.bb", "did you mean 'b'"),
    (event("flare", ["a"], rate={"a": 0.1}), "events.flare.states", "remove states"),
    (event("flare", None, rate={"a": -0.1}), "events.flare.rate.a", "at least 0"),
    (event("flare", None, rate={}), "events.flare.rate", "at least one state"),
    (event("flare", None, rate={"a": 0.1, "dead": 0.2}), "events.flare.rate.dead", "absorbing"),
    (event("flare", None, probability={"a": 0.1}), "events.flare", "per-cycle probability"),
    (event("flare", None, rate={"a": "r_flare"}), "events.flare.rate.a", "no parameter"),
], ids=["typo", "states-too", "negative", "empty", "absorbing", "wrong-kind", "undefined"])
def test_refusals(flare, path, phrase):
    assert_refused(scenario_text(*BASE, flare), path, phrase)
