"""The vectorised event engine against the SimPy event engine, patient by patient.

The reference is `microsim.engines.event_engine.simulate_events` (itself checked against
matrix exponentials, scipy.stats distributions and the analytic cohort in test_engines.py).
For the same model, multipliers, patient ids and seed both engines must give the same
records (patient, from state, to state, risk) and the same times within the tolerance the
engine's docstring states: relative 1e-12 where every latent time has a closed form, 1e-9
where a Weibull or log-logistic hazard under an attained-age effect needs a numerical root
(the SimPy engine's quadrature and Brent's method are good to about 1e-12). Constant rates
are the same arithmetic in both, so there the times are equal bit for bit. Each model also
checks that every one of its risks happens, so an equality of empty histories cannot pass.
"""
from pathlib import Path

import numpy as np
import pytest

from microsim.binding import bind
from microsim.engines import vectorised_events
from microsim.engines.event_engine import DEPTH
from microsim.engines.vectorised_events import simulate_events_vectorised
from microsim.patients.population import cohort_patients, draw_population
from microsim.patients.treatment import patient_multipliers
from microsim.results.comparison import compare
from microsim.scenario import parse_scenario, read_scenario
from microsim.simulation import simulate
from support import (assert_equal_columns, both_engines, records_by_patient, after, attribute, effect, event, horizon, move, nested,
                     population, rate, scenario_text, start, state, strategy, table,
                     transition)

COLUMNS = ("patient", "source", "target", "risk")
CLOSED, NUMERICAL = 1e-12, 1e-9  # relative tolerance on times (see the module docstring)
IDS = np.arange(2500) * 3 + 11  # not 0..n-1: draws are keyed by id, not by row

PEOPLE = population(
    1000,
    attribute("age", "normal", mean=60, sd=9, lower=35, upper=90),
    attribute("sex", "categorical", levels=["female", "male"], shares=[0.5, 0.5]),
    attribute("diabetes", "yesno", prevalence=0.3),
    attribute("biomarker", "lognormal", meanlog=-0.5, sdlog=0.5))


def weibull(shape, scale):
    return dict(family="weibull", shape=shape, scale=scale)


def gompertz(rate_value, shape):
    return dict(family="gompertz", rate=rate_value, shape=shape)


def loglogistic(shape, scale):
    return dict(family="loglogistic", shape=shape, scale=scale)


CONSTANT = scenario_text(  # all-constant states: the event engine's precomputed rounds
    horizon(15), start(well=0.6, sick=0.3, dead=0.1),
    state("well"), state("sick"), state("dead", absorbing=True),
    rate("well", "sick", 0.15), rate("well", "dead", 0.03),
    rate("sick", "well", 0.2), rate("sick", "dead", 0.25),
    event("flare", ["well", "sick"], rate=0.8))

FAMILIES = scenario_text(  # every family, on every clock
    horizon(30), start(a=1, age=50),
    state("a"), state("b"), state("c"), state("dead", absorbing=True),
    transition("a", "b", hazard=weibull(1.4, 5)),
    transition("a", "c", hazard=loglogistic(2.5, 6), clock="since_start"),
    transition("b", "a", hazard=gompertz(0.05, 0.1)),
    transition("b", "dead", rate="by_stay"),
    transition("c", "dead", hazard=weibull(0.7, 40), clock="age"),
    transition("c", "a", hazard=loglogistic(0.8, 3)),
    event("check", ["a", "c"], hazard=gompertz(0.3, -0.05), clock="age"),
    event("scan", ["b"], rate="by_age"),
    table("by_stay", by="time_in_state", starts=[0, 1, 3], values=[0.05, 0.2, 0.4]),
    table("by_age", by="age", starts=[0, 55, 65], values=[0.2, 0.5, 1.0]))

COVARIATES = scenario_text(  # fixed covariates on every family; attained age on closed forms
    horizon(25), start(well=0.8, sick=0.2),
    state("well"), state("sick"), state("dead", absorbing=True),
    transition("well", "sick", hazard=weibull(1.3, 6),
               effects=[effect("diabetes", 1.6), effect("sex", 1.3, level="male"),
                        effect("biomarker", 1.5, centre=0.7)]),
    transition("well", "dead", hazard=gompertz(0.002, 0.05), clock="since_start",
               effects=[effect("age", 1.06, centre=60)]),
    transition("sick", "well", hazard=loglogistic(1.8, 3), effects=[effect("diabetes", 0.7)]),
    rate("sick", "dead", 0.08, effects=[effect("age", 1.04, centre=60), effect("diabetes", 1.4)]),
    event("visit", ["well", "sick"], rate="by_stay", effects=[effect("age", 0.98, centre=60)]),
    table("by_stay", by="time_in_state", starts=[0, 2, 5], values=[0.5, 1.0, 0.3]),
    PEOPLE)

LEVELS = scenario_text(  # tables by level: each patient reads its own sex's row
    horizon(25), start(well=0.8, sick=0.2),
    state("well"), state("sick"), state("dead", absorbing=True),
    rate("well", "sick", "onset", effects=[effect("diabetes", 1.6)]),
    rate("well", "dead", "life", effects=[effect("age", 1.02, centre=60)]),  # a growing table
    rate("sick", "dead", "life"),
    rate("sick", "well", "recovery"),
    event("visit", ["well", "sick"], rate="visits"),
    table("life", by="age", starts=[0, 60, 70, 80], attribute="sex",
          values={"female": [0.005, 0.02, 0.05, 0.15], "male": [0.01, 0.03, 0.08, 0.2]}),
    table("onset", attribute="sex", values={"female": 0.1, "male": 0.25}),
    table("recovery", by="time_in_state", starts=[0, 1, 3], attribute="sex",
          values={"female": [0.5, 0.2, 0.0], "male": [0.3, 0.3, 0.1]}),
    table("visits", by="time", starts=[0, 5], attribute="sex",
          values={"female": [1.0, 0.5], "male": [0.4, 0.8]}),
    PEOPLE)

ATTAINED_AGE = scenario_text(  # attained age on Weibull and log-logistic: numerical roots
    horizon(15), start(well=1),
    state("well"), state("sick"), state("dead", absorbing=True),
    transition("well", "sick", hazard=weibull(1.4, 6), effects=[effect("age", 1.05, centre=60)]),
    transition("sick", "well", hazard=loglogistic(2.0, 2),
               effects=[effect("age", 0.96, centre=60)]),  # falling with age
    rate("sick", "dead", 0.1, effects=[effect("age", 1.05, centre=60)]),
    PEOPLE)

def time_ratio(attribute_name, ratio, **fields):
    return effect(attribute_name, None, time_ratio=ratio, **fields)


TIME_RATIOS = scenario_text(  # the log-normal, the generalised gamma and time ratios
    horizon(25), start(well=0.8, sick=0.2),
    state("well"), state("sick"), state("dead", absorbing=True),
    transition("well", "sick", hazard=dict(family="lognormal", meanlog=1.5, sdlog=0.8),
               effects=[time_ratio("diabetes", 0.6), time_ratio("biomarker", 1.4, centre=0.7),
                        effect("sex", 1.3, level="male")]),
    transition("well", "dead", hazard=dict(family="generalised_gamma", mu=3.0, sigma=0.5,
                                           q=-0.4), clock="since_start",
               effects=[time_ratio("sex", 0.8, level="male")]),
    transition("sick", "well", hazard=dict(family="generalised_gamma", mu=1.0, sigma=0.6,
                                           q=0.3), effects=[time_ratio("diabetes", 1.5)]),
    transition("sick", "dead", hazard=weibull(1.2, 6), effects=[time_ratio("diabetes", 0.7)]),
    event("visit", ["well", "sick"], rate=0.5, effects=[time_ratio("diabetes", 2.0)]),
    PEOPLE)

TIME_RATIOS_AND_AGE = scenario_text(  # time ratios under attained age: numerical roots
    horizon(15), start(well=1),
    state("well"), state("sick"), state("dead", absorbing=True),
    transition("well", "sick", hazard=weibull(1.3, 5),
               effects=[time_ratio("diabetes", 0.6), effect("age", 1.05, centre=60)]),
    transition("sick", "well", hazard=loglogistic(2.0, 3),
               effects=[time_ratio("diabetes", 1.6), effect("age", 0.97, centre=60)]),
    transition("sick", "dead", hazard=gompertz(0.05, 0.1),
               effects=[time_ratio("sex", 1.3, level="male"), effect("age", 1.04, centre=60)]),
    PEOPLE)

MEMORY = scenario_text(  # counts, 'within' windows (change points), events in place
    horizon(20), start(well=1),
    state("well"), state("sick"), state("dead", absorbing=True),
    transition("well", "sick", hazard=weibull(1.4, 5),
               memory=[after("flare", multipliers=[1, 1.5, 2.5])]),
    rate("well", "dead", 0.02, memory=[after("flare", within=0.5, multiplier=3)]),
    rate("sick", "dead", 0.1, memory=[after("sick", multipliers=[1, 2])]),
    transition("sick", "well", hazard=weibull(0.8, 2),
               memory=[after("well", within=1.0, multiplier=0.5)]),
    event("flare", ["well", "sick"], rate=1.0, memory=[after("flare", within=0.3, multiplier=0.5)]))

TREATMENT = scenario_text(  # a strategy's windows: change points at on and off
    horizon(15), start(well=0.7, sick=0.3),
    state("well"), state("sick"), state("dead", absorbing=True),
    transition("well", "sick", hazard=weibull(1.2, 6), name="progress",
               effects=[effect("biomarker", 1.8, centre=0.7)]),
    rate("well", "dead", 0.02), rate("sick", "dead", 0.12),
    event("flare", ["well", "sick"], rate=0.6),
    strategy("usual", comparator=True),
    strategy("treat", uptake=0.7, start=1.5, stop=9, discontinuation=0.1,
             eligible=nested(all=[dict(attribute="biomarker", at_least=0.4)]),
             changes=[nested(transition="progress", hazard_ratio=0.5),
                      nested(transition="flare", hazard_ratio=0.7)],
             # only on treatment, likelier in the year after falling sick: its window's
             # change points count only while the risk exists
             transitions=[move("sick", "well", name="cure", rate=0.4,
                               memory=[after("sick", within=1, multiplier=2)])]),
    PEOPLE)

LONG = scenario_text(  # hundreds of rounds in one state: every window of draws
    horizon(40), start(calm=1),
    state("calm"), state("gone", absorbing=True),
    transition("calm", "gone", hazard=weibull(3.0, 60)),
    event("tick", ["calm"], rate=6.0, memory=[after("tick", within=0.05, multiplier=2)]))

STUCK = scenario_text(  # a state with no way out and no event keeps its patients
    horizon(10), start(a=0.5, b=0.5),
    state("a"), state("b"), state("dead", absorbing=True),
    transition("a", "dead", hazard=weibull(1.5, 8)))

EVERYTHING = scenario_text(
    horizon(20), start(well=0.7, sick=0.2, ill=0.1),
    state("well"), state("sick"), state("ill"), state("dead", absorbing=True),
    transition("well", "sick", hazard=weibull(1.3, 6), name="progress",
               effects=[effect("diabetes", 1.5), effect("age", 1.03, centre=60)],
               memory=[after("flare", multipliers=[1, 1.4, 2])]),
    transition("well", "dead", hazard=gompertz(0.002, 0.06), clock="since_start",
               effects=[effect("age", 1.05, centre=60)]),
    transition("sick", "ill", hazard=loglogistic(2.2, 4),
               memory=[after("flare", within=0.5, multiplier=2)]),
    transition("sick", "well", rate="by_stay", effects=[effect("sex", 0.8, level="male")]),
    transition("ill", "dead", hazard=weibull(0.9, 6), clock="age",
               effects=[effect("biomarker", 1.3, centre=0.7)]),
    rate("ill", "sick", 0.3, memory=[after("ill", multipliers=[1, 0.5])]),
    event("flare", ["well", "sick", "ill"], rate=0.7,
          memory=[after("flare", within=0.3, multiplier=0.5)]),
    table("by_stay", by="time_in_state", starts=[0, 1, 4], values=[0.1, 0.4, 0.2]),
    strategy("usual", comparator=True),
    strategy("treat", uptake=0.8, start=1, stop=12, discontinuation=0.05,
             changes=[nested(transition="progress", hazard_ratio=0.6)],
             transitions=[move("ill", "well", name="rescue", rate=0.2,
                               memory=[after("ill", within=1, multiplier=2)])]),
    PEOPLE)


DELAYED = scenario_text(  # a wait for treatment: each patient's deadline is a change point
    horizon(15), start(well=0.8, sick=0.2),
    state("well"), state("sick"), state("stuck"), state("dead", absorbing=True),
    rate("well", "sick", 0.3, name="progress", effects=[effect("biomarker", 1.8, centre=0.7)]),
    rate("well", "stuck", 0.05), rate("well", "dead", 0.02),
    transition("sick", "dead", hazard=weibull(1.3, 6), name="die",  # its clock runs on
               memory=[after("sick", multipliers=[1, 1.5])]),
    rate("sick", "well", 0.4, memory=[after("well", within=0.5, multiplier=2)]),
    event("flare", ["well", "sick"], rate=0.6),
    strategy("usual", comparator=True),
    strategy("treat", start_on="sick", start_delay=0.75, uptake=0.8, stop=12,
             changes=[nested(transition="die", hazard_ratio=0.5),
                      nested(transition="flare", hazard_ratio=0.7)]),
    PEOPLE)


def bound(text, strategy_name=None):
    return bind(parse_scenario(text), strategy=strategy_name)


def assert_same_histories(expected, got, rtol):
    assert_equal_columns(expected, got, COLUMNS)
    assert got.time.dtype == expected.time.dtype
    if rtol == 0:
        assert np.array_equal(got.time, expected.time)
    else:
        np.testing.assert_allclose(got.time, expected.time, rtol=rtol, atol=0)


def assert_every_risk_happens(model, histories):
    happened = set(histories.risk.tolist())
    for r, risk in enumerate(model.risks):
        assert r in happened, risk.name


@pytest.mark.parametrize("text, rtol, seed", [
    (CONSTANT, 0, 1), (FAMILIES, CLOSED, 2), (COVARIATES, CLOSED, 3), (MEMORY, CLOSED, 4),
    (LEVELS, CLOSED, 5),
    (TIME_RATIOS, CLOSED, 16),
], ids=["constant", "families-and-clocks", "covariates", "memory", "tables-by-level",
        "time-ratios"])
def test_histories_equal_the_simpy_event_engine(text, rtol, seed):
    model = bound(text)
    # the SimPy engine spends tens of microseconds a draw on the scalar path of the
    # log-normal and the generalised gamma (scipy.special on one value)
    expected, got, _ = both_engines(model, IDS[:600] if text is TIME_RATIOS else IDS, seed)
    assert_same_histories(expected, got, rtol)
    assert_every_risk_happens(model, got)


def test_attained_age_on_weibull_and_log_logistic_within_the_numerical_tolerance():
    model = bound(ATTAINED_AGE)
    ids = IDS[:250]  # the SimPy engine spends about a millisecond per numerical root
    expected, got, mult = both_engines(model, ids, 5)
    assert np.all(mult.age_slope[:2] != 0.0)  # both roots are numerical
    assert_same_histories(expected, got, NUMERICAL)
    assert_every_risk_happens(model, got)


def test_time_ratios_under_attained_age_within_the_numerical_tolerance():
    model = bound(TIME_RATIOS_AND_AGE)
    expected, got, mult = both_engines(model, IDS[:150], 17)
    assert mult.log_time_scale is not None and np.all(mult.age_slope != 0.0)
    assert_same_histories(expected, got, NUMERICAL)
    assert_every_risk_happens(model, got)


def test_treatment_windows_equal_the_simpy_event_engine():
    model = bound(TREATMENT, "treat")
    expected, got, mult = both_engines(model, IDS, 6)
    window = mult.window
    treated = np.isfinite(window.on)
    # the window matters: some treated, some not, some stop early, some risks only on it
    assert 0 < treated.sum() < len(IDS)
    assert np.any(treated & (window.off < 9.0))
    assert model.treatment.off_factor[model.risk_names.index("cure")] == 0.0
    assert_same_histories(expected, got, CLOSED)
    assert_every_risk_happens(model, got)
    cure = model.risk_names.index("cure")
    times = got.time[got.risk == cure]
    on, off = window.on[got.patient[got.risk == cure]], window.off[got.patient[got.risk == cure]]
    assert np.all((on <= times) & (times < off))  # the added transition only on treatment


def test_a_delay_to_treatment_equals_the_simpy_event_engine():
    model = bound(DELAYED, "treat")
    expected, got, _ = both_engines(model, IDS, 12)
    assert_same_histories(expected, got, CLOSED)
    assert_every_risk_happens(model, got)
    passes = (got.risk < 0) & (got.source >= 0)  # the wait's end: a phase change
    assert passes.sum() > 100
    assert np.all(model.waiting[got.source[passes]])
    stuck = model.states.index("stuck+treat-wait")  # no way out, but the wait ends
    assert np.any(got.source[passes] == stuck)


def test_long_stays_use_every_window_of_draws():
    model = bound(LONG)
    expected, got, _ = both_engines(model, IDS[:400], 7)
    assert_same_histories(expected, got, CLOSED)
    assert_every_risk_happens(model, got)
    # every record is a round of its own (a tick's 'within' window adds another): past
    # 4 * DEPTH rounds in a state the SimPy engine's draws come from `uniforms`, before that
    # from `block`, and the vectorised engine draws each block of four as rounds reach it
    assert np.bincount(got.patient).max() > 4 * DEPTH


def test_a_state_with_no_way_out_keeps_its_patients_to_the_horizon():
    model = bound(STUCK)
    expected, got, _ = both_engines(model, IDS, 8)
    assert_same_histories(expected, got, CLOSED)
    stuck = model.states.index("b")
    starts = got.source < 0
    assert np.any(got.target[starts] == stuck)
    assert not np.any(got.source == stuck)


@pytest.mark.parametrize("text", [
    scenario_text(horizon(10), start(a=1), state("a"), state("b"), state("dead", absorbing=True),
                  rate("a", "b", 0.0), transition("a", "dead", hazard=weibull(1.5, 5)),
                  rate("b", "dead", 0.1)),
    scenario_text(horizon("lifetime"), start(a=1, age=70), state("a"),
                  state("dead", absorbing=True),
                  transition("a", "dead", hazard=gompertz(0.01, 0.09), clock="age"),
                  event("visit", ["a"], hazard=weibull(0.5, 1))),
    scenario_text(horizon(1), start(a=1), state("a"), state("b"), state("dead", absorbing=True),
                  rate("a", "b", 60.0), rate("b", "a", 90.0), rate("a", "dead", 0.5)),
], ids=["a-rate-of-zero", "lifetime", "fast-rates"])
def test_edges(text):
    model = bound(text)
    expected, got, _ = both_engines(model, IDS[:500], 15)
    assert_same_histories(expected, got, CLOSED)
    if model.risks[0].params.get("rate") == 0.0:
        assert 0 not in got.risk and 1 in got.risk  # a rate of 0 never happens
    assert_same_histories(*both_engines(model, IDS[:0], 15)[:2], CLOSED)  # no patients


def test_everything_at_once():
    model = bound(EVERYTHING, "treat")  # attained age on a Weibull: numerical roots
    expected, got, _ = both_engines(model, IDS[:300], 9)
    assert_same_histories(expected, got, NUMERICAL)
    assert_every_risk_happens(model, got)


def test_demo_scenario_equals_the_simpy_event_engine():
    model = bind(read_scenario(Path(__file__).parents[1] / "scenarios" / "ward_recovery.toml"))
    expected, got, _ = both_engines(model, IDS, 10)
    assert_same_histories(expected, got, CLOSED)


def test_near_ties_decided_by_the_event_engine_code_give_its_very_histories(monkeypatch):
    # with TIE infinite every round is a near-tie, so every outcome and every time comes
    # from event_engine.latent_time, numerical roots included: the histories are then
    # the event engine's to the last bit
    monkeypatch.setattr(vectorised_events, "TIE", np.inf)
    for text, name, ids in ((EVERYTHING, "treat", IDS[:150]), (ATTAINED_AGE, None, IDS[:40])):
        model = bound(text, name)
        expected, got, _ = both_engines(model, ids, 11)
        assert_same_histories(expected, got, 0)


@pytest.mark.parametrize("text, name", [(EVERYTHING, "treat"), (ATTAINED_AGE, None)],
                         ids=["everything", "attained-age"])
def test_a_patient_history_does_not_depend_on_the_batch(text, name):
    # design rule: draws are a function of (seed, patient id, purpose, occurrence), and
    # every array operation acts element by element: the same bits in any batch
    model = bound(text, name)
    ids = IDS[:400]
    spec = model.scenario.population

    def run(some):
        patients = draw_population(spec, 12, some)
        mult = patient_multipliers(model, patients, 12)
        return records_by_patient(simulate_events_vectorised(model, mult, some, 12), some)

    whole = run(ids)
    for some in (ids[::7], ids[3:4], np.random.default_rng(3).permutation(ids)):
        for pid, records in run(some).items():
            assert np.array_equal(records, whole[pid])


def test_simulation_rows_do_not_depend_on_the_batch_size():
    model = bound(MEMORY)
    people = cohort_patients(700)
    one = simulate(model, people, 13, batch_size=700, keep_exposure=True)
    many = simulate(model, people, 13, batch_size=33, keep_exposure=True)
    assert np.array_equal(one.states, many.states)
    for measure, values in one.values.items():
        assert np.array_equal(values, many.values[measure]), measure
    assert np.array_equal(one.exposure.occupancy, many.exposure.occupancy)
    assert np.array_equal(one.exposure.occurrences, many.exposure.occurrences)


@pytest.mark.parametrize("text, name, size", [
    (CONSTANT, None, 4000),
    (scenario_text(horizon(15), start(well=1), state("well"), state("sick"),
                   state("dead", absorbing=True),
                   rate("well", "sick", 0.12, effects=[effect("diabetes", 1.8),
                                                       effect("age", 1.04, centre=60)]),
                   rate("well", "dead", 0.02, effects=[effect("age", 1.08, centre=60)]),
                   rate("sick", "dead", 0.15, memory=[after("sick", multipliers=[1, 1.5])]),
                   rate("sick", "well", 0.3), PEOPLE), None, 3000),
    (scenario_text(horizon(15), start(well=0.7, sick=0.3), state("well"), state("sick"),
                   state("dead", absorbing=True),
                   rate("well", "sick", 0.15, name="progress"), rate("well", "dead", 0.02),
                   rate("sick", "dead", 0.12), event("flare", ["well", "sick"], rate=0.6),
                   strategy("usual", comparator=True),
                   # no discontinuation: two distinct windows (treated or not), so the
                   # per-patient counterpart needs two traces, not one per patient
                   strategy("treat", uptake=0.7, start=1.5, stop=9,
                            changes=[nested(transition="progress", hazard_ratio=0.5)],
                            transitions=[move("sick", "well", name="cure", rate=0.4)])),
     "treat", 3000),
], ids=["homogeneous", "covariates-age-and-counts", "treatment-windows"])
def test_the_analytic_counterpart_still_agrees(text, name, size):
    # reference: the exact cohort (matrix exponentials or forward equations of the
    # expanded chain), compared state by state and time by time within |z| < 4
    model = bound(text, name)
    spec = model.scenario.population
    patients = cohort_patients(size) if spec is None else draw_population(spec, 14, np.arange(size))
    sim = simulate(model, patients, 14)
    result = compare(sim)
    assert result.exact, result.verdict
    assert result.agrees, result.verdict
