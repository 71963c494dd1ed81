"""Rare, costly ways in the outcome means' test (microsim.results.rare_ways): a way the model
expects only a few times among the compared patients is usually missing from a sample, and
with it its part of the variance, so a mean's standard error is never taken below the one
the model's own variance of its rare ways gives.

References outside the project: hand computations of a two-state rate model (the
exponential and the hypoexponential distribution functions and their integrals); the
variance of a way taken at most once, mu (1 - mu) c^2 (the Bernoulli variance, common
practice); the binomial bound on false alarms over seeds (scipy.stats.binom, through
test_calibration.allowed)."""
import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from microsim.cohort.analytic import analytic
from microsim.patients.population import cohort_patients
from microsim.results.comparison import (EXACT, FAMILY_ALPHA, FLOORED, MONTE_CARLO, UNSEEN,
                                         compare, critical_t)
from microsim.results.rare_ways import WaySums
from microsim.simulation import simulate
from microsim.workflow import validate
from support import event, horizon, model_of, probability, rate, scenario_text, start, state
from test_calibration import allowed


def rare_model(well_cost: float = 200):
    """A state costing 100,000 a cycle that about one patient in 1,100 reaches (invented
    numbers): 0.27 of 300 patients are expected there, so most samples of 300 lack it."""
    return model_of(scenario_text(
        horizon(10, cycle=1), start(well=1),
        state("well", cost=well_cost, utility=0.9), state("rare", cost=100000, utility=0.5),
        state("dead", absorbing=True),
        probability("well", "rare", 1e-4), probability("well", "dead", 0.02),
        probability("well", "well", "remainder"),
        probability("rare", "dead", 0.5), probability("rare", "rare", "remainder")))


def entered_rare(sim) -> int:
    """Patients the sample took into 'rare' (a cycle model: every stay is seen at a cycle
    point)."""
    return int((sim.states == sim.model.states.index("rare")).any(axis=1).sum())


A, B, VISIT, H = 0.01, 0.5, 0.4, 10.0  # well -> sick, sick -> dead, visits in well, horizon


def two_stage():
    return model_of(scenario_text(
        horizon(H), start(well=1), state("well", cost=100), state("sick", cost=3000),
        state("dead", absorbing=True), rate("well", "sick", A), rate("sick", "dead", B),
        event("visit", ["well"], rate=VISIT, cost=50)))


def test_each_ways_count_and_difference_match_the_hand_computation():
    model = two_stage()
    ways = WaySums(model)
    result = analytic(model)
    ways.add(result.exposure, result.trace[:, 0], 1)
    way = {name: w for w, name in enumerate(ways.names)}
    # hand: P(sick by H) = 1 - e^(-aH); P(dead by H), the hypoexponential's distribution
    # function 1 - (b e^(-aH) - a e^(-bH)) / (b - a); time in well (1 - e^(-aH)) / a; in
    # sick a / (b - a) [(1 - e^(-aH)) / a - (1 - e^(-bH)) / b]
    sick = 1 - math.exp(-A * H)
    dead = 1 - (B * math.exp(-A * H) - A * math.exp(-B * H)) / (B - A)
    in_well = (1 - math.exp(-A * H)) / A
    in_sick = A / (B - A) * ((1 - math.exp(-A * H)) / A - (1 - math.exp(-B * H)) / B)
    count = ways.count
    assert count[way["entering 'well'"]] == pytest.approx(1.0, rel=1e-9)
    assert count[way["entering 'sick'"]] == pytest.approx(sick, rel=1e-7)
    assert count[way["entering 'dead'"]] == pytest.approx(dead, rel=1e-7)
    assert count[way["the event 'visit'"]] == pytest.approx(VISIT * in_well, rel=1e-7)
    costs, life = ways.differences("costs"), ways.differences("life_years")
    # entering sick spends its stay (shorter than one in well) at 3000 a year instead of
    # well's 100; a year in sick is a life year as one in well is; death gives up, at
    # sick's one life year a year, the time to the horizon, but no more than a stay in sick
    # per death; a visit costs 50 on top
    stay_sick, stay_dead = in_sick / sick, (H - in_well - in_sick) / dead
    assert stay_sick < in_well
    assert costs[way["entering 'sick'"]] == pytest.approx((3000 - 100) * in_sick, rel=1e-6)
    assert life[way["entering 'sick'"]] == pytest.approx(0.0, abs=1e-9)
    assert life[way["entering 'dead'"]] == pytest.approx(-dead * min(stay_sick, stay_dead),
                                                         rel=1e-6)
    assert costs[way["the event 'visit'"]] == pytest.approx(50 * VISIT * in_well, rel=1e-7)
    # the variance of a way taken at most once with value c, mu (1 - mu) c^2 (Bernoulli);
    # the visits are not rare (4 a patient): no floor from them
    mu, c = sick, (3000 - 100) * in_sick / sick
    variances = ways.variances("costs")
    assert variances[way["entering 'sick'"]] == pytest.approx(mu * (1 - mu) * c ** 2, rel=1e-6)
    assert variances[way["the event 'visit'"]] == 0.0


def test_a_rare_costly_state_no_longer_raises_false_alarms():
    # 20 seeds of 300 patients: before the floor, 9 of them disagreed (the costs' t from
    # -5.2 to -7.0, every one a sample in which no patient reached 'rare'); a correct
    # engine may disagree at most as often as Binomial(20, 0.001) allows at level 0.001
    model = rare_model()
    runs, alarms, unseen = 20, [], 0
    for seed in range(runs):
        sim = simulate(model, cohort_patients(300), seed)
        result = compare(sim)
        alarms += [seed] if result.agrees is False else []
        costs = result.outcomes.set_index("measure").loc["costs"]
        if entered_rare(sim) == 0:
            unseen += 1
            assert costs.test.startswith(FLOORED), costs.test
            assert ("entering 'rare', expected 0.27 times among these 300 patients"
                    in costs.test), costs.test
    assert unseen >= 1  # the case the floor is for is among them
    assert len(alarms) <= allowed(runs, FAMILY_ALPHA), alarms


def test_the_floor_keeps_a_way_expected_a_few_times_within_chance():
    # 8000 patients expect 7.3 in 'rare'; before the floor seed 12 (3 there) gave the costs
    # t = -6.7 against a critical 4.4
    model = rare_model()
    sim = simulate(model, cohort_patients(8000), 12)
    result = compare(sim)
    costs = result.outcomes.set_index("measure").loc["costs"]
    assert entered_rare(sim) < 7
    assert costs.test == FLOORED and result.agrees is True, result.verdict
    assert abs(costs.z) < critical_t(len(result.shares) + len(result.outcomes), 8000)


def test_a_valuation_error_is_still_found_beside_an_unseen_rare_way():
    # a simulation whose every patient's costs come out 1,000 too high (a valuation error
    # of about half the mean), at 2,000 patients: the floored SE is about 140 (the rare
    # way's variance, 0.0009 x (2e5)^2 a patient, over 2,000), so t is near 7 and the
    # rest of the outcome is still tested, also where no patient reached 'rare'
    model = rare_model()
    unseen = 0
    for seed in range(3):
        sim = simulate(model, cohort_patients(2000), seed)
        unseen += entered_rare(sim) == 0
        wrong = replace(sim, values={**sim.values, "costs": sim.values["costs"] + 1000.0})
        result = compare(wrong)
        costs = result.outcomes.set_index("measure").loc["costs"]
        assert result.agrees is False and "costs" in result.verdict, result.verdict
        assert costs.test.startswith(MONTE_CARLO) and costs.p_value < result.level
    assert unseen >= 1  # the case the floor is for is among them


def test_an_ordinary_model_is_tested_on_its_patients_own_standard_error():
    # the four-state model of test_outcome_means at 30 and 300 patients: no way is rare
    # enough to carry more variance than the patients show
    from test_outcome_means import cycle_model
    for n in (30, 300):
        outcomes = compare(simulate(cycle_model(), cohort_patients(n), 3)).outcomes
        assert (outcomes.test == MONTE_CARLO).all(), outcomes.test.tolist()
        assert np.isfinite(outcomes.se).all() and (outcomes.se > 0).all()


@pytest.mark.parametrize("name", ["lakemoor_kidney", "marshdale_lung_pathway", "ward_recovery"])
def test_the_bundled_scenarios_test_their_means_on_the_patients_own_standard_error(name):
    # at 30 and 300 patients the floor sets none of their SEs; a mean is tested, or (as
    # before the floor: ward_recovery's QALYs) not tested because the patients did not vary
    path = Path(__file__).parents[1] / "scenarios" / f"{name}.toml"
    for n in (30, 300):
        for comparison in validate(path, patients=n).validations.values():
            tests = comparison.outcomes.test
            assert tests.isin([MONTE_CARLO, EXACT, UNSEEN]).all(), (n, tests.tolist())
            assert (tests == MONTE_CARLO).sum() >= 3, (n, tests.tolist())
