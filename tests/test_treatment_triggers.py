"""Treatment started or stopped by an event (rate models; cycle models in
test_cycle_event_triggers.py), and a delay to treatment (cycle models), against hand-built
expanded chains.

Reference: the same model written by hand as a plain scenario in which every living state
has an untreated and a treated copy and the event that starts treatment is a transition
from a state's untreated copy to its treated copy, with the event's rate and cost (common
practice: a treatment history as states). That file has no strategy, no phases and no
triggers, so its results come from the plain model only; the strategy's exact counterpart
must equal them to round-off, and the simulation must agree with its own exact counterpart
within |z| < 4 (the comparison's Bonferroni verdict).
"""
import numpy as np
import pytest

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.patients.population import draw_population
from microsim.results.comparison import compare
from microsim.results.outcomes import outcome_values
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import (after, assert_engines_agree, assert_refused, attribute, event, horizon,
                     model_of, nested, population, probability, rate, scenario_text, start,
                     state, strategy, table)
from test_treatment_phases import COMPARATOR, OUTCOMES, assert_same_results

FLARING = [
    horizon(10), start(stable=1), state("stable", cost=100, utility=0.9),
    state("progressed", cost=300, utility=0.6), state("dead", absorbing=True),
    rate("stable", "progressed", 0.15, name="progress"), rate("stable", "dead", 0.02),
    rate("progressed", "dead", 0.25, name="die_progressed"),
    event("flare", ["stable", "progressed"], rate=0.4, cost=250)]

ON_FLARE = strategy(
    "treat", start_on="flare",
    changes=[nested(transition="progress", hazard_ratio=0.5),
             nested(transition="die_progressed", hazard_ratio=0.8), nested(cost=1000)])

# by hand: the first flare is a transition into the treated copy of the same state; later
# flares are events of the treated copies (the same cost, once each)
BY_HAND = scenario_text(
    horizon(10), start(stable=1), state("stable", cost=100, utility=0.9),
    state("stable_treated", cost=1100, utility=0.9), state("progressed", cost=300, utility=0.6),
    state("progressed_treated", cost=1300, utility=0.6), state("dead", absorbing=True),
    rate("stable", "progressed", 0.15), rate("stable", "dead", 0.02),
    rate("stable", "stable_treated", 0.4, name="first_flare_stable", cost=250),
    rate("stable_treated", "progressed_treated", 0.15 * 0.5),
    rate("stable_treated", "dead", 0.02),
    rate("progressed", "dead", 0.25),
    rate("progressed", "progressed_treated", 0.4, name="first_flare_progressed", cost=250),
    rate("progressed_treated", "dead", 0.25 * 0.8),
    event("flare", ["stable_treated", "progressed_treated"], rate=0.4, cost=250))


def test_treatment_started_by_an_event_equals_the_hand_built_chain():
    model = bind(parse_scenario(scenario_text(*FLARING, COMPARATOR, ON_FLARE)), strategy="treat")
    assert model.states == ("stable", "stable+treat", "progressed", "progressed+treat", "dead")
    assert_same_results(model, model_of(BY_HAND))
    # the flares counted: the phased model's one event name against the hand-built's three
    mine, theirs = analytic(model), analytic(model_of(BY_HAND))
    flares = sum(mine.exposure.occurrences[0, r, 0] for r, risk in enumerate(model.risks)
                 if risk.name == "flare")
    hand = model_of(BY_HAND)
    reference = sum(theirs.exposure.occurrences[0, r, 0] for r, risk in enumerate(hand.risks)
                    if "flare" in risk.name)
    assert flares == pytest.approx(reference, rel=1e-9)


def test_an_event_that_stops_treatment_returns_the_patients_to_untreated_rates():
    text = scenario_text(*FLARING, COMPARATOR, strategy(
        "treat", stop_on="flare", changes=[nested(transition="progress", hazard_ratio=0.5)]))
    by_hand = scenario_text(
        horizon(10), start(stable_on=1), state("stable_on", cost=100, utility=0.9),
        state("stable", cost=100, utility=0.9), state("progressed_on", cost=300, utility=0.6),
        state("progressed", cost=300, utility=0.6), state("dead", absorbing=True),
        rate("stable_on", "progressed_on", 0.15 * 0.5), rate("stable_on", "dead", 0.02),
        rate("stable_on", "stable", 0.4, name="stop_stable", cost=250),
        rate("stable", "progressed", 0.15), rate("stable", "dead", 0.02),
        rate("progressed_on", "dead", 0.25),
        rate("progressed_on", "progressed", 0.4, name="stop_progressed", cost=250),
        rate("progressed", "dead", 0.25),
        event("flare", ["stable", "progressed"], rate=0.4, cost=250))
    assert_same_results(bind(parse_scenario(text), strategy="treat"), model_of(by_hand))


def test_a_treatment_that_changes_no_rate_keeps_the_model_and_its_memory():
    # memory of the flares and of entries into 'progressed' must count as in the model as
    # written: the move between copies of a state is the event (counted once), not an entry
    memory = [after("flare", multipliers=[1, 1.5, 2.5]), after("stable", multipliers=[1, 3])]
    base = [*FLARING[:5], rate("stable", "progressed", 0.15, name="progress", memory=memory),
            rate("stable", "dead", 0.02), rate("progressed", "dead", 0.25, name="die_progressed",
                                               memory=[after("progressed", multipliers=[1, 4])]),
            FLARING[-1]]
    text = scenario_text(*base, COMPARATOR, strategy("treat", start_on="flare",
                                                     changes=[nested(cost=1000)]))
    scenario = parse_scenario(text)
    treated, usual = bind(scenario, strategy="treat"), bind(scenario)
    one, two = analytic(treated), analytic(usual)
    collapse = np.array([[usual.states.index(treated.entered(i)) == j for j in
                          range(usual.n_states)] for i in range(treated.n_states)], float)
    np.testing.assert_allclose(one.trace @ collapse, two.trace, rtol=1e-9, atol=1e-12)
    for name in ("flare", "progress"):
        count = [sum(result.exposure.occurrences[0, r, 0] for r, risk in enumerate(m.risks)
                     if risk.name == name) for m, result in ((treated, one), (usual, two))]
        assert count[0] == pytest.approx(count[1], rel=1e-9), name


PEOPLE = population(3000, attribute("frail", "yesno", prevalence=0.4))


def test_simulation_agrees_with_its_exact_counterpart():
    scenario = parse_scenario(scenario_text(
        *FLARING[:-1], event("flare", ["stable", "progressed"], rate=0.4, cost=250,
                             effects=[nested(attribute="frail", hazard_ratio=1.5)],
                             memory=[after("flare", multipliers=[1, 0.5])]),
        PEOPLE, COMPARATOR, ON_FLARE.replace('name = "treat"\n', 'name = "treat"\nuptake = 0.7\n')))
    model = bind(scenario, strategy="treat")
    patients = draw_population(scenario.population, 23, np.arange(3000))
    result = compare(simulate(model, patients, 23))
    assert result.exact and result.agrees, result.verdict


def test_vectorised_engine_gives_the_simpy_histories():
    model = bind(parse_scenario(scenario_text(*FLARING, COMPARATOR, ON_FLARE)), strategy="treat")
    assert_engines_agree(model, np.arange(900) * 3 + 5, 3, rtol=1e-12)


@pytest.mark.parametrize("blocks, fields, path, phrase", [
    (FLARING, dict(start_on="flair"), "strategies.treat.start_on", "did you mean 'flare'"),
    (FLARING, dict(start_on="flare", stop_on="flare"), "strategies.treat.stop_on",
     "cannot stop on the entry that starts it"),
    (FLARING[:-1] + [event("flare", ["stable"], hazard=nested(family="weibull", shape=1.5,
                                                                scale=2.0))],
     dict(start_on="flare"), "strategies.treat.start_on", "time since entry"),
], ids=["typo", "same-event", "clock"])
def test_refusals(blocks, fields, path, phrase):
    assert_refused(scenario_text(*blocks, COMPARATOR,
                                 strategy("treat", changes=[nested(cost=10)], **fields)),
                   path, phrase)


# -- a delay from the trigger to the start (cycle models) -----------------------------------

def delayed_pathway(die_progressed):
    return [horizon(10), start(stable=0.8, progressed=0.2), state("stable", cost=100),
            state("progressed", cost=300), state("dead", absorbing=True),
            table("dying", by="time_in_state", starts=[0, 1, 3], values=[0.1, 0.2, 0.3]),
            probability("stable", "progressed", 0.15), probability("stable", "dead", 0.02),
            probability("stable", "stable", "remainder"),
            probability("progressed", "dead", die_progressed, name="die_progressed"),
            probability("progressed", "progressed", "remainder")]


DELAYED = strategy("treat", start_on="progressed", start_delay=2.0,
                   changes=[nested(transition="die_progressed", hazard_ratio=0.5),
                            nested(state="progressed", cost=400)])


def treated(p):  # the hazard ratio on the rate scale, p' = 1 - (1 - p)^HR
    return 1 - (1 - p) ** 0.5


def test_a_delay_of_two_cycles_equals_the_hand_built_countdown():
    # by hand: two tunnel states count the cycles down to the treated state, as in any
    # tunnel-state model (common practice); time in 'progressed' runs on through them, so
    # the time_in_state table reads 0.1 in the first cycle there, 0.2 in the next two, then
    # 0.3 (the treated state is a tunnel too: its first cycle is the third in progressed)
    model = bind(parse_scenario(scenario_text(*delayed_pathway("dying"), COMPARATOR, DELAYED)),
                 strategy="treat")
    assert model.states == ("stable", "progressed+treat-wait2", "progressed+treat-wait1",
                            "progressed+treat", "dead")
    by_hand = scenario_text(
        horizon(10), start(stable=0.8, wait2=0.2), state("stable", cost=100),
        state("wait2", cost=300), state("wait1", cost=300), state("treated_early", cost=700),
        state("treated", cost=700), state("dead", absorbing=True),
        probability("stable", "wait2", 0.15), probability("stable", "dead", 0.02),
        probability("stable", "stable", "remainder"),
        probability("wait2", "dead", 0.1), probability("wait2", "wait1", "remainder"),
        probability("wait1", "dead", 0.2), probability("wait1", "treated_early", "remainder"),
        probability("treated_early", "dead", treated(0.2)),
        probability("treated_early", "treated", "remainder"),
        probability("treated", "dead", treated(0.3)),
        probability("treated", "treated", "remainder"))
    plain = model_of(by_hand)
    one, two = analytic(model), analytic(plain)
    merge = np.zeros((plain.n_states, model.n_states))  # the two treated tunnels are one state
    for j, name in enumerate(plain.states):
        merge[j, min(j, 3) if j < 4 else j - 1] = 1.0
    np.testing.assert_allclose(one.trace, two.trace @ merge, rtol=1e-9, atol=1e-12)
    values, reference = outcome_values(model, one.exposure), outcome_values(plain, two.exposure)
    for measure in OUTCOMES:
        assert values[measure][0] == pytest.approx(reference[measure][0], rel=1e-9), measure


def test_delayed_treatment_simulated_agrees_and_engines_give_the_same_histories():
    scenario = parse_scenario(scenario_text(*delayed_pathway("dying"), PEOPLE, COMPARATOR,
                                            DELAYED.replace('name = "treat"\n',
                                                            'name = "treat"\nuptake = 0.6\n')))
    model = bind(scenario, strategy="treat")
    patients = draw_population(scenario.population, 29, np.arange(3000))
    result = compare(simulate(model, patients, 29))
    assert result.exact and result.agrees, result.verdict
    assert_engines_agree(model, np.arange(900) * 3 + 5, 3)


def test_a_delay_of_zero_is_no_delay():
    plain, zero = (bind(parse_scenario(scenario_text(
        *delayed_pathway(0.2), COMPARATOR, DELAYED.replace("start_delay = 2.0", f"start_delay = {d}"))),
        strategy="treat") for d in ("0.0", "0"))
    assert plain.states == zero.states == ("stable", "progressed+treat", "dead")


@pytest.mark.parametrize("blocks, fields, path, phrase", [
    (None, dict(start_on="progressed", start_delay=1.5), "strategies.treat.start_delay",
     "not a whole number of cycles"),
    (None, dict(start_on="progressed", start_delay=-1), "strategies.treat.start_delay", "at least 0"),
    (None, dict(start_delay=2), "strategies.treat.start_delay", "give start_on"),
], ids=["part-cycle", "negative", "no-trigger"])
def test_delay_refusals(blocks, fields, path, phrase):
    blocks = delayed_pathway(0.2) if blocks is None else blocks
    assert_refused(scenario_text(*blocks, COMPARATOR,
                                 strategy("treat", changes=[nested(cost=10)], **fields)),
                   path, phrase)
