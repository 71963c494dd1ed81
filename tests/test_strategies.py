"""Strategies on the same patients: who is eligible, who takes the treatment up, how long
they stay on it, and what the treatment does while they are on it.

References outside the project: pandas boolean masks written by hand (eligibility); the
binomial standard error sqrt(n p (1 - p)) and |z| < 4 (uptake, shares; common practice);
scipy.stats.expon and scipy.stats.truncexpon with a Kolmogorov-Smirnov test at level 0.001
(discontinuation; reference library); traces built by hand with scipy.linalg.expm of the
rate matrix on each piece (rate models; reference library) and with numpy products of
per-cycle matrices with p' = 1 - (1 - p)^HR (cycle models; Fleurence & Hollenbeak 2007,
"Rates and probabilities in economic modelling", from memory); the closed form of a
continuously discounted cost stream under constant mortality (common practice).
Strategies are built as specs (StrategySpec) on parsed base models, and read from TOML in
the two end-to-end eligibility checks.
"""
from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.linalg import expm

from microsim.cohort.summaries import cohort_trace
from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.results.comparison import compare
from microsim.results.outcomes import outcome_values
from microsim.patients.population import draw_population
from microsim.scenario import ScenarioError, parse_scenario, read_scenario
from microsim.scenario.spec import (ChangeSpec, ConditionSpec, EligibilitySpec, HazardSpec,
                                    StrategySpec, TransitionSpec)
from microsim.patients.population import cohort_patients
from microsim.simulation import simulate
from microsim.patients.treatment import eligible, treatment_window
from support import (Z, assert_follows, assert_mean_agrees, attribute, horizon, nested, outcomes,
                     population, probability, rate, scenario_text, start, state, state_shares,
                     strategy, transition)

SEED = 20261201

TITLE = "strategy test"

COMPARATOR = StrategySpec("usual", "usual care", comparator=True)


def with_strategies(text: str, *strategies: StrategySpec):
    return replace(parse_scenario(text), strategies=(COMPARATOR, *strategies))


# ------------------------------------------------------------------------- eligibility

def hand_patients() -> pd.DataFrame:
    """Patients with every kind of attribute; ages on whole years so boundaries are hit."""
    rng = np.random.default_rng(11)
    n = 400
    return pd.DataFrame({
        "patient": np.arange(n, dtype=np.int64),
        "age": rng.integers(40, 90, n).astype(float),
        "sex": pd.Categorical(rng.choice(["female", "male"], n), categories=["female", "male"]),
        "diabetes": rng.random(n) < 0.3,
        "band": pd.Categorical(rng.choice(["low", "mid", "high"], n),
                               categories=["low", "mid", "high"], ordered=True),
    })


P = hand_patients()

CONDITION_CASES = [
    (ConditionSpec("age", "above", 60.0), P.age > 60),
    (ConditionSpec("age", "at_least", 60.0), P.age >= 60),
    (ConditionSpec("age", "below", 60.0), P.age < 60),
    (ConditionSpec("age", "at_most", 60.0), P.age <= 60),
    (ConditionSpec("age", "equals", 60.0), P.age == 60),
    (ConditionSpec("sex", "equals", "male"), P.sex == "male"),
    (ConditionSpec("diabetes", "equals", True), P.diabetes),
    (ConditionSpec("diabetes", "equals", False), ~P.diabetes),
    (ConditionSpec("band", "one_of", ("low", "high")), P.band.isin(["low", "high"])),
]


@pytest.mark.parametrize("condition, mask", CONDITION_CASES,
                         ids=[f"{c.attribute}-{c.test}-{c.value}" for c, _ in CONDITION_CASES])
def test_each_condition_matches_a_pandas_mask(condition, mask):
    assert 0 < mask.sum() < len(P)  # the boundary and both sides occur
    # reference: the pandas comparison written by hand
    np.testing.assert_array_equal(eligible(EligibilitySpec(all=(condition,)), P),
                                  mask.to_numpy())


def test_all_and_any_combine_as_and_of_all_with_or_of_any():
    spec = EligibilitySpec(
        all=(ConditionSpec("age", "at_least", 50.0), ConditionSpec("age", "below", 80.0)),
        any=(ConditionSpec("diabetes", "equals", True), ConditionSpec("sex", "equals", "male"),
             ConditionSpec("band", "one_of", ("high",))))
    # reference: pandas masks written by hand
    mask = (P.age >= 50) & (P.age < 80) & (P.diabetes | (P.sex == "male") | (P.band == "high"))
    np.testing.assert_array_equal(eligible(spec, P), mask.to_numpy())
    only_any = EligibilitySpec(any=spec.any)
    np.testing.assert_array_equal(eligible(only_any, P),
                                  (P.diabetes | (P.sex == "male") | (P.band == "high")).to_numpy())
    assert eligible(None, P).all()  # no eligibility section: everyone


def test_equals_a_number_on_a_whole_number_column():
    """A population-file column of whole numbers (stage 1, 2, 3) against `equals = 2`.

    Regression: numbers were compared as text ('2' != '2.0'), so nobody was eligible."""
    patients = pd.DataFrame({"patient": np.arange(6, dtype=np.int64),
                             "stage": np.array([1, 2, 3, 2, 1, 2], dtype=np.int64)})
    # the reader stores `equals = 2` as the float 2.0 (Node.number)
    spec = EligibilitySpec(all=(ConditionSpec("stage", "equals", 2.0),))
    np.testing.assert_array_equal(eligible(spec, patients), (patients.stage == 2).to_numpy())


def test_the_demo_targets_the_patients_its_file_names():
    """End to end from the scenario file: eligibility read from TOML, bound, applied to the
    generated population (the demo's targeted therapy: biomarker at least 1.0 and age
    below 80), against the pandas mask written by hand."""
    demo = read_scenario(Path(__file__).resolve().parent.parent / "scenarios" / "lakemoor_kidney.toml")
    people = draw_population(demo.population, SEED, np.arange(3000))
    model = bind(demo, strategy="protein_lowering")
    treated = np.isfinite(treatment_window(model, people, SEED).on)
    mask = ((people.biomarker >= 1.0) & (people.age < 80)).to_numpy()
    assert 100 < mask.sum() < 2900
    assert not treated[~mask].any()
    n, k, u = mask.sum(), treated[mask].sum(), model.treatment.uptake
    assert abs(k - n * u) < Z * math.sqrt(n * u * (1 - u))  # binomial (common practice)


def test_equals_a_number_reaches_patients_of_a_population_file(tmp_path):
    (tmp_path / "people.csv").write_text("stage,age\n1,50\n2,60\n3,70\n")
    (tmp_path / "s.toml").write_text(population_model(
        population(300, file="people.csv"),
        strategy("usual", comparator=True),
        strategy("stage_two", eligible=nested(all=[dict(attribute="stage", equals=2)]),
                 changes=[nested(transition="well->dead", hazard_ratio=0.5)])))
    scenario = read_scenario(tmp_path / "s.toml")
    people = draw_population(scenario.population, SEED)
    treated = np.isfinite(treatment_window(bind(scenario, strategy="stage_two"), people, SEED).on)
    np.testing.assert_array_equal(treated, (people.stage == 2).to_numpy())  # pandas mask


# ------------------------------------------------------------------- uptake and windows

def population_model(*more: str) -> str:
    """well -> dead at rate 0.1 for 10 years; `more` gives the population (and strategies)."""
    return scenario_text(
        horizon(10), start(well=1.0), state("well", utility=1), state("dead", absorbing=True),
        rate("well", "dead", 0.1), *more, title=TITLE)


POPULATION_MODEL = population_model(population(
    20000, attribute("age", "normal", mean=60, sd=10),
    attribute("diabetes", "yesno", prevalence=0.4)))


DEATH_HR = (ChangeSpec(risk="well->dead", hazard_ratio=0.8),)


def windows(scenario, name, patients, seed=SEED):
    return treatment_window(bind(scenario, strategy=name), patients, seed)


@pytest.fixture(scope="module")
def people():
    scenario = with_strategies(POPULATION_MODEL)
    return draw_population(scenario.population, SEED)


def test_treated_share_among_eligible_is_the_uptake(people):
    rule = EligibilitySpec(all=(ConditionSpec("age", "at_least", 55.0),),
                           any=(ConditionSpec("diabetes", "equals", True),))
    scenario = with_strategies(POPULATION_MODEL, StrategySpec(
        "drug", "drug", eligible=rule, uptake=0.6, changes=DEATH_HR))
    w = windows(scenario, "drug", people)
    treated = np.isfinite(w.on)
    mask = ((people.age >= 55) & people.diabetes).to_numpy()
    assert not treated[~mask].any()  # nobody outside the eligible group is treated
    n, k = mask.sum(), treated[mask].sum()
    z = (k - n * 0.6) / math.sqrt(n * 0.6 * 0.4)  # binomial (common practice)
    assert abs(z) < Z, (k, n, z)


def test_the_same_patients_take_up_every_strategy_with_the_same_uptake(people):
    """Shared 'uptake' draws (common random numbers): same uptake, same patients; a higher
    uptake treats a superset."""
    scenario = with_strategies(
        POPULATION_MODEL,
        StrategySpec("a", "a", uptake=0.6, changes=DEATH_HR),
        StrategySpec("b", "b", uptake=0.6, start=2.0, discontinuation=0.5,
                     changes=(ChangeSpec(cost=100.0),)),
        StrategySpec("c", "c", uptake=0.8, changes=DEATH_HR))
    treated = {name: np.isfinite(windows(scenario, name, people).on) for name in "abc"}
    np.testing.assert_array_equal(treated["a"], treated["b"])
    assert (treated["a"] <= treated["c"]).all() and treated["c"].sum() > treated["a"].sum()
    # the draws are the patient's own: another seed treats other patients
    other = np.isfinite(windows(scenario, "a", people, seed=SEED + 1).on)
    assert (other != treated["a"]).any()


@pytest.mark.parametrize("start, stop", [(0.0, None), (1.0, 5.0)])
def test_time_on_treatment_is_exponential_until_stop(people, start, stop):
    rate = 0.3
    scenario = with_strategies(POPULATION_MODEL, StrategySpec(
        "drug", "drug", start=start, stop=stop, discontinuation=rate, changes=DEATH_HR))
    w = windows(scenario, "drug", people)
    assert np.all(w.on == start)
    duration = w.off - w.on
    if stop is None:
        # reference: scipy.stats.expon with mean 1/rate
        assert_follows(duration, stats.expon(scale=1 / rate).cdf)
        return
    length = stop - start
    assert duration.max() <= length
    stopped_early = duration < length
    # below the stop: the exponential truncated at the stop (scipy.stats.truncexpon)
    reference = stats.truncexpon(b=rate * length, scale=1 / rate)
    assert_follows(duration[stopped_early], reference.cdf)
    # at the stop: the exponential survival exp(-rate * length), binomial error
    n, p = len(duration), math.exp(-rate * length)
    z = ((~stopped_early).sum() - n * p) / math.sqrt(n * p * (1 - p))
    assert abs(z) < Z, z


# --------------------------------------------- treatment effects against hand-built traces

TREATED_STATES = (horizon(10), start(well=0.8, sick=0.2),
                  state("well", utility=1), state("sick", utility=0.5, cost=200),
                  state("dead", absorbing=True))


def rate_model(*more: str, **sick_death) -> str:
    """sick -> dead at rate 0.3, or by `sick_death` (e.g. a hazard)."""
    return scenario_text(
        *TREATED_STATES, rate("well", "sick", 0.25), rate("well", "dead", 0.05),
        transition("sick", "dead", **(sick_death or dict(rate=0.3))), *more, title=TITLE)


def cycle_model(*more: str) -> str:
    return scenario_text(
        *TREATED_STATES, probability("well", "sick", 0.2), probability("well", "dead", 0.05),
        probability("well", "well", "remainder"),
        probability("sick", "dead", 0.25), probability("sick", "sick", "remainder"),
        *more, title=TITLE)


RATE_MODEL, CYCLE_MODEL = rate_model(), cycle_model()


HR, START, STOP = 0.4, 2.0, 6.0


def treated_strategy(recovery: TransitionSpec) -> StrategySpec:
    """HR on onset from START to STOP, plus a recovery that exists only while treated."""
    return StrategySpec(
        "drug", "drug", start=START, stop=STOP,
        changes=(ChangeSpec(risk="well->sick", hazard_ratio=HR), ChangeSpec(cost=1000.0)),
        transitions=(recovery,), while_treated=(True,))


def rate_matrix(on: bool) -> np.ndarray:
    """The generator written by hand (states well, sick, dead)."""
    onset = 0.25 * (HR if on else 1.0)
    recovery = 0.5 if on else 0.0
    Q = np.array([[0, onset, 0.05], [recovery, 0, 0.3], [0, 0, 0]], float)
    return Q - np.diag(Q.sum(axis=1))


def rate_reference(times: np.ndarray) -> np.ndarray:
    """pi(t) = pi(0) expm(Q_off t) on [0, START), then Q_on until STOP, then Q_off."""
    pieces = [(0.0, START, False), (START, STOP, True), (STOP, np.inf, False)]
    out = []
    for t in times:
        pi = np.array([0.8, 0.2, 0.0])
        for a, b, on in pieces:
            if t <= a:
                break
            pi = pi @ expm(rate_matrix(on) * (min(t, b) - a))
        out.append(pi)
    return np.array(out)


def cycle_reference(n_cycles: int) -> np.ndarray:
    """Cycle n uses the on-treatment matrix when START <= n < STOP (cycle length 1)."""
    def matrix(on):
        onset = 1 - (1 - 0.2) ** HR if on else 0.2  # p' = 1 - (1 - p)^HR
        recovery = 0.3 if on else 0.0
        return np.array([[1 - onset - 0.05, onset, 0.05],
                         [recovery, 1 - recovery - 0.25, 0.25], [0, 0, 1]])
    pi, out = np.array([0.8, 0.2, 0.0]), []
    for n in range(n_cycles + 1):
        out.append(pi)
        pi = pi @ matrix(START <= n < STOP)
    return np.array(out)


def binomial_z(sim, expected: np.ndarray, n: int) -> np.ndarray:
    """(T, S) z of the simulated shares against `expected`, binomial standard errors
    sqrt(p (1 - p) / n) (common practice); 0 where p is 0 or 1."""
    se = np.sqrt(expected * (1 - expected) / n)
    return np.where(se > 0, (state_shares(sim) - expected) / np.where(se > 0, se, 1), 0)


CASES = {
    "rate": (RATE_MODEL, TransitionSpec("sick", "well", "recovery",
                                        hazard=HazardSpec("constant", {"rate": 0.5})),
             rate_reference),
    "cycle": (CYCLE_MODEL, TransitionSpec("sick", "well", "recovery", probability=0.3),
              lambda times: cycle_reference(len(times) - 1)),
}


@pytest.mark.parametrize("kind", CASES)
def test_treatment_window_agrees_with_the_hand_built_trace(kind):
    text, recovery, reference = CASES[kind]
    model = bind(with_strategies(text, treated_strategy(recovery)), strategy="drug")
    n = 4000
    sim = simulate(model, cohort_patients(n), SEED)
    expected = reference(sim.grid)  # (T, S)
    # the project's analytic counterpart, given the windows, is the hand-built one
    np.testing.assert_allclose(analytic(model, mult=sim.mult.distinct(), times=sim.grid).trace[0],
                               expected, rtol=0, atol=1e-9)
    result = compare(sim)
    assert result.exact and result.agrees, result.verdict
    assert result.shares.z.abs().max() < Z
    # the simulated shares against the hand-built trace, binomial standard errors
    assert np.abs(binomial_z(sim, expected, n)).max() < Z
    # no recovery happens outside the window: off_factor 0 on the added transition
    recovery = model.risk_names.index("recovery")
    assert model.treatment.off_factor[recovery] == 0.0


@pytest.mark.parametrize("kind", CASES)
def test_the_cohort_trace_of_a_strategy_applies_its_treatment(kind):
    text, recovery, reference = CASES[kind]
    """Regression: the cohort side used to drop the treatment window, so the hazard ratio
    never acted and the while-treated transition acted at all times."""
    model = bind(with_strategies(text, treated_strategy(recovery)), strategy="drug")
    # uptake 1, no discontinuation: every patient's window is [START, STOP), so the
    # cohort's trace is the hand-built one
    np.testing.assert_allclose(cohort_trace(model).pivot(index="time", columns="state",
                                                         values="share")[list(model.states)],
                               reference(model.times), rtol=0, atol=1e-9)


@pytest.mark.parametrize("change", [dict(uptake=0.6), dict(discontinuation=0.1),
                                    dict(eligible=EligibilitySpec(
                                        all=(ConditionSpec("age", "above", 60.0),)))],
                         ids=["uptake", "discontinuation", "eligibility"])
def test_a_cohort_trace_of_a_strategy_that_treats_some_patients_is_refused(change):
    """No single cohort row shows a mix of treated and untreated patients: the answer is a
    refusal naming the strategy, not the untreated trace."""
    strategy = replace(treated_strategy(CASES["rate"][1]), **change)
    scenario = with_strategies(
        rate_model(population(10, attribute("age", "uniform", lower=40, upper=80))), strategy)
    with pytest.raises(ScenarioError) as refused:
        cohort_trace(bind(scenario, strategy="drug"))
    assert refused.value.path == "strategies.drug"


UPTAKE, QUIT = 0.6, 0.3


def rate_reference_with_quitting(times: np.ndarray) -> np.ndarray:
    """Uptake and exponential discontinuation keep the model Markov on (state, on/off):
    at START a share UPTAKE of every state turns on, on-patients turn off at rate QUIT
    whatever their state, and everyone is off from STOP (a Markov expansion of the
    treatment status, common practice). Generator on (well, sick, dead) x (on, off)."""
    Q = np.zeros((6, 6))
    Q[:3, :3] = rate_matrix(True) - QUIT * np.eye(3)
    Q[:3, 3:] = QUIT * np.eye(3)
    Q[3:, 3:] = rate_matrix(False)
    out = []
    for t in times:
        pi = np.array([0.8, 0.2, 0.0]) @ expm(rate_matrix(False) * min(t, START))
        if t > START:
            pi = np.concatenate([UPTAKE * pi, (1 - UPTAKE) * pi]) @ expm(Q * (min(t, STOP) - START))
            pi = (pi[:3] + pi[3:]) @ expm(rate_matrix(False) * max(t - STOP, 0.0))
        out.append(pi)
    return np.array(out)


def test_uptake_and_discontinuation_agree_with_the_expanded_chain():
    strategy = replace(treated_strategy(CASES["rate"][1]), uptake=UPTAKE, discontinuation=QUIT)
    model = bind(with_strategies(RATE_MODEL, strategy), strategy="drug")
    n = 4000
    sim = simulate(model, cohort_patients(n), SEED)
    expected = rate_reference_with_quitting(sim.grid)
    # each patient's state at t is an independent Bernoulli draw with the mixture
    # probability (its own uptake and quitting draws), so the binomial SE applies
    assert np.abs(binomial_z(sim, expected, n)).max() < Z
    result = compare(sim)  # the per-patient counterpart, given the drawn windows
    assert result.exact and result.agrees, result.verdict


# ---------------------------------------------------------------- costs on treatment

SURVIVAL_MODEL = scenario_text(
    horizon(12), start(alive=1.0), outcomes(discount_costs=0.035, discount_effects=0.015),
    state("alive"), state("dead", absorbing=True), rate("alive", "dead", 0.1), title=TITLE)
MU, COST, UTILITY = 0.1, 1500.0, 0.2


def discounted_stream(value, start, stop, discount):
    """value * integral_start^stop e^{-(mu + delta) t} dt, delta = ln(1 + d) (continuous
    discounting, common practice); with start 0: value (1 - e^{-(mu+delta) T})/(mu+delta)."""
    k = MU + math.log1p(discount)
    return value * (math.exp(-k * start) - math.exp(-k * stop)) / k


@pytest.mark.parametrize("start, stop", [(0.0, 8.0), (3.0, 8.0), (0.0, None)])
def test_discounted_cost_and_utility_on_treatment_have_the_closed_form(start, stop):
    strategy = StrategySpec("drug", "drug", start=start, stop=stop,
                            changes=(ChangeSpec(cost=COST, utility=UTILITY),))
    model = bind(with_strategies(SURVIVAL_MODEL, strategy), strategy="drug")
    end = 12.0 if stop is None else stop
    expected = {"costs_discounted": discounted_stream(COST, start, end, 0.035),
                "costs": discounted_stream(COST, start, end, 0.0),
                "qalys_discounted": discounted_stream(UTILITY, start, end, 0.015)}
    exact = outcome_values(model, analytic(model).exposure)
    for measure, value in expected.items():
        assert exact[measure][0] == pytest.approx(value, rel=1e-9), measure
    values = outcome_values(model, simulate(model, cohort_patients(4000), SEED, keep_exposure=True).exposure)
    for measure, value in expected.items():
        assert_mean_agrees(values[measure], value, measure)


# ------------------------------------------------ a strategy that changes nothing visible

MARKER = population(500, attribute("marker", "yesno", prevalence=0.5))
NO_OP_RATE = rate_model(MARKER, hazard=dict(family="weibull", shape=1.5, scale=3))
NO_OP_CYCLE = cycle_model(MARKER)


@pytest.mark.parametrize("text", [NO_OP_RATE, NO_OP_CYCLE], ids=["rate", "cycle"])
def test_a_strategy_with_hazard_ratio_1_and_cost_0_reproduces_the_comparator(text):
    """Patient by patient, because every draw is shared (common random numbers)."""
    strategy = StrategySpec(
        "inert", "inert", eligible=EligibilitySpec(all=(ConditionSpec("marker", "equals", True),)),
        uptake=0.7, start=1.0, stop=7.0, discontinuation=0.2,
        changes=(ChangeSpec(risk="well->sick", hazard_ratio=1.0),
                 ChangeSpec(risk="sick->dead", hazard_ratio=1.0), ChangeSpec(cost=0.0)))
    scenario = with_strategies(text, strategy)
    people = draw_population(scenario.population, SEED)
    base = simulate(bind(scenario, strategy="usual"), people, SEED, keep_exposure=True)
    inert_model = bind(scenario, strategy="inert")
    inert = simulate(inert_model, people, SEED, keep_exposure=True)
    assert inert_model.treatment is not None  # the strategy is bound, not dropped
    assert np.isfinite(inert.mult.window.on).sum() > 100  # and it does treat patients
    np.testing.assert_array_equal(inert.states, base.states)
    assert inert.transitions == base.transitions
    ours, theirs = outcome_values(inert_model, inert.exposure), outcome_values(base.model, base.exposure)
    for measure in ours:
        np.testing.assert_array_equal(ours[measure], theirs[measure], err_msg=measure)


def test_outcome_rows_filled_in_place_are_the_joined_frames():
    """A big run fills its outcomes in place (`OutcomeRows`); they must be the rows of the
    per-strategy frames joined (`patient_outcomes`), with the strategy as a category."""
    from microsim.decision.strategies import OutcomeRows, patient_outcomes, run_strategies
    from microsim.patients.population import patients_for
    from microsim.scenario import read_scenario
    scenario = read_scenario(Path(__file__).resolve().parent.parent / "scenarios"
                             / "lakemoor_kidney.toml")
    people = patients_for(scenario, 300, 1)
    halves = [run_strategies(scenario, people.iloc[k:k + 150], seed=1) for k in (0, 150)]
    rows = OutcomeRows(300 * len(halves[0]), list(halves[0]))
    joined = []
    for sims in halves:
        for name, sim in sims.items():
            rows.add(name, sim)
        joined.append(patient_outcomes(sims))
    frame = rows.frame()
    assert isinstance(frame.strategy.dtype, pd.CategoricalDtype)
    pd.testing.assert_frame_equal(frame.astype({"strategy": object}),
                                  pd.concat(joined, ignore_index=True))
