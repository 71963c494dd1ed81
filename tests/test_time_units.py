"""Life years and QALYs are counted in years and discount rates are per year, whatever the
scenario's time unit: a model in months gives a model in years' outcomes.

Reference: the closed form of a constant death rate mu with continuous discounting at
delta = ln(1 + d) per year, expected discounted time alive (1 - e^{-(mu + delta) T}) /
(mu + delta) (common practice; docs/scenario-format.md, semantics)."""
import math

import numpy as np
import pytest

from microsim.cohort.summaries import expected_outcomes
from microsim.scenario import ScenarioError, parse_scenario
from support import (assert_refused, horizon, model_of, outcomes, rate, scenario_text,
                     section, start, state)

MU, UTILITY, COST, D, YEARS = 0.1, 0.8, 1200.0, 0.035, 10  # per year; cost per year alive


def model_in(unit: str, per_year: float, **time):
    """The same patients in another unit: `per_year` units make a year."""
    return model_of(scenario_text(
        section("time", unit=unit, cycle=per_year, horizon=YEARS * per_year, **time),
        start(alive=1), state("alive", utility=UTILITY, cost=COST / per_year),
        state("dead", absorbing=True), rate("alive", "dead", MU / per_year),
        outcomes(discount_costs=D, discount_effects=D)))


def closed_form(discounted: bool) -> float:
    rate_ = MU + (math.log1p(D) if discounted else 0.0)
    return (1 - math.exp(-rate_ * YEARS)) / rate_


@pytest.mark.parametrize("unit, per_year", [("years", 1), ("months", 12), ("weeks", 365.25 / 7),
                                            ("days", 365.25)])
def test_outcomes_are_in_years_and_discounting_per_year_whatever_the_unit(unit, per_year):
    table = expected_outcomes(model_in(unit, per_year)).set_index("measure").value
    assert table["life_years"] == pytest.approx(closed_form(False), rel=1e-9)
    assert table["qalys"] == pytest.approx(UTILITY * closed_form(False), rel=1e-9)
    assert table["qalys_discounted"] == pytest.approx(UTILITY * closed_form(True), rel=1e-9)
    assert table["costs_discounted"] == pytest.approx(COST * closed_form(True), rel=1e-9)


def test_an_unknown_unit_says_how_long_it_is():
    text = scenario_text(section("time", unit="fortnights", cycle=1, horizon=26),
                         start(alive=1), state("alive", utility=1), state("dead", absorbing=True),
                         rate("alive", "dead", 0.01))
    assert_refused(text, "time.unit", "'fortnights' is not a unit microsim knows (years, months, "
                                      "weeks, days, hours, minutes); give time.years_per_unit")
    given = model_of(text.replace('unit = "fortnights"', 'unit = "fortnights"\nyears_per_unit = 0.0383'))
    life = expected_outcomes(given).set_index("measure").value["life_years"]
    assert life == pytest.approx(0.0383 * (1 - np.exp(-0.26)) / 0.01, rel=1e-9)


def test_a_discount_rate_given_in_percent_is_refused_and_a_large_one_warned_about():
    def given(**rates):
        return scenario_text(horizon(5), start(alive=1), state("alive", utility=1),
                             state("dead", absorbing=True), rate("alive", "dead", 0.1),
                             outcomes(**rates))
    with pytest.raises(ScenarioError) as caught:  # 3.5 meant 3.5%: no rate of 100% is used
        parse_scenario(given(discount_effects=3.5))
    assert str(caught.value) == ("outcomes.discount_effects: 3.5 a year is 350%; discount "
                                 "rates are fractions: write 0.035 for 3.5%")
    warnings = parse_scenario(given(discount_costs=0.35)).warnings  # possible, but unusual
    assert any(w.startswith("outcomes.discount_costs: 0.35 a year is 35%") for w in warnings)
