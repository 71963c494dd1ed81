"""Accelerated-failure-time effects (time ratios) and the log-normal and generalised gamma
families in scenarios: reading and refusals, simulation against scipy.stats, and the
analytic counterpart (the forward equations) against the simulation and closed forms."""
import math

import numpy as np
import pytest
from scipy import stats

from microsim.patients.multipliers import multipliers
from microsim.patients.population import cohort_patients, draw_population
from microsim.results.comparison import compare
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import (KS_LEVEL, Z, assert_refused, attribute, effect, horizon, model_of,
                     parameters, population, rate, scenario_text, start, state, table,
                     transition, edited)


def time_effect(attribute_name, ratio, **fields):
    return effect(attribute_name, None, time_ratio=ratio, **fields)


def one_way_out(hazard, effects=(), people=None, length=30, **fields):
    return scenario_text(
        horizon(length), start(well=1.0), state("well", utility=1),
        state("dead", absorbing=True),
        transition("well", "dead", hazard=hazard, effects=list(effects) or None, **fields),
        *([people] if people else []))


FRAIL = population(4000, attribute("frail", "yesno", prevalence=0.4))


def first_event_times(model, people, seed):
    """Each patient's time of death, from the event engine's histories."""
    from microsim.engines.event_engine import simulate_events
    from microsim.patients.treatment import patient_multipliers
    ids = people["patient"].to_numpy()
    h = simulate_events(model, patient_multipliers(model, people, seed), ids, seed)
    times = np.full(len(ids), np.inf)
    died = h.risk >= 0
    times[h.patient[died]] = h.time[died]
    return times


# --- reading --------------------------------------------------------------------------------

def test_time_ratio_and_its_log_read_like_hazard_ratios():
    text = one_way_out(dict(family="weibull", shape=1.2, scale=5.0),
                       [effect("frail", None, time_coefficient=math.log(1.5)),
                        effect("score", None, time_ratio="tr", centre=2.0)],
                       population(10, attribute("frail", "yesno", prevalence=0.4),
                                  attribute("score", "normal", mean=2, sd=1)))
    text = scenario_text(text.split("\n", 2)[2], parameters(tr=0.8))
    first, second = parse_scenario(text).transitions[0].effects
    assert first.time_ratio and first.hazard_ratio == pytest.approx(1.5)
    assert second.time_ratio and second.hazard_ratio == "tr" and second.centre == 2.0


BASE = one_way_out(dict(family="weibull", shape=1.2, scale=5.0), [time_effect("frail", 1.5)],
                   population(10, attribute("frail", "yesno", prevalence=0.4)))


@pytest.mark.parametrize("edit, path, phrase", [
    (("time_ratio = 1.5", "time_ratio = 0"), "transitions.well->dead.effects[0].time_ratio",
     "a time ratio must be above 0"),
    (("time_ratio = 1.5", "time_ratio = 1.5\n  hazard_ratio = 2"),
     "transitions.well->dead.effects[0].time_ratio", "cannot be combined with hazard_ratio"),
    (("time_ratio = 1.5", "time_coefficient = 900"),
     "transitions.well->dead.effects[0].time_coefficient", "too large: the time ratio"),
    (("time_ratio = 1.5", "time_ratio = 1.5\n  level = \"x\"\n  centre = 1"),
     "transitions.well->dead.effects[0].level", "cannot be combined with centre"),
    (('attribute = "frail"', 'attribute = "age"'),
     "transitions.well->dead.effects[0].time_ratio", "attained age moves"),
    (('family = "weibull", shape = 1.2, scale = 5.0', 'family = "lognormal", meanlog = 1'),
     "transitions.well->dead.hazard.sdlog", "is required"),
    (('family = "weibull", shape = 1.2, scale = 5.0', 'family = "lognormal", meanlog = 1, sdlog = 0'),
     "transitions.well->dead.hazard.sdlog", "must be above 0"),
    (('family = "weibull", shape = 1.2, scale = 5.0',
      'family = "generalised_gamma", mu = 1, sigma = 0.5, Q = 1'),
     "transitions.well->dead.hazard.Q", "did you mean 'q'"),
    (('family = "weibull"', 'family = "gengamma"'), "transitions.well->dead.hazard.family",
     "generalised_gamma"),
])
def test_refusals(edit, path, phrase):
    assert_refused(edited(BASE, edit), path, phrase)


def test_a_time_ratio_on_a_table_of_rates_is_refused():
    text = scenario_text(
        horizon(5), start(well=1.0, age=40), state("well"), state("dead", absorbing=True),
        rate("well", "dead", "life", effects=[time_effect("frail", 1.5)]),
        table("life", by="age", starts=[0, 50], values=[0.01, 0.05]),
        population(10, attribute("frail", "yesno", prevalence=0.4)))
    assert_refused(text, "transitions.well->dead.effects[0].time_ratio",
                   "a table of rates steps at fixed clock values")


def test_a_time_ratio_on_a_cycle_probability_is_refused():
    text = scenario_text(
        horizon(5), start(well=1.0), state("well"), state("dead", absorbing=True),
        transition("well", "dead", probability=0.1, effects=[time_effect("frail", 1.5)]),
        transition("well", "well", probability="remainder"),
        population(10, attribute("frail", "yesno", prevalence=0.4)))
    assert_refused(text, "transitions.well->dead.effects[0].time_ratio",
                   "a per-cycle probability has no clock to stretch")


def test_a_time_ratio_on_a_constant_rate_is_the_inverse_hazard_ratio():
    # reference: S0(t / a) = exp(-rate t / a): the hazard ratio 1 / a (closed form)
    aft = model_of(one_way_out(dict(family="constant", rate=0.2), [time_effect("frail", 2.0)],
                               FRAIL))
    ph = model_of(one_way_out(dict(family="constant", rate=0.2), [effect("frail", 0.5)], FRAIL))
    people = draw_population(aft.scenario.population, 3)
    a, b = multipliers(aft, people), multipliers(ph, people)
    np.testing.assert_allclose(a.log_static, b.log_static, rtol=1e-15)
    assert a.log_time_scale is None


# --- simulation against scipy.stats ---------------------------------------------------------

def assert_ks(sample, cdf):
    result = stats.kstest(sample, cdf)
    assert result.pvalue > KS_LEVEL, result


@pytest.mark.parametrize("hazard, frail_twin, sound_twin", [
    # reference: scipy.stats: a Weibull with scale times a; a log-normal with meanlog + log a
    (dict(family="weibull", shape=1.3, scale=4.0),
     stats.weibull_min(c=1.3, scale=4.0 * 1.8), stats.weibull_min(c=1.3, scale=4.0)),
    (dict(family="lognormal", meanlog=1.0, sdlog=0.6),
     stats.lognorm(s=0.6, scale=math.exp(1.0) * 1.8), stats.lognorm(s=0.6, scale=math.e)),
    # Q = 1 of the generalised gamma is the Weibull with shape 1/sigma, scale e^mu
    (dict(family="generalised_gamma", mu=1.0, sigma=0.5, q=1.0),
     stats.weibull_min(c=2.0, scale=math.e * 1.8), stats.weibull_min(c=2.0, scale=math.e)),
], ids=["weibull", "lognormal", "generalised-gamma"])
def test_a_time_ratio_stretches_the_time_to_event(hazard, frail_twin, sound_twin):
    model = model_of(one_way_out(hazard, [time_effect("frail", 1.8)], FRAIL, length=200))
    people = draw_population(model.scenario.population, 5)
    times = first_event_times(model, people, 5)
    frail = people.frail.to_numpy()
    assert np.isfinite(times).all()
    assert_ks(times[frail], frail_twin.cdf)
    assert_ks(times[~frail], sound_twin.cdf)


def test_gompertz_time_ratio_follows_its_scaled_survival():
    # reference: S(t) = S0(t / a) with the Gompertz S0 of scipy.stats.gompertz (c = rate/shape,
    # scale 1/shape), i.e. scale a/shape; a time ratio below 1 (0.6) shortens the times
    model = model_of(one_way_out(dict(family="gompertz", rate=0.05, shape=0.3),
                                 [time_effect("frail", 0.6)], FRAIL, length=200))
    people = draw_population(model.scenario.population, 9)
    times = first_event_times(model, people, 9)
    frail = people.frail.to_numpy()
    assert_ks(times[frail], stats.gompertz(c=0.05 / 0.3, scale=0.6 / 0.3).cdf)


# --- the analytic counterpart ----------------------------------------------------------------

PEOPLE = population(3000, attribute("frail", "yesno", prevalence=0.35),
                    attribute("group", "categorical", levels=["a", "b", "c"],
                              shares=[0.3, 0.3, 0.4]))


@pytest.mark.parametrize("hazard", [
    dict(family="weibull", shape=1.4, scale=14.0),
    dict(family="lognormal", meanlog=2.5, sdlog=0.8),
    dict(family="generalised_gamma", mu=2.5, sigma=0.7, q=-0.6),
    dict(family="gompertz", rate=0.02, shape=0.05),
], ids=["weibull", "lognormal", "generalised-gamma", "gompertz"])
def test_simulated_survival_agrees_with_the_forward_equations(hazard):
    # time ratios on two attributes, hazard ratios on one of them and on attained age (the
    # engines' substitution of the module docstring of hazards.time_scaled, against the
    # forward equations integrating m(t) h0(t / a) / a as it stands); |z| < 4 on the
    # survival with its Poisson-binomial standard error
    text = one_way_out(hazard, [time_effect("frail", 0.5), time_effect("group", 2.0, level="b"),
                                effect("group", 1.4, level="c"), effect("age", 1.08, centre=60)],
                       PEOPLE, length=20).replace("[start]\n", "[start]\nage = 55\n")
    model = model_of(text)
    people = draw_population(model.scenario.population, 13)
    sim = simulate(model, people, 13)
    table = compare(sim).survival
    assert (table.z.abs() < Z).all(), table
    assert table.simulated.iloc[-1] < 0.9  # events happen


def test_forward_equations_with_time_ratios_equal_the_closed_form():
    # reference: the trace's survival is the mean over patients of S0(t / a_i), S0 the
    # scipy.stats.lognorm survival, a_i = 1.5 for the frail (closed form)
    text = one_way_out(dict(family="lognormal", meanlog=1.5, sdlog=0.9),
                       [time_effect("frail", 1.5)], FRAIL, length=12)
    model = model_of(text)
    people = draw_population(model.scenario.population, 2).iloc[:40]
    from microsim.cohort.analytic import analytic
    result = analytic(model, people)
    a = np.where(people.frail.to_numpy(), 1.5, 1.0)
    expected = stats.lognorm(s=0.9, scale=math.exp(1.5)).sf(result.times[None, :] / a[:, None])
    np.testing.assert_allclose(result.trace[:, :, 0], expected, rtol=1e-7, atol=1e-9)
