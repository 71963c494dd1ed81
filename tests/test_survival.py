"""Survival (the share not yet absorbed) against closed forms: the exponential survival
function, and the Poisson-binomial standard error of a share of independent patients."""
import numpy as np
import pytest

from microsim.patients.population import cohort_patients, draw_population
from microsim.results.comparison import compare
from microsim.simulation import simulate
from support import (Z, attribute, effect, horizon, model_of, population, rate, scenario_text,
                     start, state)

RATE, HR = 0.15, 2.5

ONE_WAY_OUT = scenario_text(
    horizon(10), start(well=1.0), state("well", utility=1), state("dead", absorbing=True),
    rate("well", "dead", RATE))

TWO_KINDS = scenario_text(
    horizon(10), start(well=1.0), state("well", utility=1), state("dead", absorbing=True),
    rate("well", "dead", RATE, effects=[effect("frail", HR)]),
    population(3000, attribute("frail", "yesno", prevalence=0.4)))


def survival_of(text: str, people, seed: int):
    sim = simulate(model_of(text), people, seed)
    return compare(sim).survival, sim


@pytest.mark.parametrize("seed, size", [(1, 4000), (7, 1500)])
def test_a_uniform_cohort_follows_the_exponential_survival_function(seed, size):
    table, _ = survival_of(ONE_WAY_OUT, cohort_patients(size), seed)
    # Reference: S(t) = exp(-rate t) for a constant hazard (closed form), and the binomial
    # standard error sqrt(S (1 - S) / N) for N identical, independent patients.
    expected = np.exp(-RATE * table.time.to_numpy())
    np.testing.assert_allclose(table.analytic, expected, rtol=1e-9)
    np.testing.assert_allclose(table.se, np.sqrt(expected * (1 - expected) / size), rtol=1e-9)
    assert (table.z.abs() < Z).all(), table


def test_heterogeneous_patients_take_the_poisson_binomial_standard_error():
    model = model_of(TWO_KINDS)
    people = draw_population(model.scenario.population, 11)
    table, sim = survival_of(TWO_KINDS, people, 11)
    # Reference: each patient survives to t with exp(-rate x HR^frail x t) (closed form);
    # the count of survivors is Poisson-binomial with variance sum q_b (1 - q_b).
    t = table.time.to_numpy()
    hazard = RATE * np.where(people.frail.to_numpy(), HR, 1.0)
    q = np.exp(-np.outer(hazard, t))
    np.testing.assert_allclose(table.analytic, q.mean(axis=0), rtol=1e-9)
    np.testing.assert_allclose(table.se, np.sqrt((q * (1 - q)).sum(axis=0)) / len(people),
                               rtol=1e-9)
    # Hoeffding (1956): the Poisson-binomial variance is at most the binomial one
    mean = q.mean(axis=0)
    assert (table.se <= np.sqrt(mean * (1 - mean) / len(people)) + 1e-15).all()
    assert (table.z.abs() < Z).all(), table
    np.testing.assert_allclose(table.simulated, (sim.states == 0).mean(axis=0))


def test_nobody_absorbed_has_no_monte_carlo_error():
    still = ONE_WAY_OUT.replace(f"rate = {RATE!r}", "rate = 0.0")
    table, _ = survival_of(still, cohort_patients(200), 3)
    assert (table.simulated == 1.0).all() and (table.analytic == 1.0).all()
    assert (table.se == 0.0).all() and (table.z == 0.0).all()


def test_a_model_without_absorbing_state_has_no_survival_rows():
    loop = scenario_text(horizon(5), start(well=1.0), state("well"), state("ill"),
                         rate("well", "ill", 0.3), rate("ill", "well", 0.5))
    table, _ = survival_of(loop, cohort_patients(100), 1)
    assert table.empty and list(table.columns) == ["time", "simulated", "analytic", "se", "z"]
