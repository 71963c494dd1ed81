"""Outcome means in the comparison: their standard error is estimated from the patients, so
their p-value is Student's t with n - 1 degrees of freedom, and with fewer than
FEWEST_FOR_MEANS patients they are not tested; the verdict names the test behind its
smallest p-value; the average-patient line says whether its measure is discounted."""
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from microsim.cohort.analytic import analytic
from microsim.patients.population import cohort_patients, draw_population
from microsim.results.comparison import (EXACT, FAMILY_ALPHA, FEW, FEWEST_FOR_MEANS,
                                         MEASURE_WORDS, MONTE_CARLO, ComparisonSums, compare,
                                         mean_p_values, share_p_values, share_verdict)
from microsim.results.outcomes import outcome_values
from microsim.simulation import simulate
from support import (attribute, effect, horizon, model_of, population, probability, rate,
                     scenario_text, start, state, transition)
from test_calibration import allowed
from test_comparison import NEVER_ABSORBED


def cycle_model(death: float = 0.1):
    """A cheap four-state cycle model (well, sick, sicker, dead), every state with a cost
    and a utility; `death` is well's yearly probability of dying."""
    return model_of(scenario_text(
        horizon(10, cycle=1), start(well=1),
        state("well", cost=200, utility=0.9), state("sick", cost=1500, utility=0.6),
        state("sicker", cost=4000, utility=0.3), state("dead", absorbing=True),
        probability("well", "sick", 0.15), probability("well", "dead", death),
        probability("well", "well", "remainder"),
        probability("sick", "sicker", 0.2), probability("sick", "dead", 0.1),
        probability("sick", "sick", "remainder"),
        probability("sicker", "dead", 0.35), probability("sicker", "sicker", "remainder")))


def test_the_p_value_of_a_mean_is_students_t_on_the_patients_deviations():
    # the whole path (the batch-wise moments, then the t tail) against scipy's one-sample
    # t test of the patients' deviations from their own expected values
    model = cycle_model()
    sim = simulate(model, cohort_patients(40), 7)
    sums = ComparisonSums(sim.model, sim.grid)
    sums.add(sim)
    outcomes = sums.finish().outcomes.set_index("measure")
    own = outcome_values(model, analytic(model, mult=sim.mult.distinct(), times=sim.grid).exposure)
    for measure, values in sim.values.items():
        reference = stats.ttest_1samp(values - own[measure], 0.0)
        assert outcomes.test[measure] == MONTE_CARLO
        assert outcomes.p_value[measure] == pytest.approx(reference.pvalue, rel=1e-9), measure
        assert outcomes.z[measure] == pytest.approx(reference.statistic, rel=1e-9), measure


@pytest.mark.parametrize("n", [2, 3, 5, 30, 1000])
def test_mean_p_values_follow_the_t_distribution_not_the_normal(n):
    t = np.array([0.5, 2.0, 8.59, 33.18])
    p, certain = mean_p_values(t, np.ones(4), np.full(4, 100.0), n)
    assert not certain.any()
    np.testing.assert_allclose(p, 2 * stats.t.sf(t, n - 1), rtol=1e-12)  # scipy.stats.t
    if n == 2:  # one degree of freedom is the Cauchy: 1 - (2 / pi) atan|t| (closed form)
        np.testing.assert_allclose(p, 1 - 2 / math.pi * np.arctan(t), rtol=1e-9)
        # the trial's z = 33.18 from 2 patients: p = 2e-241 under the normal, 0.019 under t
        assert p[-1] > 0.01 and 2 * stats.norm.sf(t[-1]) < 1e-200


def test_a_deterministic_outcome_is_still_exact_with_two_patients():
    result = compare(simulate(model_of(NEVER_ABSORBED), cohort_patients(2), 3))
    outcomes = result.outcomes.set_index("measure")
    assert outcomes.test["life_years"] == EXACT and outcomes.se["life_years"] == 0.0
    assert (outcomes.drop("life_years").test == FEW).all()
    assert result.agrees is True and "not tested: fewer than" in result.verdict


def test_outcomes_are_tested_from_the_fewest_patients_on():
    model = cycle_model()
    few = compare(simulate(model, cohort_patients(FEWEST_FOR_MEANS - 1), 1)).outcomes
    enough = compare(simulate(model, cohort_patients(FEWEST_FOR_MEANS), 1)).outcomes
    # untested: no se, z or p-value at all (empty), not a z of 0 and a p of 1 that read as a pass
    assert (few.test == FEW).all() and few[["se", "z", "p_value"]].isna().all(axis=None)
    assert (enough.test == MONTE_CARLO).all() and (enough.se > 0).all()


@pytest.mark.parametrize("n", [2, 3, 5, FEWEST_FOR_MEANS])
def test_few_patients_raise_no_more_false_alarms_than_the_family_wise_level(n):
    # the practitioner's trial: with 2 to 5 patients the verdict disagreed in 6 of 15 runs
    # of a correct engine; 200 runs may disagree at most as often as Binomial(200, 0.001)
    # allows at level 0.001 (scipy.stats.binom, as in test_calibration)
    model = cycle_model()
    runs = 200
    alarms = [seed for seed in range(runs)
              if compare(simulate(model, cohort_patients(n), seed)).agrees is False]
    assert len(alarms) <= allowed(runs, FAMILY_ALPHA), alarms


def test_a_doubled_death_probability_is_still_found_by_the_outcome_means():
    # the simulation of well's death at 0.2 judged against the analytic result at 0.1
    model, wrong = cycle_model(0.1), cycle_model(0.2)
    sim = simulate(wrong, cohort_patients(2000), 11)
    result = compare(sim, analytic(model, mult=sim.mult.distinct(), times=sim.grid))
    assert result.agrees is False, result.verdict
    life = result.outcomes.set_index("measure").loc["life_years"]
    assert life.test == MONTE_CARLO and life.p_value < result.level


def verdict_of(shares: pd.DataFrame, outcomes: pd.DataFrame, n: int, level: float = 1e-5):
    return share_verdict(shares, outcomes, "the cohort trace", level, n)


def share_row(time, state_name, count, expected, n):
    simulated, analytic_share = count / n, expected / n
    return pd.DataFrame({"time": [time], "state": [state_name], "simulated": [simulated],
                         "analytic": [analytic_share], "se": [0.1], "z": [3.55],
                         "p_value": share_p_values(np.array([simulated]),
                                                   np.array([analytic_share]), n),
                         "test": [MONTE_CARLO]})


def outcome_row(p_value, t):
    return pd.DataFrame({"measure": ["life_years"], "simulated": [10.0], "analytic": [10.0],
                         "se": [1.0], "z": [t], "p_value": [p_value], "test": [MONTE_CARLO]})


def test_the_verdict_names_the_exact_binomial_tail_and_prints_no_normal_z_beside_it():
    # 3 of 40 patients in a state where 0.5 are expected: the two-sided binomial tail
    # 2 P(X >= 3), X ~ Binomial(40, 0.0125) (scipy.stats.binom)
    n = 40
    p = 2 * stats.binom.sf(2, n, 0.5 / n)
    agrees, verdict = verdict_of(share_row(27, "relapse", 3, 0.5, n), outcome_row(0.6, 0.5), n)
    assert agrees is True
    assert (f"smallest p-value is for relapse at 27 (exact binomial tail p = {p:.2g}; "
            "3 of 40 patients seen against 0.5 expected") in verdict
    assert "z =" not in verdict
    agrees, verdict = verdict_of(share_row(27, "relapse", 3, 0.5, n), outcome_row(0.6, 0.5), n,
                                 level=0.05)
    assert agrees is False and f"relapse at 27 has exact binomial tail p = {p:.2g}" in verdict
    assert "z =" not in verdict


def test_the_verdict_names_students_t_for_a_mean():
    agrees, verdict = verdict_of(share_row(1, "well", 20, 20, 40), outcome_row(1e-7, 6.9), 40)
    assert agrees is False
    assert "life_years has Student's t p = 1e-07; t = 6.90 with 39 degrees of freedom" in verdict


def test_the_average_patient_line_says_whether_its_measure_is_discounted():
    model = model_of(scenario_text(
        horizon(10), start(alive=1), state("alive", utility=1, cost=1000),
        state("dead", absorbing=True), rate("alive", "dead", 0.2,
                                            effects=[effect("risk_factor", 5)]),
        population(400, attribute("risk_factor", "yesno", prevalence=0.5))))
    result = compare(simulate(model, draw_population(model.scenario.population, 5), 6))
    rows = result.average_patient
    worst = rows.loc[rows.relative_difference.abs().idxmax(), "measure"]
    words = MEASURE_WORDS[worst]
    assert ("(undiscounted)" in words) != ("(discounted)" in words)  # exactly one of them
    assert f"gives {words} " in result.average_verdict, result.average_verdict


def test_a_simulated_average_patient_is_not_tested_with_few_patients():
    # a Weibull sojourn in 'sick' (time since entry in a rate model): no exact counterpart,
    # so the average patient is simulated on the same patients and draws
    model = model_of(scenario_text(
        horizon(10), start(well=1), state("well"), state("sick"), state("dead", absorbing=True),
        rate("well", "sick", 0.3, effects=[effect("risk_factor", 3)]),
        transition("sick", "dead", hazard=dict(family="weibull", shape=2.0, scale=3.0),
                   clock="since_entry"),
        population(400, attribute("risk_factor", "yesno", prevalence=0.5))))
    people = draw_population(model.scenario.population, 5)
    few = compare(simulate(model, people.head(FEWEST_FOR_MEANS - 1), 6))
    assert few.agrees is None and "not tested: fewer than" in few.average_verdict
    enough = compare(simulate(model, people, 6))
    assert "degrees of freedom" in enough.average_verdict


@pytest.mark.parametrize("utility, certain", [(0, True), (0.7, False)])
def test_a_measure_the_model_values_nowhere_is_certain_not_untested(utility, certain):
    # no utility anywhere: every patient's QALYs are 0 whatever happens (by construction),
    # so 0 against 0 is an exact agreement, not "the patients did not vary"; a utility on a
    # state only a few of 40 patients reach leaves QALYs able to vary (the negative control)
    model = model_of(scenario_text(
        horizon(10), start(well=1), state("well", cost=100),
        state("rare", cost=100, utility=utility), state("dead", absorbing=True),
        rate("well", "rare", 0.002), rate("well", "dead", 0.1), rate("rare", "dead", 0.1)))
    outcomes = compare(simulate(model, cohort_patients(40), 3)).outcomes.set_index("measure")
    for measure in ("qalys", "qalys_discounted"):
        assert (outcomes.test[measure] == EXACT) == certain, outcomes.test[measure]
    assert (outcomes.test[["costs", "costs_discounted"]] == MONTE_CARLO).all()
