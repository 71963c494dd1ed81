"""Treatment that starts on entering a state and stops on entering another, and a second
treatment after the first (sequences), against hand-built expanded chains.

Reference: the same model written by hand as a plain scenario whose states are duplicated
into treated copies (common practice: health states by line of therapy), with the
treatment's hazard ratios applied to the copies' rates and its costs added to their state
costs. That file has no strategy and no phases, so its results come from the plain model
only; the strategy's results must equal them (exact counterparts, to round-off), and the
simulation must agree with its own exact counterpart within |z| < 4 (Bonferroni verdict).
"""
import numpy as np
import pytest

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.patients.population import cohort_patients, draw_population
from microsim.results.comparison import compare
from microsim.results.outcomes import outcome_values
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import (after, assert_engines_agree, assert_refused, attribute, event, horizon, model_of,
                     nested, population, probability, rate, scenario_text, start, state,
                     strategy)

COMPARATOR = strategy("usual", comparator=True)

PATHWAY = [
    horizon(12), start(stable=0.9, progressed=0.1),
    state("stable", cost=100, utility=0.9), state("progressed", cost=300, utility=0.7),
    state("relapsed", cost=500, utility=0.5), state("dead", absorbing=True),
    rate("stable", "progressed", 0.2), rate("stable", "dead", 0.02),
    rate("progressed", "relapsed", 0.3, name="relapse"), rate("progressed", "dead", 0.1),
    rate("relapsed", "dead", 0.4, name="die_relapsed")]

SEQUENCE = strategy(
    "treat", start_on="progressed", stop_on="relapsed",
    changes=[nested(transition="relapse", hazard_ratio=0.5), nested(cost=1000, utility=-0.05)],
    then=[nested(name="second", changes=[nested(transition="die_relapsed", hazard_ratio=0.7),
                                         nested(state="relapsed", cost=600)])])

# by hand: progressed patients are on the first treatment (starting there counts as entering
# it), relapsed patients on the second
BY_HAND = scenario_text(
    horizon(12), start(stable=0.9, progressed_first=0.1),
    state("stable", cost=100, utility=0.9),
    state("progressed_first", cost=300 + 1000, utility=0.7 - 0.05),
    state("relapsed_second", cost=500 + 600, utility=0.5), state("dead", absorbing=True),
    rate("stable", "progressed_first", 0.2), rate("stable", "dead", 0.02),
    rate("progressed_first", "relapsed_second", 0.3 * 0.5), rate("progressed_first", "dead", 0.1),
    rate("relapsed_second", "dead", 0.4 * 0.7))

OUTCOMES = ("life_years", "qalys", "costs", "qalys_discounted", "costs_discounted")


def assert_same_results(phased, plain):
    one, two = analytic(phased), analytic(plain)
    np.testing.assert_allclose(one.trace, two.trace, rtol=1e-9, atol=1e-12)
    values, reference = outcome_values(phased, one.exposure), outcome_values(plain, two.exposure)
    for measure in OUTCOMES:
        assert values[measure][0] == pytest.approx(reference[measure][0], rel=1e-9), measure


def test_a_sequence_started_on_progression_equals_the_hand_built_chain():
    model = bind(parse_scenario(scenario_text(*PATHWAY, COMPARATOR, SEQUENCE)), strategy="treat")
    assert model.states == ("stable", "progressed+treat", "relapsed+second", "dead")
    assert_same_results(model, model_of(BY_HAND))


def test_the_first_treatments_copies_are_named_after_the_strategy():
    # docs/scenario-format.md: `<state>+<treatment>`, the first treatment being the strategy
    # itself and each later one its `then` entry's name
    model = bind(parse_scenario(scenario_text(*PATHWAY, COMPARATOR, SEQUENCE)), strategy="treat")
    assert {"progressed+treat", "relapsed+second"} <= set(model.states)
    assert not any(name.endswith(("+usual", "+first")) for name in model.states)
    assert model.entered(model.states.index("progressed+treat")) == "progressed"


def test_stopping_on_a_state_returns_the_patients_to_untreated_rates():
    text = scenario_text(
        *PATHWAY, COMPARATOR,
        strategy("treat", stop_on="progressed",  # on treatment from the start until progression
                 changes=[nested(transition="stable->progressed", hazard_ratio=0.6),
                          nested(cost=800)]))
    by_hand = scenario_text(
        horizon(12), start(stable_treat=0.9, progressed=0.1),
        state("stable_treat", cost=900, utility=0.9), state("progressed", cost=300, utility=0.7),
        state("relapsed", cost=500, utility=0.5), state("dead", absorbing=True),
        rate("stable_treat", "progressed", 0.2 * 0.6), rate("stable_treat", "dead", 0.02),
        rate("progressed", "relapsed", 0.3), rate("progressed", "dead", 0.1),
        rate("relapsed", "dead", 0.4))
    model = bind(parse_scenario(text), strategy="treat")
    assert model.states == ("stable+treat", "progressed+stopped", "relapsed+stopped", "dead")
    assert_same_results(model, model_of(by_hand))


CYCLE_PATHWAY = [
    horizon(10), start(stable=1), state("stable", cost=100), state("progressed", cost=300),
    state("dead", absorbing=True),
    probability("stable", "progressed", 0.15), probability("stable", "dead", 0.02),
    probability("stable", "stable", "remainder"),
    probability("progressed", "dead", 0.2, name="die_progressed"),
    probability("progressed", "progressed", "remainder")]


def test_cycle_model_treatment_on_progression_equals_the_hand_built_chain():
    text = scenario_text(
        *CYCLE_PATHWAY, COMPARATOR,
        strategy("treat", start_on="progressed",
                 changes=[nested(transition="die_progressed", hazard_ratio=0.5),
                          nested(state="progressed", cost=400)]))
    p = 1 - (1 - 0.2) ** 0.5  # the hazard ratio on the rate scale, p' = 1 - (1 - p)^HR
    by_hand = scenario_text(
        horizon(10), start(stable=1), state("stable", cost=100),
        state("progressed_treated", cost=700), state("dead", absorbing=True),
        probability("stable", "progressed_treated", 0.15), probability("stable", "dead", 0.02),
        probability("stable", "stable", "remainder"),
        probability("progressed_treated", "dead", p),
        probability("progressed_treated", "progressed_treated", "remainder"))
    assert_same_results(bind(parse_scenario(text), strategy="treat"), model_of(by_hand))


def test_memory_counts_an_entry_into_a_treated_copy_as_an_entry_into_its_state():
    memory = [after("progressed", multipliers=[1, 2])]
    text = scenario_text(*PATHWAY[:-1], rate("relapsed", "dead", 0.4, name="die_relapsed",
                                                memory=memory), COMPARATOR, SEQUENCE)
    by_hand = BY_HAND.replace(
        "rate = 0.27999999999999997\n",
        'rate = 0.27999999999999997\n\n  [[transitions.memory]]\n  after = "progressed_first"\n'
        "  multipliers = [1, 2]\n")
    assert by_hand != BY_HAND
    assert_same_results(bind(parse_scenario(text), strategy="treat"), model_of(by_hand))


PEOPLE = population(3000, attribute("frail", "yesno", prevalence=0.4))


@pytest.mark.parametrize("uptake", [1.0, 0.6])
def test_simulation_agrees_with_its_exact_counterpart(uptake):
    scenario = parse_scenario(scenario_text(
        *PATHWAY[:-1], rate("relapsed", "dead", 0.4, name="die_relapsed",
                            effects=[nested(attribute="frail", hazard_ratio=1.5)]),
        PEOPLE, COMPARATOR, SEQUENCE.replace('name = "treat"\n',
                                             f'name = "treat"\nuptake = {uptake}\n')))
    model = bind(scenario, strategy="treat")
    patients = draw_population(scenario.population, 21, np.arange(3000))
    result = compare(simulate(model, patients, 21))
    assert result.exact and result.agrees, result.verdict


def test_vectorised_engines_give_the_simpy_histories():
    model = bind(parse_scenario(scenario_text(*PATHWAY, COMPARATOR, SEQUENCE)), strategy="treat")
    assert_engines_agree(model, np.arange(900) * 3 + 5, 3, rtol=1e-12)
    text = scenario_text(*CYCLE_PATHWAY, COMPARATOR, strategy(
        "treat", start_on="progressed", changes=[nested(transition="die_progressed",
                                                        hazard_ratio=0.5)]))
    assert_engines_agree(bind(parse_scenario(text), strategy="treat"),
                         np.arange(900) * 3 + 5, 3)


def test_a_trigger_no_one_reaches_treats_no_one():
    text = scenario_text(
        *PATHWAY, state("transplant", cost=9000), COMPARATOR,
        strategy("treat", start_on="transplant", changes=[nested(cost=1000)]))
    scenario = parse_scenario(text)
    assert any("start_on: no patient reaches" in w for w in scenario.warnings)
    treated, usual = (bind(scenario, strategy=name) for name in ("treat", None))
    assert not any("+" in name for name in treated.states)  # no treated copy is reachable
    for measure in OUTCOMES:
        assert outcome_values(treated, analytic(treated).exposure)[measure][0] == pytest.approx(
            outcome_values(usual, analytic(usual).exposure)[measure][0], rel=1e-12)


def test_everyone_treated_at_once_when_everyone_starts_in_the_trigger_state():
    text = scenario_text(
        horizon(4), start(progressed=1), state("progressed"), state("dead", absorbing=True),
        rate("progressed", "dead", 0.3), COMPARATOR,
        strategy("treat", start_on="progressed", changes=[nested(cost=50)]))
    model = bind(parse_scenario(text), strategy="treat")
    costs = outcome_values(model, analytic(model).exposure)["costs"][0]
    assert costs == pytest.approx(50 * (1 - np.exp(-0.3 * 4)) / 0.3, rel=1e-10)  # closed form


@pytest.mark.parametrize("fields, path, phrase", [
    (dict(start_on="progresed"), "strategies.treat.start_on", "did you mean 'progressed'"),
    (dict(start_on="dead"), "strategies.treat.start_on", "absorbing"),
    (dict(start_on="progressed", stop_on=["relapsed", "progressed"]), "strategies.treat.stop_on",
     "cannot stop on the entry that starts it"),
    (dict(start_on="progressed", then=[nested(name="second")]), "strategies.treat.then.second",
     "give the treatment before it a stop_on"),
    (dict(start_on="progressed", discontinuation=0.1), "strategies.treat.discontinuation",
     "name it in stop_on"),
    (dict(start_on="progressed", stop_on="relapsed",
          then=[nested(name="second", changes=[nested(transition="relapsee", hazard_ratio=2.0)])]),
     "strategies.treat.then.second.changes[0].transition", "did you mean 'relapse'"),
    (dict(start_on="progressed", stop_on="relapsed", then=[nested(name="treat")]),
     "strategies.treat.then[0].name", "already names this strategy"),
    (dict(start_on="progressed", then=[nested(name="second", stop_in="dead")]),
     "strategies.treat.then[0].stop_in", "unknown key"),
], ids=["typo", "absorbing", "same-entry", "never-stops", "discontinuation", "change-typo",
        "name-taken", "key-typo"])
def test_refusals(fields, path, phrase):
    text = scenario_text(*PATHWAY, COMPARATOR,
                         strategy("treat", changes=[nested(cost=10)], **fields))
    assert_refused(text, path, phrase)


def test_a_later_treatment_that_could_lift_a_row_above_1_is_refused():
    # 0.6 under a hazard ratio of 1.5 is 1 - 0.4^1.5 = 0.747, beside 0.3: above 1 (by hand)
    text = scenario_text(
        horizon(5), start(a=1), state("a"), state("b"), state("dead", absorbing=True),
        probability("a", "b", 0.3), probability("a", "a", "remainder"),
        probability("b", "dead", 0.6, name="die_b"), probability("b", "a", 0.3),
        probability("b", "b", "remainder"), COMPARATOR,
        strategy("treat", stop_on="b", changes=[nested(cost=1)],
                 then=[nested(name="second",
                              changes=[nested(transition="die_b", hazard_ratio=1.5)])]))
    assert_refused(text, "strategies.treat.then.second.transitions.b->*", "above 1")


def test_the_patients_treated_are_those_who_reach_the_trigger():
    # start 0.1 in progressed, the rest stable: a patient reaches progressed by the horizon
    # with probability 0.1 + 0.9 * r / (r + mu) * (1 - exp(-(r + mu) H)) (competing
    # exponentials, common practice); the count treated is binomial around it
    from microsim.decision.strategies import treated_count
    scenario = parse_scenario(scenario_text(*PATHWAY, COMPARATOR, SEQUENCE))
    n = 4000
    sim = simulate(bind(scenario, strategy="treat"), cohort_patients(n), seed=5)
    r, mu, h = 0.2, 0.02, 12.0
    p = 0.1 + 0.9 * r / (r + mu) * (1 - np.exp(-(r + mu) * h))
    z = (treated_count(sim) - n * p) / np.sqrt(n * p * (1 - p))
    assert abs(z) < 4, (treated_count(sim), n * p)


def test_histories_give_the_time_treatment_starts_not_the_strategy_s_window(tmp_path):
    # by hand from the same records: a patient's treatment starts at its first entry into
    # a treated copy (a name with "+treat" or "+second"); the sequence never stops
    import pandas as pd
    scenario = parse_scenario(scenario_text(*PATHWAY, COMPARATOR, SEQUENCE))
    path = tmp_path / "histories.parquet"
    simulate(bind(scenario, strategy="treat"), cohort_patients(300), seed=3, histories=path)
    h = pd.read_parquet(path)
    treated = h[h.to_state.astype(str).str.contains(r"\+(?:treat|second)$")]
    by_hand = treated.groupby("patient").time.min()
    given = h.groupby("patient").treatment_start.first()
    pd.testing.assert_series_equal(given.dropna(), by_hand, check_names=False)
    assert 0 < len(by_hand) < 300 and (by_hand > 0).any()
    assert h.treatment_stop.isna().all()


def test_a_patient_a_phase_never_treats_keeps_the_comparators_draws_in_a_cycle_model():
    # common random numbers (docs: strategies share draws): in a cycle model the copies of a
    # state read that state's streams, so an ineligible patient who enters the treatment's
    # copies has, event for event, the comparator's history (a practitioner's trial found
    # the events' draws keyed on the copy's name)
    text = scenario_text(
        horizon(15, cycle=1), start(well=1.0),
        state("well"), state("ill"), state("dead", absorbing=True),
        probability("well", "ill", 0.2), probability("well", "dead", 0.02),
        probability("well", "well", "remainder"),
        probability("ill", "dead", 0.1, name="die_ill"), probability("ill", "ill", "remainder"),
        event("visit", ["well", "ill"], probability=0.3, cost=50),
        population(400, attribute("marker", "yesno", prevalence=0.5)),
        COMPARATOR,
        strategy("treat", start_on="ill", eligible=nested(all=[dict(attribute="marker", equals=True)]),
                 changes=[nested(transition="die_ill", hazard_ratio=0.5)]))
    scenario = parse_scenario(text)
    people = draw_population(scenario.population, 3, np.arange(400))
    usual = simulate(bind(scenario, strategy="usual"), people, 9)
    treat = simulate(bind(scenario, strategy="treat"), people, 9)
    never = ~people["marker"].to_numpy(bool)
    assert never.any() and (~never).any()
    for measure, values in usual.values.items():
        np.testing.assert_array_equal(treat.values[measure][never], values[never])
    # and the treated do differ (the test would pass on a strategy that changed nothing)
    assert not np.array_equal(treat.values["life_years"][~never], usual.values["life_years"][~never])
