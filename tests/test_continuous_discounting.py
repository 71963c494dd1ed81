"""Continuous discounting (`outcomes.discounting = "continuous"`): the discount rate is an
instantaneous rate per year and the factor at t years is exp(-r t).

References (closed forms, common practice; from memory): alive throughout with utility 1,
the discounted QALYs over T years are the integral of exp(-r t), (1 - exp(-r T)) / r; with
a constant death rate mu, 1 / (r + mu) (1 - exp(-(r + mu) T)); a one-off cost at the end of
cycle k is worth exp(-r k c); a cycle model's trapezoidal sum of exp(-r t) at the cycle
points is a geometric series, summed here by hand. The simulated outcome means must agree
with the closed forms within |z| < 4 of their standard errors.
"""
from __future__ import annotations

import math

import pytest

from microsim.cohort.summaries import expected_outcomes
from microsim.patients.population import cohort_patients
from microsim.results.outcomes import outcome_values
from microsim.simulation import simulate
from support import (assert_mean_agrees, assert_refused, horizon, model_of, outcomes,
                     probability, rate, scenario_text, section, start, state)

R, MU, T = 0.05, 0.2, 12.0  # per year


def rate_model(mu=MU, unit="years", per_year=1.0, discounting="continuous", r=R):
    return model_of(scenario_text(
        section("time", unit=unit, horizon=T * per_year, cycle=per_year),
        start(alive=1.0), state("alive", utility=1.0, cost=1000.0 / per_year),
        state("dead", absorbing=True), rate("alive", "dead", mu / per_year),
        outcomes(discount_costs=r, discount_effects=r, discounting=discounting)))


def measures(model) -> dict:
    return expected_outcomes(model).set_index("measure").value.to_dict()


def test_alive_throughout_gives_the_integral_of_exp_minus_rt():
    found = measures(rate_model(mu=0.0))
    assert found["qalys_discounted"] == pytest.approx((1 - math.exp(-R * T)) / R, rel=1e-12)
    assert found["qalys"] == pytest.approx(T, rel=1e-12)


@pytest.mark.parametrize("unit, per_year", [("years", 1.0), ("months", 12.0), ("days", 365.25)])
def test_a_constant_death_rate_gives_the_closed_form_in_any_unit(unit, per_year):
    found = measures(rate_model(unit=unit, per_year=per_year))
    expected = (1 - math.exp(-(R + MU) * T)) / (R + MU)
    assert found["qalys_discounted"] == pytest.approx(expected, rel=1e-10)
    assert found["costs_discounted"] == pytest.approx(1000.0 * expected, rel=1e-10)


def test_annual_and_continuous_rates_differ_as_ln_1_plus_d():
    """An effective rate d is the instantaneous rate ln(1 + d): the two must agree then."""
    annual = measures(rate_model(discounting="annual", r=0.035))
    continuous = measures(rate_model(r=math.log1p(0.035)))
    assert continuous["qalys_discounted"] == pytest.approx(annual["qalys_discounted"], rel=1e-12)
    assert measures(rate_model(r=0.0))["qalys_discounted"] == pytest.approx(
        annual["qalys"], rel=1e-12)  # r = 0: no discounting (deterministic edge)


def test_simulated_rate_model_agrees_with_the_closed_form():
    model = rate_model()
    sim = simulate(model, cohort_patients(4000), 31, keep_exposure=True)
    values = outcome_values(model, sim.exposure)
    expected = (1 - math.exp(-(R + MU) * T)) / (R + MU)
    assert_mean_agrees(values["qalys_discounted"], expected)
    assert_mean_agrees(values["costs_discounted"], 1000.0 * expected)


def cycle_model(p=0.1):
    return model_of(scenario_text(
        horizon(10), start(alive=1.0), state("alive", utility=1.0),
        state("dead", absorbing=True),
        probability("alive", "dead", p, cost=500.0), probability("alive", "alive", "remainder"),
        outcomes(discount_costs=R, discount_effects=R, discounting="continuous",
                 correction="trapezoidal")))


def test_cycle_model_discounts_each_cycle_point_by_exp_minus_rt():
    p, n = 0.1, 10
    found = measures(cycle_model(p))
    alive = [(1 - p) ** k for k in range(n + 1)]  # the trace, by hand
    weights = [0.5 if k in (0, n) else 1.0 for k in range(n + 1)]  # trapezoidal rule
    qalys = sum(w * a * math.exp(-R * k) for k, (w, a) in enumerate(zip(weights, alive)))
    deaths = sum(alive[k] * p * 500.0 * math.exp(-R * (k + 1)) for k in range(n))
    assert found["qalys_discounted"] == pytest.approx(qalys, rel=1e-12)
    assert found["costs_discounted"] == pytest.approx(deaths, rel=1e-12)
    model = cycle_model(p)
    values = outcome_values(model, simulate(model, cohort_patients(4000), 8, keep_exposure=True).exposure)
    assert_mean_agrees(values["qalys_discounted"], qalys)
    assert_mean_agrees(values["costs_discounted"], deaths)


def test_a_typo_in_discounting_is_refused():
    text = scenario_text(horizon(5), start(alive=1.0), state("alive", utility=1.0),
                         state("dead", absorbing=True), rate("alive", "dead", 0.1),
                         outcomes(discount_costs=0.03, discounting="continous"))
    assert_refused(text, "outcomes.discounting", 'must be one of "annual", "continuous", got '
                                                 "'continous' (did you mean 'continuous'?)")
