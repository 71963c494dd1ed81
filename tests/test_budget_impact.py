"""Budget impact against a cohort calculation built by hand.

The model of test_tornado has a constant death rate r (the drug multiplies it by hr and
adds its price to the yearly cost of being alive), so a patient's undiscounted cost in
year k since entry is (closed form, common practice)

    c_k = (yearly cost) x integral from k - 1 to k of exp(-r t) dt
        = (yearly cost) x (exp(-r (k - 1)) - exp(-r k)) / r.

The payer's cost in calendar year t is then built cohort by cohort, here with loops: the
prevalent patients P entered at the start of year 1, I_j new patients at the start of
year j (the layout of Sullivan et al. 2014's budget impact, from memory), undiscounted.
"""
import math

import numpy as np
import pandas as pd
import pytest

from microsim.cli import main
from microsim.decision.budget_impact import (EXACT, SIMULATED, budget_tables, cohort_weights,
                                             costs_by_year)
from microsim.patients.population import patients_for
from microsim.scenario import ScenarioError, parse_scenario
from microsim.scenario.read_economics import check_incidence_covers
from support import (Z, after, assert_refused, edited, event, horizon, nested, outcomes,
                     probability, rate, scenario_text, section, start, state, strategy)
from test_tornado import C_DRUG, C_WELL, HR, R, model_text

PREVALENT, INCIDENCE, YEARS = 5000, [1000.0, 1100.0, 1250.0], 3
ECONOMICS = section("economics", incidence=INCIDENCE, prevalent_patients=PREVALENT,
                    budget_years=YEARS)


def in_year(k: int, rate: float, yearly: float) -> float:
    return yearly * (math.exp(-rate * (k - 1)) - math.exp(-rate * k)) / rate


def by_hand(per_year: list[float]) -> list[float]:
    """Calendar-year costs, cohort by cohort."""
    costs = []
    for t in range(1, YEARS + 1):
        total = PREVALENT * per_year[t - 1]
        for j in range(1, t + 1):  # the cohort of year j is in its year t - j + 1
            total += INCIDENCE[j - 1] * per_year[t - j]
        costs.append(total)
    return costs


def test_the_payer_s_costs_are_the_cohorts_by_hand():
    tables = budget_tables(parse_scenario(model_text(ECONOMICS)), patients=10)
    usual = [in_year(k, R, C_WELL) for k in range(1, YEARS + 1)]
    drug = [in_year(k, R * HR["value"], C_WELL + C_DRUG["value"]) for k in range(1, YEARS + 1)]
    per_patient = tables["budget_costs_by_year"].set_index(["strategy", "year_since_entry"])
    np.testing.assert_allclose(per_patient.loc["usual"].cost_per_patient, usual, rtol=1e-9)
    np.testing.assert_allclose(per_patient.loc["drug"].cost_per_patient, drug, rtol=1e-9)
    impact = tables["budget_impact"].set_index(["strategy", "year"])
    np.testing.assert_allclose(impact.loc["usual"].cost, by_hand(usual), rtol=1e-9)
    np.testing.assert_allclose(impact.loc["drug"].cost, by_hand(drug), rtol=1e-9)
    np.testing.assert_allclose(impact.loc["drug"].impact,
                               np.subtract(by_hand(drug), by_hand(usual)), rtol=1e-9)
    assert (impact.loc["usual"].impact == 0).all() and (impact.basis == EXACT).all()
    assert impact.loc["drug"].patients_entered.tolist() == [6000.0, 7100.0, 8350.0]
    assert impact.se.isna().all()


def test_the_cohort_weights():
    # calendar year 3 holds the prevalent patients in their year 3, year 1's new patients
    # in their year 3, year 2's in their year 2 and year 3's in their first (by hand)
    weights = cohort_weights(100.0, [10.0, 20.0, 30.0])
    np.testing.assert_array_equal(weights, [[110, 0, 0], [20, 110, 0], [30, 20, 110]])


def cycle_model(correction: str, years: int = 4) -> str:
    return scenario_text(
        horizon(years), start(well=1.0), state("well", cost=1000.0), state("dead", absorbing=True),
        probability("well", "dead", 0.2), probability("well", "well", "remainder"),
        outcomes(correction=correction, discount_costs=0.05),
        section("economics", incidence=100.0, budget_years=years))


def test_a_cycle_model_costs_its_cycles_by_its_own_rule():
    # without correction each cycle counts at its start: year k costs 1000 (1 - p)^(k - 1)
    per_patient = budget_tables(parse_scenario(cycle_model("none")))["budget_costs_by_year"]
    np.testing.assert_allclose(per_patient.cost_per_patient, [1000.0 * 0.8**k for k in range(4)])
    # under the half-cycle correction each year is its trapezoid, c (f_(k-1) + f_k) / 2
    # (Elbasha & Chhatwal 2016), not the half-cycle's cut, which would leave half of each
    # year to the next
    half = budget_tables(parse_scenario(cycle_model("half-cycle")))["budget_costs_by_year"]
    np.testing.assert_allclose(half.cost_per_patient,
                               [1000.0 * (0.8**k + 0.8**(k + 1)) / 2 for k in range(4)])
    # Simpson's rule on two cycles a year: c / 3 (f_(k-1) + 4 f_k + f_(k+1)) over each year
    simpson = cycle_model("simpson").replace("horizon = 4", "cycle = 0.5\nhorizon = 4")
    per_year = budget_tables(parse_scenario(simpson))["budget_costs_by_year"]
    f = 0.8 ** np.arange(9)
    np.testing.assert_allclose(per_year.cost_per_patient,
                               [1000.0 * 0.5 / 3 * (f[2 * k] + 4 * f[2 * k + 1] + f[2 * k + 2])
                                for k in range(4)])


def test_without_an_exact_counterpart_the_costs_are_simulated_with_their_error():
    scenario = parse_scenario(model_text(
        event("fall", ["well"], rate=0.0), ECONOMICS,
        memory=[after("fall", within=2.0, multiplier=2.0)]))
    tables = budget_tables(scenario, patients=3000, seed=4)
    per_patient = tables["budget_costs_by_year"]
    assert (per_patient.basis == SIMULATED).all() and (per_patient.se > 0).all()
    for row in per_patient.itertuples():
        rate, yearly = ((R, C_WELL) if row.strategy == "usual"
                        else (R * HR["value"], C_WELL + C_DRUG["value"]))
        assert abs(row.cost_per_patient - in_year(row.year_since_entry, rate, yearly)) < Z * row.se
    impact = tables["budget_impact"]
    drug = impact[impact.strategy == "drug"]
    assert (drug.impact_se > 0).all()


def test_a_scenario_without_strategies_gets_its_costs_and_no_impact():
    text = scenario_text(horizon(3), start(well=1.0), state("well", cost=1000.0),
                         state("dead", absorbing=True), probability("well", "dead", 0.2),
                         probability("well", "well", "remainder"),
                         section("economics", prevalent_patients=10, budget_years=2))
    impact = budget_tables(parse_scenario(text))["budget_impact"]
    assert impact.strategy.tolist() == ["as written"] * 2 and impact.impact.isna().all()
    assert impact.new_patients.tolist() == [0.0, 0.0]


@pytest.mark.parametrize("economics, path, phrase", [
    (dict(incidence=10, budget_years=20), "economics.budget_years", "past the model's horizon"),
    (dict(budget_years=2), "economics.budget_years", "a budget needs patients"),
    (dict(incidence=[10, 20], budget_years=3), "economics.incidence", "lists 2 years"),
    (dict(incidence=-1), "economics.incidence", "at least 0"),
    (dict(incidence="many"), "economics.incidence", "a number of patients a year"),
    (dict(prevalent_patients=10.5, budget_years=2), "economics.prevalent_patients", "whole"),
    (dict(budget_year=2), "economics.budget_year", "did you mean 'budget_years'"),
])
def test_bad_settings_are_refused(economics, path, phrase):
    text = model_text(section("economics", **economics))
    if "horizon" in phrase or "lists" in phrase:  # checked when the budget is asked for
        with pytest.raises(ScenarioError) as refused:
            budget_tables(parse_scenario(text), patients=5)
        assert refused.value.path == path and phrase in refused.value.message
    else:
        assert_refused(text, path, phrase)


def test_an_incidence_list_covers_the_years_of_the_analysis_that_reads_it():
    # three years of incidence serve a 3-year budget though population EVPI is asked over
    # 10: the list is checked against the years of the analysis run, not every key set
    text = model_text(section("economics", incidence=[100, 200, 300], budget_years=3,
                              evpi_years=10, evpi_discount=0.035))
    impact = budget_tables(parse_scenario(text), patients=5)["budget_impact"]
    assert sorted(impact.new_patients.unique()) == [100.0, 200.0, 300.0]
    with pytest.raises(ScenarioError) as refused:
        check_incidence_covers(parse_scenario(text).economics, "evpi_years")
    assert refused.value.path == "economics.incidence" and "lists 3 years" in refused.value.message


def test_a_model_in_months_counts_its_budget_years_of_twelve_months():
    # the same patients in months: the rate and the cost per unit of time are twelfths,
    # so year k since entry costs what the yearly model's closed form says
    text = scenario_text(horizon(48), start(well=1.0), state("well", cost=C_WELL / 12),
                         state("dead", absorbing=True), rate("well", "dead", R / 12),
                         section("economics", incidence=100.0, budget_years=YEARS))
    months = parse_scenario(text.replace('unit = "years"', 'unit = "months"'))
    per_patient = budget_tables(months)["budget_costs_by_year"]
    np.testing.assert_allclose(per_patient.cost_per_patient,
                               [in_year(k, R, C_WELL) for k in range(1, YEARS + 1)], rtol=1e-9)


def delayed_model(rule: str = "separate", death="0.2") -> str:
    """cycle_model's patients, undiscounted, with a treatment costing 500 a year that
    starts two cycles after entry (start_delay)."""
    return edited(cycle_model("trapezoidal"), ("discount_costs = 0.05", ""),
                  ("horizon = 4", f'horizon = 4\nprobability_rule = "{rule}"'),
                  ("probability = 0.2", f"probability = {death}")) + "\n" + "\n".join([
        strategy("usual", comparator=True),
        strategy("later", start_on="well", start_delay=2, changes=[nested(cost=500.0)])])


def test_a_delayed_treatment_costs_from_its_start_by_hand():
    # The treatment costs c from cycle point 2 on: by the trapezoidal rule (common
    # practice) year 1 costs what usual care costs, year k >= 2 c ((1 - p)^(k - 1) [k > 2]
    # + (1 - p)^k) / 2 more a patient (by hand); calendar year t holds one cohort of 100 in
    # each of its years 1..t since entry.
    p, c, people = 0.2, 500.0, 100.0
    impact = budget_tables(parse_scenario(delayed_model()))["budget_impact"].set_index(
        ["strategy", "year"])
    later = impact.loc["later"]
    assert later.impact.loc[1] == 0.0
    by_hand = [people * c * ((1 - p) ** (k - 1) * (k > 2) + (1 - p) ** k) / 2 for k in (2, 3, 4)]
    np.testing.assert_allclose(later.impact.loc[2:], np.cumsum(by_hand), rtol=1e-9)
    assert (impact.loc["usual"].impact == 0.0).all()


def test_an_impact_of_round_off_is_shown_as_0_and_said(tmp_path, capsys):
    # Under the competing rule with a death probability by age, the delayed strategy's
    # chain (countdown copies of each state) gives each patient's first year in the last
    # bits of usual care's (1e-13 apart): the impact of that year is 0, by the rule of the
    # per-strategy tables (results.comparison.within_roundoff), and the summary says so
    text = scenario_text(
        horizon(4, cycle=1, rule="competing"), start(age=60, well=0.7, sick=0.3),
        state("well", cost=1000.0), state("sick", cost=3000.0), state("dead", absorbing=True),
        probability("well", "sick", 0.15), probability("well", "dead", "death"),
        probability("well", "well", "remainder"), probability("sick", "dead", 0.2),
        probability("sick", "sick", "remainder"),
        section("tables.death", by="age", starts=[0, 60, 62, 64], values=[0.01, 0.02, 0.03, 0.05]),
        outcomes(correction="trapezoidal"),
        section("economics", incidence=1200.0, prevalent_patients=9000, budget_years=2),
        strategy("usual", comparator=True),
        strategy("later", start_on=["well", "sick"], start_delay=2, changes=[nested(cost=500.0)]))
    scenario = parse_scenario(text)
    people = patients_for(scenario, 3, 1)
    first_years = [costs_by_year(scenario, people, 1, name, 1)[0][:, 0] for name in ("usual", "later")]
    np.testing.assert_allclose(*first_years, rtol=1e-14)
    assert (first_years[0] != first_years[1]).all()  # the round-off this test is about
    impact = budget_tables(scenario, patients=3)["budget_impact"].set_index(["strategy", "year"])
    assert impact.loc[("later", 1), "impact"] == 0.0 and impact.loc[("later", 2), "impact"] > 0
    path = tmp_path / "later.toml"
    path.write_text(text)
    assert main(["budget", str(path), "--patients", "3", "--out", str(tmp_path / "out")]) == 0
    assert "Budget impact: an impact of 0 is one within round-off" in capsys.readouterr().out


def test_a_budget_needs_years_in_whole_cycles():
    two_year_cycles = cycle_model("none").replace("horizon = 4", "cycle = 2\nhorizon = 4")
    with pytest.raises(ScenarioError) as refused:
        budget_tables(parse_scenario(two_year_cycles))
    assert "whole cycles" in refused.value.message


def test_the_command_and_its_options(tmp_path, capsys):
    path = tmp_path / "drug.toml"
    path.write_text(model_text(ECONOMICS))
    out = tmp_path / "out"
    assert main(["budget", str(path), "--patients", "5", "--budget-years", "2",
                 "--incidence", "300", "--prevalent-patients", "0", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "Budget impact" in printed and "undiscounted" in printed
    written = pd.read_parquet(out / "drug" / "latest" / "budget_impact.parquet")
    usual = written[written.strategy == "usual"]
    np.testing.assert_allclose(usual.cost, [300 * in_year(1, R, C_WELL),
                                            300 * (in_year(2, R, C_WELL) + in_year(1, R, C_WELL))])
    assert main(["budget", str(path), "--budget-years", "two", "--out", str(out)]) == 2
    assert capsys.readouterr().err.startswith("error: --budget-years: must be a whole number")
