"""The compiled cycle engine against the SimPy cycle engine: for the same model,
multipliers, patient ids and seed the histories must be identical, array for array and
bit for bit (the reference is `microsim.engines.cycle_engine.simulate_cycles`, whose rules are
checked against the analytic chains in test_engines.py). Each model also checks that
every one of its risks actually happens, so an equality of empty histories cannot pass."""
import dataclasses
from pathlib import Path

import numpy as np
import pytest

from microsim.binding import bind
from microsim.scenario import parse_scenario
from microsim.scenario.spec import (ChangeSpec, ConditionSpec, EligibilitySpec, StrategySpec,
                                    TransitionSpec)
from support import (assert_equal_columns, both_engines, after, attribute, effect, event, horizon,
                     nested, population, probability, start, state, scenario_text, strategy,
                     table)

COLUMNS = ("patient", "time", "source", "target", "risk")
IDS = np.arange(1500) * 3 + 7  # not 0..n-1: draws are keyed by id, not by row

HOMOGENEOUS = scenario_text(
    horizon(12, cycle=1), start(well=0.8, sick=0.2),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.1), probability("well", "dead", 0.02),
    probability("well", "well", "remainder"),
    probability("sick", "well", 0.05), probability("sick", "dead", 0.2),
    probability("sick", "sick", "remainder"),
    event("flare", ["well", "sick"], probability=0.15))

PEOPLE = population(  # bounded attributes: the separate rule's rows stay below 1
    1000,
    attribute("age", "normal", mean=60, sd=9, lower=40, upper=90),
    attribute("sex", "categorical", levels=["female", "male"], shares=[0.5, 0.5]),
    attribute("diabetes", "yesno", prevalence=0.3),
    attribute("biomarker", "normal", mean=0.7, sd=0.3, lower=0, upper=2))

COVARIATES = scenario_text(
    horizon(15, cycle=1), start(well=0.6, sick=0.4),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.12,
                effects=[effect("diabetes", 1.6), effect("biomarker", 1.8, centre=0.8),
                         effect("sex", 1.2, level="male"), effect("age", 1.01, centre=60)]),
    probability("well", "dead", 0.03, effects=[effect("age", 1.03, centre=60)]),
    probability("well", "well", "remainder"),
    probability("sick", "dead", 0.15, effects=[effect("diabetes", 1.3)]),
    probability("sick", "sick", "remainder"),
    PEOPLE)

TABLES = scenario_text(  # half-year cycles: times and times in state are not whole numbers
    horizon(15, cycle=0.5), start(healthy=1),
    state("healthy"), state("sick"), state("dead", absorbing=True),
    probability("healthy", "sick", 0.08), probability("healthy", "dead", "death_by_age"),
    probability("healthy", "healthy", "remainder"),
    probability("sick", "dead", "die_by_stay"), probability("sick", "healthy", "recover_by_stay"),
    probability("sick", "sick", "remainder"),
    event("check", ["healthy", "sick"], probability="checks_by_time"),
    table("death_by_age", by="age", starts=[0, 60, 70, 80], values=[0.004, 0.01, 0.03, 0.08]),
    table("die_by_stay", by="time_in_state", starts=[0, 1, 2.5], values=[0.2, 0.1, 0.05]),
    table("recover_by_stay", by="time_in_state", starts=[0, 1, 2.5], values=[0.0, 0.15, 0.3]),
    table("checks_by_time", by="time", starts=[0, 2, 7.5], values=[0.5, 0.2, 0.1]),
    population(1000, attribute("age", "normal", mean=62, sd=10, lower=40, upper=95)))

LEVELS = scenario_text(  # tables by level: each patient reads its own sex's or band's row
    horizon(15, cycle=0.5), start(healthy=1),
    state("healthy"), state("sick"), state("dead", absorbing=True),
    probability("healthy", "sick", "onset", effects=[effect("diabetes", 1.5)]),
    probability("healthy", "dead", "life"), probability("healthy", "healthy", "remainder"),
    probability("sick", "dead", "sick_death"), probability("sick", "healthy", 0.1),
    probability("sick", "sick", "remainder"),
    event("check", ["healthy", "sick"], probability="checks"),
    table("life", by="age", starts=[0, 60, 70, 80], attribute="sex",
          values={"female": [0.004, 0.01, 0.03, 0.08], "male": [0.006, 0.02, 0.05, 0.1]}),
    table("sick_death", by="time_in_state", starts=[0, 1, 2.5], attribute="sex",
          values={"male": [0.3, 0.1, 0.05], "female": [0.2, 0.15, 0.02]}),
    table("onset", attribute="sex", values={"female": 0.05, "male": 0.09}),
    table("checks", by="time", starts=[0, 5], attribute="region",
          values={"north": [0.3, 0.1], "south": [0.5, 0.0]}),
    population(1000, attribute("age", "normal", mean=62, sd=10, lower=40, upper=95),
               attribute("sex", "categorical", levels=["female", "male"], shares=[0.5, 0.5]),
               attribute("region", "categorical", levels=["north", "south"], shares=[0.3, 0.7]),
               attribute("diabetes", "yesno", prevalence=0.3)))

MEMORY = scenario_text(
    # cycles of 0.1: differences of cycle times are not whole numbers of cycles in floats
    # (0.6 - 0.3 < 0.3), the case the 'within' tolerance is there for
    horizon(3, cycle=0.1), start(well=1),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.04, memory=[after("flare", multipliers=[1, 1.5, 2.5])]),
    probability("well", "dead", 0.01, memory=[after("flare", within=0.3, multiplier=3)]),
    probability("well", "well", "remainder"),
    probability("sick", "dead", 0.05, memory=[after("sick", multipliers=[1, 2])]),
    probability("sick", "well", 0.1), probability("sick", "sick", "remainder"),
    event("flare", ["well", "sick"], probability=0.1,
          memory=[after("flare", within=0.2, multiplier=0.5)]))

ROWS = scenario_text(
    # 'a' has no remainder (its row sums to 1 as written); 'b' sends its remainder to
    # 'dead'; 'c' has no way out
    horizon(10, cycle=1), start(a=0.5, b=0.3, c=0.2),
    state("a"), state("b"), state("c"), state("dead", absorbing=True),
    probability("a", "b", 0.2), probability("a", "a", 0.7), probability("a", "dead", 0.1),
    probability("b", "c", 0.1), probability("b", "b", 0.6), probability("b", "dead", "remainder"))

TREATED = scenario_text(
    horizon(12, cycle=1), start(well=1),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.15, name="progress", effects=[effect("biomarker", 1.8, centre=0.8)]),
    probability("well", "dead", 0.02), probability("well", "well", "remainder"),
    probability("sick", "dead", 0.1), probability("sick", "sick", "remainder"),
    event("flare", ["well", "sick"], probability=0.2),
    PEOPLE)

TREATMENT = StrategySpec(
    name="treat", label="Treat", uptake=0.7, start=1.0, stop=8.0, discontinuation=0.1,
    eligible=EligibilitySpec(all=(ConditionSpec("biomarker", "at_least", 0.5),)),
    changes=(ChangeSpec(risk="progress", hazard_ratio=0.5), ChangeSpec(risk="flare", hazard_ratio=0.7)),
    transitions=(TransitionSpec("sick", "well", "cure", probability=0.2),), while_treated=(True,))
USUAL_CARE = StrategySpec(name="usual_care", label="Usual care", comparator=True)


RULES = ("separate", "competing")


def under(rule: str, text: str) -> str:
    """The scenario text with time.probability_rule set."""
    return text.replace("[time]\n", f'[time]\nprobability_rule = "{rule}"\n', 1)


def treated_model(rule: str = "separate"):
    scenario = dataclasses.replace(parse_scenario(under(rule, TREATED)),
                                   strategies=(USUAL_CARE, TREATMENT))
    return bind(scenario, strategy="treat")


def assert_identical(expected, got):
    assert_equal_columns(expected, got, COLUMNS)


def assert_every_risk_happens(model, histories):
    happened = set(histories.risk.tolist())
    for r, risk in enumerate(model.risks):
        if risk.source != risk.target:
            assert r in happened, risk.name


MODELS = {"homogeneous": HOMOGENEOUS, "covariates": COVARIATES, "tables": TABLES,
          "levels": LEVELS, "memory": MEMORY}


@pytest.mark.parametrize("rule", RULES)
@pytest.mark.parametrize("name", MODELS)
def test_histories_equal_the_simpy_cycle_engine(name, rule):
    model = bind(parse_scenario(under(rule, MODELS[name])))
    assert model.probability_rule == rule
    expected, got, _ = both_engines(model, IDS, 20260511)
    assert_identical(expected, got)
    assert_every_risk_happens(model, got)


def test_rows_without_remainder_equal_the_simpy_cycle_engine():
    # the separate rule only: the competing rule needs a remainder in every row of moves
    model = bind(parse_scenario(ROWS))
    expected, got, _ = both_engines(model, IDS, 20260511)
    assert_identical(expected, got)
    assert_every_risk_happens(model, got)


@pytest.mark.parametrize("rule", RULES)
def test_treatment_window_histories_equal_the_simpy_cycle_engine(rule):
    model = treated_model(rule)
    expected, got, mult = both_engines(model, IDS, 99)
    window = mult.window
    treated = np.isfinite(window.on)
    # the window matters: some treated, some not, some stop early (discontinuation)
    assert 0 < treated.sum() < len(IDS)
    assert np.any(treated & (window.off < 8.0))
    assert_identical(expected, got)
    assert_every_risk_happens(model, got)


def test_staying_put_is_not_recorded():
    # an explicit a->a, b->b and a state with no way out ('c'): none of them leaves a record
    model = bind(parse_scenario(ROWS))
    _, got, _ = both_engines(model, IDS, 5)
    moves = got.source >= 0
    assert not np.any(got.source[moves] == got.target[moves])
    assert not np.any(got.source == model.states.index("c"))


def test_a_patient_history_does_not_depend_on_the_batch():
    # design rule: draws are a function of (seed, patient id, purpose, occurrence)
    model = bind(parse_scenario(MEMORY))
    _, whole, _ = both_engines(model, IDS, 8)
    part_ids = IDS[::7]
    _, part, _ = both_engines(model, part_ids, 8)
    rows = np.arange(len(IDS))[::7]
    keep = np.isin(whole.patient, rows)
    assert np.array_equal(np.searchsorted(rows, whole.patient[keep]), part.patient)
    for name in COLUMNS[1:]:
        assert np.array_equal(getattr(whole, name)[keep], getattr(part, name))


def test_demo_scenario_histories_equal_the_simpy_cycle_engine():
    scenario = parse_scenario(Path(__file__).parents[1].joinpath(
        "scenarios", "lakemoor_kidney.toml").read_text())
    model = bind(scenario, strategy="protein_lowering")
    expected, got, _ = both_engines(model, np.arange(600), 20261201)
    assert_identical(expected, got)


# The edges: certain and impossible moves (deterministic histories), an event nearly every
# cycle over a long horizon, so a batch's records outgrow the engine's first buffers and it
# must resume where it stopped, and a countdown (a delay to treatment) in between.
EDGES = scenario_text(
    horizon(400, cycle=1), start(well=0.5, sick=0.5),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.0), probability("well", "dead", 0.001),
    probability("well", "well", "remainder"),
    probability("sick", "dead", 1.0),
    event("check", ["well"], probability=0.97))


def test_edges_equal_the_simpy_cycle_engine():
    model = bind(parse_scenario(EDGES))
    ids = np.arange(60) * 11
    expected, got, _ = both_engines(model, ids, 3)
    assert_identical(expected, got)
    starts_sick = expected.target[expected.source < 0] == model.states.index("sick")
    assert starts_sick.any() and (~starts_sick).any()
    # everyone starting sick dies at the end of the first cycle; nobody falls sick
    died = expected.target[(expected.time == 1.0) & (expected.risk >= 0)]
    assert np.sum(died == model.states.index("dead")) >= starts_sick.sum()
    assert not np.any(expected.target[expected.source == 0] == model.states.index("sick"))
    assert len(got.time) > 4 * len(ids) + 1 + 400 * 3  # more than the first buffers hold


# Treatment started or stopped by an event: the phase moves on at the cycle's end (a record
# from the end state to its copy in the next phase, or the move's record straight to it)
TRIGGERED = [
    horizon(12, cycle=1), start(well=0.8, sick=0.2),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.15, name="progress",
                effects=[effect("biomarker", 1.8, centre=0.8)]),
    probability("well", "dead", 0.02), probability("well", "well", "remainder"),
    probability("sick", "dead", 0.1, name="die_sick"), probability("sick", "sick", "remainder"),
    event("flare", ["well", "sick"], probability=0.2,
          memory=[after("flare", multipliers=[1, 0.6])]),
    event("scan", ["sick"], probability=0.3),
    PEOPLE, strategy("usual_care", comparator=True)]

TRIGGERS = {
    "start": dict(start_on="flare", uptake=0.7),
    "delay": dict(start_on="flare", start_delay=2.0),
    "sequence": dict(start_on="flare", stop_on="scan", then=[nested(
        name="second", stop_on="flare",
        changes=[nested(transition="die_sick", hazard_ratio=0.7)])]),
}


@pytest.mark.parametrize("rule", RULES)
@pytest.mark.parametrize("name", TRIGGERS)
def test_event_triggered_treatment_histories_equal_the_simpy_cycle_engine(name, rule):
    text = scenario_text(*TRIGGERED, strategy("treat", changes=[
        nested(transition="progress", hazard_ratio=0.5)], **TRIGGERS[name]))
    model = bind(parse_scenario(under(rule, text)), strategy="treat")
    assert model.phase_on is not None and model.probability_rule == rule
    expected, got, _ = both_engines(model, IDS, 77)
    assert_identical(expected, got)
    assert_every_risk_happens(model, got)
    # the flare moved the phase on where the patient stayed (a record to the next copy from
    # a state that is no countdown's) and where it moved (the move's record goes to the
    # next phase's copy of its own target)
    counting_down = (np.arange(model.n_states) if model.stay_to is None else model.stay_to) \
        != np.arange(model.n_states)
    staying = (got.risk < 0) & (got.source >= 0)
    assert np.any(staying & ~counting_down[np.maximum(got.source, 0)])
    own = np.array([-1 if risk.target is None else risk.target for risk in model.risks])
    moves = (got.risk >= 0) & (got.source != got.target)
    assert np.any(moves & (got.target != own[got.risk]))
