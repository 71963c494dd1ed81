"""Start shares that depend on who the patient is ([[start.effects]]: odds ratios of starting
in a state, a multinomial logit around start.shares).

References: the logistic form by hand (share = o / (1 + o) with odds o = (s / (1 - s)) x
OR^(x - centre), common practice); and the hand mixture of per-level results: a patient at
a level is a patient of the plain scenario whose start shares are that level's, written as
its own file (so the per-level analytic results are computed without start effects at all).
"""
import math

import numpy as np
import pytest

from microsim.cohort.analytic import analytic
from microsim.patients.multipliers import cohort_multipliers, multipliers
from microsim.patients.population import draw_population
from microsim.results.comparison import compare
from microsim.scenario import parse_scenario
from microsim.binding import bind
from microsim.simulation import simulate
from support import (Z, assert_engines_agree, assert_refused, attribute, horizon, model_of,
                     nested, population, probability, rate, scenario_text, section, start,
                     state)

BASE_SEVERE, OR_SMOKER, OR_MARKER = 0.2, 3.0, 1.5


def start_with(*effects, **shares) -> str:
    """[start] with its [[start.effects]]."""
    return section("start", shares=shares, effects=list(effects))


def odds_effect(state_name, attribute_name, **fields):
    return nested(state=state_name, attribute=attribute_name, **fields)


BODY = [state("mild"), state("severe"), state("dead", absorbing=True),
        rate("mild", "severe", 0.1), rate("mild", "dead", 0.03), rate("severe", "dead", 0.25)]

BY_LEVEL = scenario_text(
    horizon(8),
    start_with(odds_effect("severe", "smoker", odds_ratio=OR_SMOKER),
               mild=1 - BASE_SEVERE, severe=BASE_SEVERE),
    *BODY, population(4000, attribute("smoker", "yesno", prevalence=0.35)))


def logistic(base: float, log_odds_shift: float) -> float:
    odds = base / (1 - base) * math.exp(log_odds_shift)
    return odds / (1 + odds)


def plain(severe: float) -> str:
    return scenario_text(horizon(8), start(mild=1 - severe, severe=severe), *BODY)


def test_each_level_starts_as_the_plain_scenario_with_its_hand_shares():
    scenario = parse_scenario(BY_LEVEL)
    model = bind(scenario)
    patients = draw_population(scenario.population, 2, np.arange(500))
    result = analytic(model, patients)
    smoker = patients["smoker"].to_numpy(bool)
    for level, shift in ((True, math.log(OR_SMOKER)), (False, 0.0)):
        reference = analytic(model_of(plain(logistic(BASE_SEVERE, shift)))).trace[0]
        for row in np.flatnonzero(smoker == level)[:5]:
            np.testing.assert_allclose(result.trace[row], reference, rtol=1e-12, atol=1e-15)
    # the population's mean is the hand mixture of the two per-level results
    mixture = sum(np.mean(smoker == level) * analytic(model_of(plain(logistic(
        BASE_SEVERE, shift)))).trace[0] for level, shift in ((True, math.log(OR_SMOKER)),
                                                              (False, 0.0)))
    np.testing.assert_allclose(result.trace.mean(axis=0), mixture, rtol=1e-10)


def test_simulation_agrees_and_starts_in_severe_at_the_logistic_share():
    scenario = parse_scenario(BY_LEVEL)
    model = bind(scenario)
    patients = draw_population(scenario.population, 9, np.arange(4000))
    sim = simulate(model, patients, 9)
    smoker = patients["smoker"].to_numpy(bool)
    for level, shift in ((True, math.log(OR_SMOKER)), (False, 0.0)):
        p, n = logistic(BASE_SEVERE, shift), int(np.sum(smoker == level))
        share = np.mean(sim.states[smoker == level, 0] == 1)
        assert abs(share - p) < Z * math.sqrt(p * (1 - p) / n), (level, share, p)
    result = compare(sim)
    assert result.exact and result.agrees, result.verdict


THREE = scenario_text(
    horizon(5),
    start_with(odds_effect("b", "marker", odds_ratio=OR_MARKER, centre=2.0),
               odds_effect("c", "marker", coefficient=-0.4, centre=2.0),
               odds_effect("c", "group", odds_ratio=2.0, level="east"),
               a=0.5, b=0.3, c=0.2),
    state("a"), state("b"), state("c"), state("dead", absorbing=True),
    rate("a", "dead", 0.1), rate("b", "dead", 0.2), rate("c", "dead", 0.3),
    population(3000, attribute("marker", "normal", mean=2.0, sd=1.0),
               attribute("group", "categorical", levels=["west", "east"], shares=[0.6, 0.4])))


def test_multinomial_shares_equal_the_hand_formula():
    scenario = parse_scenario(THREE)
    model = bind(scenario)
    patients = draw_population(scenario.population, 4, np.arange(50))
    shares = multipliers(model, patients).start
    x, east = patients["marker"].to_numpy(), (patients["group"] == "east").to_numpy()
    weights = np.stack([np.full(50, 0.5), 0.3 * OR_MARKER ** (x - 2),
                        0.2 * np.exp(-0.4 * (x - 2)) * np.where(east, 2.0, 1.0), np.zeros(50)], 1)
    np.testing.assert_allclose(shares, weights / weights.sum(axis=1, keepdims=True), rtol=1e-12)


def test_the_average_patient_takes_the_mean_attributes_in_the_log_odds():
    # a yes/no attribute with prevalence 0.35 enters as 0.35 (the existing average-patient rule)
    cohort = cohort_multipliers(model_of(BY_LEVEL))
    expected = logistic(BASE_SEVERE, 0.35 * math.log(OR_SMOKER))
    assert cohort.start[0, 1] == pytest.approx(expected, rel=1e-12)


def test_a_certain_start_by_level():
    text = scenario_text(
        horizon(3), start_with(odds_effect("severe", "smoker", coefficient=700.0),
                               mild=0.5, severe=0.5),
        *BODY, population(300, attribute("smoker", "yesno", prevalence=0.5)))
    scenario = parse_scenario(text)
    patients = draw_population(scenario.population, 1, np.arange(300))
    sim = simulate(bind(scenario), patients, 1)
    smoker = patients["smoker"].to_numpy(bool)
    assert np.all(sim.states[smoker, 0] == 1)
    assert 0 < np.mean(sim.states[~smoker, 0] == 1) < 1


CYCLES = scenario_text(
    horizon(6),
    start_with(odds_effect("severe", "marker", odds_ratio=2.0, centre=1.0),
               mild=0.6, severe=0.4),
    state("mild"), state("severe"), state("dead", absorbing=True),
    probability("mild", "severe", 0.1), probability("mild", "dead", 0.02),
    probability("mild", "mild", "remainder"), probability("severe", "dead", 0.2),
    probability("severe", "severe", "remainder"),
    population(1000, attribute("marker", "normal", mean=1.0, sd=0.8)))


@pytest.mark.parametrize("text", [THREE, CYCLES], ids=["rates", "cycles"])
def test_vectorised_engines_give_the_simpy_histories(text):
    assert_engines_agree(model_of(text), np.arange(700) * 7 + 2, 12, rtol=1e-12)


def test_cycle_model_agrees_with_its_per_patient_counterpart():
    scenario = parse_scenario(CYCLES)
    patients = draw_population(scenario.population, 6, np.arange(3000))
    result = compare(simulate(bind(scenario), patients, 6))
    assert result.exact and result.agrees, result.verdict


PEOPLE = population(100, attribute("smoker", "yesno", prevalence=0.3),
                    attribute("group", "categorical", levels=["west", "east"], shares=[0.5, 0.5]))


@pytest.mark.parametrize("effect, path, phrase", [
    (odds_effect("sever", "smoker", odds_ratio=2.0), "start.effects[0].state", "did you mean 'severe'"),
    (odds_effect("dead", "smoker", odds_ratio=2.0), "start.effects[0].state", "start share 0"),
    (odds_effect("severe", "smokr", odds_ratio=2.0), "start.effects[0].attribute", "did you mean 'smoker'"),
    (odds_effect("severe", "group", odds_ratio=2.0), "start.effects[0].level", "is required"),
    (odds_effect("severe", "smoker", odds_ratio=0.0), "start.effects[0].odds_ratio", "odds ratio"),
    (odds_effect("severe", "smoker", odds_ratio=2.0, coefficient=1.0), "start.effects[0].coefficient",
     "cannot be combined"),
    (odds_effect("severe", "smoker", hazard_ratio=2.0), "start.effects[0].hazard_ratio", "unknown key"),
], ids=["state-typo", "zero-share", "attribute-typo", "level-missing", "zero-odds", "both", "wrong-key"])
def test_refusals(effect, path, phrase):
    text = scenario_text(horizon(5), start_with(effect, mild=0.8, severe=0.2), *BODY, PEOPLE)
    assert_refused(text, path, phrase)
