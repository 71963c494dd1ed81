"""Two ways between the same two states (two causes of death from one state), each with its
own hazard, cost and count, against a single summed hazard with cause shares.

Reference (closed form, common practice for independent competing risks): with constant
hazards h1 and h2 out of one state, the time of leaving is exponential with rate h1 + h2 and
the cause is the first with probability h1 / (h1 + h2), independently of the time; so the
expected number of deaths from cause 1 by T is h1 / (h1 + h2) (1 - exp(-(h1 + h2) T)). In a
cycle model two moves p1 and p2 out of one row are one move of probability p1 + p2, of which
a share p1 / (p1 + p2) is cause 1, cycle by cycle.
"""
import math

import numpy as np
import pytest

from microsim.cohort.analytic import analytic
from microsim.patients.population import cohort_patients, draw_population
from microsim.results.comparison import compare
from microsim.results.outcomes import occurrence_counts, outcome_values
from microsim.simulation import simulate
from support import (Z, assert_engines_agree, assert_refused, attribute, effect, horizon, model_of, nested,
                     population, probability, rate, scenario_text, start, state, strategy)

H_CANCER, H_OTHER, T = 0.03, 0.07, 10.0

RATES = scenario_text(
    horizon(T), start(well=1), state("well", cost=50), state("dead", absorbing=True),
    rate("well", "dead", H_CANCER, name="cancer", cost=1000, disutility=0.1),
    rate("well", "dead", H_OTHER, name="other", cost=200))

P_CANCER, P_OTHER, CYCLES = 0.02, 0.05, 12

CYCLES_MODEL = scenario_text(
    horizon(CYCLES), start(well=1), state("well"), state("dead", absorbing=True),
    probability("well", "dead", P_CANCER, name="cancer", cost=1000),
    probability("well", "dead", P_OTHER, name="other"),
    probability("well", "well", "remainder"))


def test_rate_model_counts_and_costs_equal_the_summed_hazard_with_cause_shares():
    model = model_of(RATES)
    result = analytic(model)
    total = H_CANCER + H_OTHER
    dead = 1 - math.exp(-total * T)
    assert result.trace[0, -1, 1] == pytest.approx(dead, rel=1e-10)
    counts = occurrence_counts(model, result.exposure)
    assert counts["cancer"][0] == pytest.approx(H_CANCER / total * dead, rel=1e-10)
    assert counts["other"][0] == pytest.approx(H_OTHER / total * dead, rel=1e-10)
    values = outcome_values(model, result.exposure)
    alive_time = dead / total  # integral of exp(-total t) over [0, T]
    expected_costs = 50 * alive_time + 1000 * H_CANCER / total * dead + 200 * H_OTHER / total * dead
    assert values["costs"][0] == pytest.approx(expected_costs, rel=1e-10)
    assert values["qalys"][0] == pytest.approx(-0.1 * H_CANCER / total * dead, rel=1e-10)


def test_cycle_model_counts_equal_the_merged_move_with_cause_shares():
    model = model_of(CYCLES_MODEL)
    result = analytic(model)
    total = P_CANCER + P_OTHER
    # one move of probability p1 + p2: alive at cycle k is (1 - p)^k
    dead_by_end = 1 - (1 - total) ** CYCLES
    counts = occurrence_counts(model, result.exposure)
    assert result.trace[0, -1, 1] == pytest.approx(dead_by_end, rel=1e-12)
    assert counts["cancer"][0] == pytest.approx(P_CANCER / total * dead_by_end, rel=1e-12)
    assert counts["other"][0] == pytest.approx(P_OTHER / total * dead_by_end, rel=1e-12)


@pytest.mark.parametrize("text", [RATES, CYCLES_MODEL], ids=["rates", "cycles"])
def test_simulated_causes_agree_with_their_closed_form_shares(text):
    model = model_of(text)
    n = 4000
    sim = simulate(model, cohort_patients(n), 31, keep_exposure=True)
    counts = occurrence_counts(model, sim.exposure)
    expected = occurrence_counts(model, analytic(model).exposure)
    for cause in ("cancer", "other"):
        p = float(expected[cause][0])  # each patient dies of a cause at most once: binomial
        z = (counts[cause].mean() - p) / math.sqrt(p * (1 - p) / n)
        assert abs(z) < Z, (cause, z)
    assert compare(sim).agrees


def test_an_effect_and_a_strategy_act_on_one_cause_only():
    text = scenario_text(
        horizon(8), start(well=1), state("well"), state("dead", absorbing=True),
        rate("well", "dead", 0.05, name="cancer", effects=[effect("smoker", 2.0)]),
        rate("well", "dead", 0.05, name="other"),
        population(3000, attribute("smoker", "yesno", prevalence=0.4)),
        strategy("usual", comparator=True),
        strategy("screen", changes=[nested(transition="cancer", hazard_ratio=0.5)]))
    from microsim.binding import bind
    from microsim.scenario import parse_scenario
    scenario = parse_scenario(text)
    model = bind(scenario, strategy="screen")
    names = [r.name for r in model.risks]
    assert list(model.treatment.on_factor) == [0.5 if n == "cancer" else 1.0 for n in names]
    patients = draw_population(scenario.population, 5, np.arange(3000))
    result = compare(simulate(model, patients, 5))
    assert result.exact and result.agrees, result.verdict


def test_a_certain_cause_leaves_nothing_to_the_other():
    text = scenario_text(
        horizon(3), start(well=1), state("well"), state("dead", absorbing=True),
        probability("well", "dead", 1.0, name="cancer"),
        probability("well", "dead", 0.0, name="other"))
    model = model_of(text)
    sim = simulate(model, cohort_patients(50), 2, keep_exposure=True)
    counts = occurrence_counts(model, sim.exposure)
    assert counts["cancer"].sum() == 50 and counts["other"].sum() == 0


BASE = [horizon(5), start(well=1), state("well"), state("dead", absorbing=True)]


@pytest.mark.parametrize("blocks, path, phrase", [
    ([rate("well", "dead", 0.1, name="cancer"), rate("well", "dead", 0.2)],
     "transitions.well->dead", "without a name of its own"),
    ([rate("well", "dead", 0.1), rate("well", "dead", 0.2)],
     "transitions.well->dead", "give each way between the same two states a name"),
    ([rate("well", "dead", 0.1, name="cancer"), rate("well", "dead", "p_other", name="other")],
     "transitions.well->dead[other].rate", "no parameter"),
    ([rate("well", "dead", 0.1, name="cancer"), rate("well", "dead", 0.2, name="cancer")],
     "transitions.well->dead[cancer].name", "already the name of"),
], ids=["one-unnamed", "both-unnamed", "typo-in-second-cause", "same-name"])
def test_refusals(blocks, path, phrase):
    assert_refused(scenario_text(*BASE, *blocks), path, phrase)


@pytest.mark.parametrize("text", [RATES, CYCLES_MODEL], ids=["rates", "cycles"])
def test_vectorised_engines_give_the_simpy_histories_cause_by_cause(text):
    model = model_of(text)
    assert_engines_agree(model, np.arange(600) * 5 + 3, 8, rtol=1e-12)
