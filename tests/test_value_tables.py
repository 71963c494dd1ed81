"""Costs and utilities read from tables: by an attribute's level, by attained age, by time.

Each patient is valued at its own level's value (and, by age or time, at the value of the
band it is in), in the simulation and in the analytic counterpart alike. The checks:
- by level: a model whose utility (or a cost of a state, a transition, an event or a
  treatment) is a table by sex gives each sex exactly (1e-12) what the same model with
  that sex's number typed in gives those patients;
- by age and by time: closed forms, worked out here by hand: the discounted trace of a
  cycle model weighted by each cycle point's band value, and for a constant rate mu the
  integral of u(a + t) e^{-(mu + delta) t} over each band (and of c(a + t) mu e^{...} for
  a one-off cost);
- the simulated patients agree with their analytic expectation (|z| < 4, fixed seeds),
  subgroup by subgroup, and a run's validation says so;
- the average patient is valued at the share-weighted mean of the levels' values (its
  definition in docs/scenario-format.md: a value is linear in the levels' indicators);
- bad tables are refused in one line naming the field (exit 2 on the command line).
"""
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from microsim.binding import bind
from microsim.capacity.binding import bind_capacity
from microsim.capacity.outcomes import window_outcomes
from microsim.capacity.run import replication
from microsim.cli import main
from microsim.cohort.analytic import analytic
from microsim.engines.event_engine import simulate_events
from microsim.patients.population import draw_population, patients_for, scenario_patients
from microsim.patients.treatment import patient_multipliers
from microsim.results import aggregate
from microsim.results.outcomes import outcome_values
from microsim.scenario import ScenarioError, parse_scenario, read_scenario
from microsim.simulation import simulate
from microsim.workflow import validate
from support import (Z, assert_refused, attribute, edited, event, horizon, model_of, nested,
                     outcomes, population, probability, rate, scenario_text, start, state,
                     strategy, table, transition)
from test_capacity_engine import RICH, SEED

SEX = attribute("sex", "categorical", levels=["female", "male"], shares=[0.4, 0.6])
AGES = attribute("age", "uniform", lower=50, upper=75)
BY_SEX = {"female": 0.9, "male": 0.7}
MEASURES = ("qalys", "qalys_discounted", "costs", "costs_discounted", "life_years")


def three_states(kind: str, *, well: dict, sick: dict | None = None, to_sick: dict | None = None,
                 flare: dict | None = None, extra=(), attributes=(SEX,), age=None) -> str:
    """well -> sick -> dead (and well -> dead), with a flare in well: a rate model or a
    yearly cycle model; the keyword dicts add keys to a state, a transition or the event."""
    rates = {"well->sick": 0.1, "well->dead": 0.03, "sick->dead": 0.2, "flare": 0.4}
    if kind == "rate":
        time = horizon(30)
        moves = [rate("well", "sick", rates["well->sick"], **(to_sick or {})),
                 rate("well", "dead", rates["well->dead"]),
                 rate("sick", "dead", rates["sick->dead"])]
        flare_event = event("flare", ["well"], rate=rates["flare"], **(flare or {}))
    else:
        time = horizon(30, cycle=1)
        moves = [probability("well", "sick", rates["well->sick"], **(to_sick or {})),
                 probability("well", "dead", rates["well->dead"]),
                 probability("well", "well", "remainder"),
                 probability("sick", "dead", rates["sick->dead"]),
                 probability("sick", "sick", "remainder")]
        flare_event = event("flare", ["well"], probability=rates["flare"], **(flare or {}))
    return scenario_text(time, start(well=1, age=age), state("well", **well),
                         state("sick", **{"utility": 0.6, "cost": 500, **(sick or {})}),
                         state("dead", absorbing=True), *moves, flare_event,
                         outcomes(discount_costs=0.035, discount_effects=0.035), *extra,
                         population(500, *attributes))


def exact_values(model, patients) -> dict:
    mult = patient_multipliers(model, patients, 1)
    return outcome_values(model, analytic(model, mult=mult).exposure)


# ------------------------------------------------------------------------------- by level

COSTS_BY_SEX = {"female": 1200.0, "male": 700.0}
DISUTILITIES_BY_SEX = {"female": 0.02, "male": 0.05}
# where the table is read: the keys `three_states` adds for a value v there, and the values
SLOTS = {
    "state utility": (lambda v: dict(well=dict(utility=v, cost=100)), BY_SEX),
    "state cost": (lambda v: dict(well=dict(utility=0.8, cost=v)), COSTS_BY_SEX),
    "transition cost": (lambda v: dict(well=dict(utility=0.8), to_sick=dict(cost=v)),
                        COSTS_BY_SEX),
    "transition disutility": (lambda v: dict(well=dict(utility=0.8), to_sick=dict(disutility=v)),
                              DISUTILITIES_BY_SEX),
    "event cost": (lambda v: dict(well=dict(utility=0.8), flare=dict(cost=v)), COSTS_BY_SEX),
    "event disutility": (lambda v: dict(well=dict(utility=0.8), flare=dict(disutility=v)),
                         DISUTILITIES_BY_SEX),
}


@pytest.mark.parametrize("kind", ["rate", "cycle"])
@pytest.mark.parametrize("slot", SLOTS)
def test_a_value_by_sex_is_each_sexs_number_typed_in(kind, slot):
    keys, values = SLOTS[slot]
    tabled = model_of(three_states(kind, **keys("v"),
                                   extra=[table("v", attribute="sex", values=values)]))
    patients = draw_population(tabled.scenario.population, 5, np.arange(60))
    mixed = exact_values(tabled, patients)
    for sex, number in values.items():
        typed = model_of(three_states(kind, **keys(number)))
        mine = (patients.sex == sex).to_numpy()
        assert 5 < mine.sum() < 55
        own = exact_values(typed, patients[mine].reset_index(drop=True))
        for measure in MEASURES:
            np.testing.assert_allclose(mixed[measure][mine], own[measure], rtol=1e-12)


def treated_model(values, *, phased: bool) -> str:
    """A strategy adding a cost and a utility on treatment in `sick` (from its entry, when
    `phased`), the cost a number or a table."""
    when = dict(start_on=["sick"]) if phased else {}
    return three_states("cycle", well=dict(utility=0.8), extra=[
        table("extra", attribute="sex", values=COSTS_BY_SEX),
        table("gain", attribute="sex", values={"female": 0.05, "male": -0.1}),
        strategy("usual", comparator=True),
        strategy("drug", **when,
                 changes=[nested(state="sick", cost=values[0], utility=values[1])])])


@pytest.mark.parametrize("phased", [False, True], ids=["on from the start", "on entering sick"])
def test_a_treatments_cost_and_utility_by_sex_is_each_sexs_number_typed_in(phased):
    tabled = bind(parse_scenario(treated_model(("extra", "gain"), phased=phased)), strategy="drug")
    patients = draw_population(tabled.scenario.population, 2, np.arange(40))
    mixed = exact_values(tabled, patients)
    for sex, gain in (("female", 0.05), ("male", -0.1)):
        typed = bind(parse_scenario(treated_model((COSTS_BY_SEX[sex], gain), phased=phased)),
                     strategy="drug")
        mine = (patients.sex == sex).to_numpy()
        own = exact_values(typed, patients[mine].reset_index(drop=True))
        for measure in MEASURES:
            np.testing.assert_allclose(mixed[measure][mine], own[measure], rtol=1e-12)


def test_the_average_patient_is_valued_at_the_share_weighted_mean():
    # docs/scenario-format.md: 0.4 * 0.9 + 0.6 * 0.7 = 0.78 a year in well
    model = model_of(three_states("rate", well=dict(utility="u"),
                                  extra=[table("u", attribute="sex", values=BY_SEX)]))
    typed = model_of(three_states("rate", well=dict(utility=0.4 * 0.9 + 0.6 * 0.7)))
    ours, theirs = (outcome_values(m, analytic(m).exposure) for m in (model, typed))
    for measure in MEASURES:
        np.testing.assert_allclose(ours[measure], theirs[measure], rtol=1e-12)


@pytest.mark.parametrize("kind", ["rate", "cycle"])
def test_simulated_values_by_sex_agree_with_their_expectation(kind):
    model = model_of(three_states(kind, well=dict(utility="u", cost="c"), extra=[
        table("u", attribute="sex", values=BY_SEX),
        table("c", attribute="sex", values=COSTS_BY_SEX)]))
    patients = draw_population(model.scenario.population, 9, np.arange(4000))
    expected = exact_values(model, patients)
    sim = simulate(model, patients, 9, batch_size=1500, keep_exposure=True)
    simulated = sim.values
    kept = outcome_values(model, sim.exposure)  # the batches' levels kept too
    for sex in ("female", "male"):  # each sex on its own: a wrong level would show
        mine = (patients.sex == sex).to_numpy()
        for measure in ("qalys_discounted", "costs_discounted"):
            np.testing.assert_array_equal(kept[measure], simulated[measure])
            gap = simulated[measure][mine] - expected[measure][mine]
            z = gap.mean() / (gap.std(ddof=1) / math.sqrt(mine.sum()))
            assert abs(z) < Z, (sex, measure, z)


# ---------------------------------------------------------------------------- by age, time

AGE_STARTS, AGE_UTILITIES = [0, 60, 65, 80], [0.9, 0.8, 0.65, 0.5]


def band_value(starts, values, clock: float) -> float:
    """The step function by hand: the value of the last start at or below the clock."""
    return values[max(i for i, s in enumerate(starts) if s <= clock)]


def alive_dead(kind: str, value_keys: dict, *tables, age=None, death=0.1, years=30,
               discount=0.035, correction=None, attributes=()) -> str:
    """alive -> dead at a constant rate, a Weibull hazard (kind "weibull") or a yearly
    probability; `value_keys` add keys to the state ("alive") and the transition ("move")."""
    if kind == "rate":
        time, moves = horizon(years), [rate("alive", "dead", death, **value_keys.get("move", {}))]
    elif kind == "weibull":
        time = horizon(years)
        moves = [transition("alive", "dead", hazard=dict(family="weibull", shape=1.4, scale=18),
                            **value_keys.get("move", {}))]
    else:
        time = horizon(years, cycle=1)
        moves = [probability("alive", "dead", death, **value_keys.get("move", {})),
                 probability("alive", "alive", "remainder")]
    return scenario_text(time, start(alive=1, age=age),
                         state("alive", **value_keys.get("alive", {})),
                         state("dead", absorbing=True), *moves, *tables,
                         outcomes(discount_costs=discount, discount_effects=discount,
                                  correction=correction),
                         *([population(100, *attributes)] if attributes else []))


@pytest.mark.parametrize("correction", ["trapezoidal", "half-cycle", "simpson"])
def test_a_utility_by_age_is_the_discounted_trace_weighted_by_each_points_band(correction):
    # Elbasha & Chhatwal 2016 (within-cycle weights, from memory): trapezoidal 1/2, 1, ...,
    # 1, 1/2; half-cycle 1/2, 1, ..., 1, 0; Simpson 1/3, 4/3, 2/3, ..., 4/3, 1/3
    age, p, d, n = 57.5, 0.1, 0.035, 30
    model = model_of(alive_dead("cycle", {"alive": dict(utility="u")},
                                table("u", by="age", starts=AGE_STARTS, values=AGE_UTILITIES),
                                age=age, death=p, discount=d, correction=correction, years=n))
    rule = {"trapezoidal": [0.5] + [1] * (n - 1) + [0.5],
            "half-cycle": [0.5] + [1] * (n - 1) + [0],
            "simpson": [1 / 3] + [4 / 3 if k % 2 else 2 / 3 for k in range(1, n)] + [1 / 3]}
    hand = sum(w * (1 - p) ** k * band_value(AGE_STARTS, AGE_UTILITIES, age + k) / (1 + d) ** k
               for k, w in enumerate(rule[correction]))
    ours = outcome_values(model, analytic(model).exposure)["qalys_discounted"]
    assert ours == pytest.approx([hand], rel=1e-12)


def constant_rate_integral(values, starts, age, lam, end, one_off=1.0):
    """Sum over the bands of value * one_off * integral of e^{-lam t} over the band, the
    bands being [start - age, next start - age) within [0, end]."""
    total = 0.0
    for i, v in enumerate(values):
        lo = max(starts[i] - age, 0.0)
        hi = min(starts[i + 1] - age if i + 1 < len(starts) else end, end)
        if hi > lo:
            total += v * one_off * (math.exp(-lam * lo) - math.exp(-lam * hi)) / lam
    return total


@pytest.mark.parametrize("ages", [[57.5], [52.0, 61.25, 70.0]], ids=["cohort", "patients"])
def test_rate_model_values_by_age_are_the_closed_form_band_integrals(ages):
    # alive -> dead at mu: occupancy density e^{-mu t}, deaths mu e^{-mu t}, discounted
    # e^{-delta t} with delta = ln(1 + d) (closed form, from memory)
    mu, d, T = 0.08, 0.035, 30
    costs = [100.0, 2000.0, 5000.0]
    text = alive_dead("rate", {"alive": dict(utility="u"), "move": dict(cost="c")},
                      table("u", by="age", starts=AGE_STARTS, values=AGE_UTILITIES),
                      table("c", by="age", starts=[0, 65, 75], values=costs),
                      age=None if len(ages) > 1 else ages[0], death=mu, discount=d, years=T,
                      attributes=[AGES] if len(ages) > 1 else [])
    model = model_of(text)
    people = None if len(ages) == 1 else pd.DataFrame({"patient": range(len(ages)), "age": ages})
    exposure = analytic(model, patients=people).exposure
    values = outcome_values(model, exposure)
    lam = mu + math.log1p(d)
    for b, age in enumerate(ages):
        qalys = constant_rate_integral(AGE_UTILITIES, AGE_STARTS, age, lam, T)
        cost = constant_rate_integral(costs, [0, 65, 75], age, lam, T, one_off=mu)
        assert values["qalys_discounted"][b] == pytest.approx(qalys, rel=1e-10)
        assert values["costs_discounted"][b] == pytest.approx(cost, rel=1e-10)
        undiscounted = constant_rate_integral(AGE_UTILITIES, AGE_STARTS, age, mu, T)
        assert values["qalys"][b] == pytest.approx(undiscounted, rel=1e-10)


@pytest.mark.parametrize("kind", ["rate", "weibull"])
def test_values_by_age_on_a_grid_that_does_not_start_at_0_are_integrated_from_time_0(kind):
    # edge: the exact path and the forward equations start every patient at time 0 whatever
    # the grid, and read the bands there too; reference: scipy.integrate.quad of
    # S(t) u(age + t) e^{-delta t} over [0, 30], S(t) = e^{-mu t} or e^{-(t / 18)^1.4}
    from scipy.integrate import quad
    age, mu, d, T = 58.0, 0.08, 0.035, 30.0
    model = model_of(alive_dead(kind, {"alive": dict(utility="u")},
                                table("u", by="age", starts=AGE_STARTS, values=AGE_UTILITIES),
                                age=age, death=mu, discount=d, years=int(T)))
    survival = ((lambda t: math.exp(-mu * t)) if kind == "rate"
                else (lambda t: math.exp(-(t / 18.0) ** 1.4)))
    edges = [s - age for s in AGE_STARTS if 0 < s - age < T]
    hand = quad(lambda t: survival(t) * band_value(AGE_STARTS, AGE_UTILITIES, age + t)
                * math.exp(-math.log1p(d) * t), 0.0, T, points=edges, limit=200)[0]
    ours = outcome_values(model, analytic(model, times=np.array([3.0, T])).exposure)
    assert ours["qalys_discounted"] == pytest.approx([hand], rel=1e-8)


def test_a_one_off_cost_by_age_in_a_cycle_model_is_valued_at_the_end_of_its_cycle():
    # docs/scenario-format.md: one-off costs at the end of their cycle, discounted there;
    # deaths in cycle k: (1 - p)^k p, the patient then k + 1 years older than at the start
    age, p, d, n = 63.5, 0.1, 0.035, 30
    costs, starts = [100.0, 2000.0, 5000.0], [0, 65, 75]
    model = model_of(alive_dead("cycle", {"move": dict(cost="c")},
                                table("c", by="age", starts=starts, values=costs),
                                age=age, death=p, discount=d, years=n))
    hand = sum((1 - p) ** k * p * band_value(starts, costs, age + k + 1) / (1 + d) ** (k + 1)
               for k in range(n))
    ours = outcome_values(model, analytic(model).exposure)["costs_discounted"]
    assert ours == pytest.approx([hand], rel=1e-12)


def test_a_cost_by_time_is_each_years_band_of_the_integral():
    # a drug's price falls after 5 years: the closed form with age 0 at the start
    mu, T, prices = 0.05, 20, [12000.0, 3000.0]
    model = model_of(alive_dead("rate", {"alive": dict(cost="price")},
                                table("price", by="time", starts=[0, 5], values=prices),
                                death=mu, discount=0.0, years=T))
    hand = constant_rate_integral(prices, [0, 5], 0.0, mu, T)
    ours = outcome_values(model, analytic(model).exposure)["costs"]
    assert ours == pytest.approx([hand], rel=1e-10)


@pytest.mark.parametrize("kind", ["rate", "cycle", "weibull"])
def test_simulated_values_by_age_agree_with_their_expectation(kind):
    # the rate model's exact counterpart is matrix exponentials, the Weibull one's the
    # forward equations read at every patient's band edges, the cycle model's the matrices
    model = model_of(alive_dead(kind, {"alive": dict(utility="u"), "move": dict(cost="c")},
                                table("u", by="age", starts=AGE_STARTS, values=AGE_UTILITIES),
                                table("c", by="age", starts=[0, 65, 75],
                                      values=[100.0, 2000.0, 5000.0]), attributes=[AGES]))
    # a few distinct ages (each an exact computation of its own), bands crossed at
    # different times and from different bands
    ages = np.resize([51.5, 58.0, 63.25, 69.0, 74.5], 3000)
    patients = pd.DataFrame({"patient": np.arange(3000), "age": ages})
    expected = exact_values(model, patients)
    sim = simulate(model, patients, 4, batch_size=1000, keep_exposure=True)
    simulated = sim.values
    kept = outcome_values(model, sim.exposure)  # the batches' levels and bands kept too
    for measure in ("qalys_discounted", "costs_discounted", "qalys"):
        np.testing.assert_array_equal(kept[measure], simulated[measure])
        gap = simulated[measure] - expected[measure]
        z = gap.mean() / (gap.std(ddof=1) / math.sqrt(len(gap)))
        assert abs(z) < Z, (measure, z)


def test_a_run_with_values_by_level_and_age_is_validated(tmp_path):
    text = three_states("rate", well=dict(utility="u", cost="c"), sick=dict(utility="u_sick"),
                        to_sick=dict(cost="c_onset"), age=62, extra=[
                            table("u", attribute="sex", values=BY_SEX),
                            table("c", by="age", starts=[0, 65], attribute="sex",
                                  values={"female": [300.0, 900.0], "male": [200.0, 400.0]}),
                            table("u_sick", by="age", starts=[0, 70], values=[0.6, 0.45]),
                            table("c_onset", by="time", starts=[0, 10], values=[5000.0, 2500.0])])
    path = tmp_path / "values.toml"
    path.write_text(text)
    run = validate(path, patients=3000, seed=3)
    comparison = next(iter(run.validations.values()))
    assert comparison.agrees, comparison.outcomes
    assert set(MEASURES) <= set(comparison.outcomes.measure)


# ------------------------------------------------------------------------------- refusals

def refused(text_edit, path: str, phrase: str, attributes=(SEX, AGES)):
    assert_refused(three_states("rate", well=dict(utility="u"), attributes=attributes,
                                extra=[text_edit]), path, phrase)


def test_a_typo_in_a_table_name_is_refused_with_the_close_match():
    text = three_states("rate", well=dict(utility="u_by_sx"),
                        extra=[table("u_by_sex", attribute="sex", values=BY_SEX)])
    assert_refused(text, "states.well.utility",
                   "no parameter or table named 'u_by_sx' (did you mean 'u_by_sex'?)")


def test_an_unknown_or_missing_level_is_refused():
    refused(table("u", attribute="sex", values={"female": 0.9, "mael": 0.7}),
            "tables.u.values.mael", "did you mean 'male'?")
    refused(table("u", attribute="sex", values={"female": 0.9}),
            "tables.u.values", "gives no values for 'male' of 'sex'")


def test_a_table_by_level_of_a_numeric_attribute_is_refused():
    refused(table("u", attribute="age", values={"young": 0.9, "old": 0.7}),
            "tables.u.attribute", "'age' is continuous; a table by level needs a categorical")


def test_ages_that_the_table_does_not_cover_are_refused():
    refused(table("u", by="age", starts=[60, 70], values=[0.8, 0.7]), "tables.u.starts",
            "starts at age 60, but a patient can be 50 at time 0 and states.well.utility "
            "needs a value at every age; make the first start at most 50")
    refused(table("u", by="time", starts=[1, 5], values=[0.8, 0.7]), "tables.u.starts",
            "needs a value from time 0; make the first start 0")


@pytest.mark.parametrize("by, starts, phrase", [
    ("age", [60, 70], "starts at age 60, but a patient can be 50 at time 0 and "
                      "transitions.alive->dead.rate needs a value at every age; make the first "
                      "start at most 50"),
    ("time", [1, 5], "starts at 1, but transitions.alive->dead.rate needs a value from time 0"),
    ("time_in_state", [2, 5], "starts at 2, but transitions.alive->dead.rate needs a value "
                              "from 0 (entering the state); make the first start 0"),
])
def test_a_hazard_table_that_does_not_cover_every_patient_is_refused_as_a_value_table_is(
        by, starts, phrase):
    # one rule for every use of a table: the first value is never carried below its start
    by_table = table("u", by=by, starts=starts, values=[0.08, 0.07])
    text = alive_dead("rate", {}, by_table, death="u",
                      attributes=[AGES])
    with pytest.raises(ScenarioError) as caught:
        parse_scenario(text)
    assert caught.value.path == "tables.u.starts"
    assert phrase in caught.value.message


@pytest.mark.parametrize("use", ["utility", "rate"])
@pytest.mark.parametrize("first", [0, 40])
def test_an_untruncated_normal_age_below_the_first_start_is_a_warning_with_its_share(use, first):
    # ages below the first start read the first value (docs/scenario-format.md), whatever
    # the table gives; the share below is the normal's CDF (scipy.stats.norm)
    by_age = table("u", by="age", starts=[first, 70], values=[0.08, 0.07])
    keys = {"alive": dict(utility="u")} if use == "utility" else {}
    text = alive_dead("rate", keys, by_age, death="u" if use == "rate" else 0.1,
                      attributes=[attribute("age", "normal", mean=60, sd=10)])
    scenario = parse_scenario(text)
    share = stats.norm.cdf((first - 60) / 10)
    assert [w for w in scenario.warnings if w.startswith("tables.u.starts")] == [
        f"tables.u.starts: the age at time 0 is an untruncated normal, so a share of "
        f"{share:.3g} of the patients are younger than the first start ({first}); the first "
        "value is used below it (give the age attribute a lower bound to rule that out)"]
    truncated = parse_scenario(text.replace("sd = 10", f"sd = 10\n  lower = {first}"))
    assert not [w for w in truncated.warnings if w.startswith("tables.u.starts")]


def test_a_table_by_time_in_state_cannot_give_a_value():
    refused(table("u", by="time_in_state", starts=[0, 2], values=[0.8, 0.7]),
            "states.well.utility", "table 'u' is by time_in_state")


def test_a_value_table_outside_the_values_role_is_refused_at_its_level():
    refused(table("u", attribute="sex", values={"female": 0.9, "male": 1.2}),
            "tables.u.values.male", "a utility weight must be at most 1 (the table is used "
                                    "at states.well.utility)")
    treatment = three_states("rate", well=dict(utility=0.8), extra=[
        table("extra", attribute="sex", values={"female": 10.0, "male": -5.0}),
        strategy("usual", comparator=True),
        strategy("drug", changes=[nested(cost="extra")])])
    assert_refused(treatment, "tables.extra.values.male", "a treatment cost must be at least 0")


def test_a_negative_utility_in_a_table_is_allowed_where_a_number_would_be():
    # states worse than death: a utility below 0 (common practice); a rate table still not
    worse_than_death = {"female": 0.9, "male": -0.2}
    model_of(three_states("rate", well=dict(utility="u"),
                          extra=[table("u", attribute="sex", values=worse_than_death)]))
    text = three_states("rate", well=dict(utility=0.8), extra=[
        table("r", attribute="sex", values={"female": 0.1, "male": -0.2})]).replace(
        "rate = 0.03", 'rate = "r"')
    assert_refused(text, "tables.r.values.male", "a rate must be at least 0")


def test_a_table_still_cannot_give_a_hazard_ratio():
    text = three_states("rate", well=dict(utility=0.8), extra=[
        table("hr", attribute="sex", values={"female": 1.0, "male": 2.0})]).replace(
        "rate = 0.03", 'rate = 0.03\neffects = [{ attribute = "sex", level = "male", '
                       'hazard_ratio = "hr" }]')
    assert_refused(text, "transitions.well->dead.effects[0].hazard_ratio", "'hr' is a table")


def test_a_population_files_youngest_age_is_checked_when_it_is_read(tmp_path):
    (tmp_path / "people.csv").write_text("age,sex\n62,female\n48,male\n")
    text = alive_dead("rate", {"alive": dict(utility="u")},
                      table("u", by="age", starts=[50, 70], values=[0.8, 0.7]))
    text += "\n[population]\npatients = 10\nfile = \"people.csv\"\n"
    path = tmp_path / "scenario.toml"
    path.write_text(text)
    scenario = read_scenario(path)  # the file's ages are known once it is read
    with pytest.raises(ScenarioError) as caught:
        scenario_patients(scenario, 1, np.arange(5))
    assert caught.value.path == "tables.u.starts", str(caught.value)
    assert "a patient can be 48 at time 0" in caught.value.message


def test_the_command_line_refuses_a_bad_value_table_in_one_line_with_exit_2(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text(three_states("rate", well=dict(utility="u"), extra=[
        table("u", attribute="sex", values={"female": 0.9, "mael": 0.7})]))
    assert main(["run", str(path), "--patients", "10", "--out", str(tmp_path / "out")]) == 2
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: tables.u.values.mael"), lines
    assert not (tmp_path / "out").exists()


def test_a_value_by_age_is_not_available_in_a_service():
    text = alive_dead("rate", {"alive": dict(utility="u")},
                      table("u", by="age", starts=[0, 70], values=[0.8, 0.7]), age=60)
    text += '\n[arrivals]\nrate = 2.0\n'
    assert_refused(text, "states.alive.utility", "not available in a service with arrivals")


def test_a_service_values_each_patient_at_its_own_level():
    # a capacity that never binds gives the event engine's histories (test_capacity_engine);
    # valued with a utility by site, the service's totals are those of the same patients
    # valued one by one, which the tests above check against each level's number typed in
    site = '  [[population.attributes]]\n  name = "site"\n  distribution = "categorical"\n' \
        '  levels = ["north", "south"]\n  shares = [0.3, 0.7]\n'
    text = edited(RICH, ('name = "home"\nutility = 0.9', 'name = "home"\nutility = "u_home"'),
                  ("  prevalence = 0.3\n", "  prevalence = 0.3\n\n" + site)) \
        + "\n" + table("u_home", attribute="site", values={"north": 0.95, "south": 0.7})
    s = parse_scenario(text)
    cm = bind_capacity(s, None)
    run = replication(s, cm, SEED, 0, 300)
    mine = window_outcomes(run, cm, 0.0, cm.end, 0.0)
    people = patients_for(s, 300, SEED)
    assert set(people.site) == {"north", "south"}
    mult = patient_multipliers(cm.model, people, SEED)
    histories = simulate_events(cm.model, mult, people.patient.to_numpy(), SEED)
    theirs = outcome_values(cm.model, aggregate.exposure(cm.model, histories, mult))
    for measure in ("qalys", "qalys_discounted"):
        assert mine[measure] == pytest.approx(theirs[measure].sum(), rel=1e-9), measure



def test_a_batch_in_which_nobody_moves_is_valued_by_age():
    # a practitioner's trial: a batch with no record but the starts crashed the valuation
    # by age bands; with a death probability of 0 every patient stays 5 years in 'well' and
    # costs 100 a year until age 62, then 200; by hand, the trapezoidal rule on the cycle
    # points at ages 60..65 (weights 1/2, 1, 1, 1, 1, 1/2; Elbasha & Chhatwal 2016, from
    # memory), undiscounted: 100/2 + 100 + 3 * 200 + 200/2 = 850
    from microsim.patients.population import cohort_patients
    from microsim.results.comparison import EXACT, compare
    from microsim.simulation import simulate
    from support import model_of, probability, scenario_text, start, state, table
    model = model_of(scenario_text(
        horizon(5, cycle=1), start(age=60, well=1.0), state("well", cost="cost_well", utility=0.8),
        state("dead", absorbing=True), probability("well", "dead", 0.0),
        probability("well", "well", "remainder"),
        table("cost_well", by="age", starts=[0, 62], values=[100, 200])))
    sim = simulate(model, cohort_patients(4), 3, batch_size=2)
    np.testing.assert_allclose(sim.values["costs"], 100 / 2 + 100 + 3 * 200 + 200 / 2, rtol=1e-12)
    result = compare(sim)
    assert result.agrees is True and (result.outcomes.test == EXACT).all()
