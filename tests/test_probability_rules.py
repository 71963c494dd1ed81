"""The per-cycle probability rules against hand computations, and the separate rule's bound.

Sources: the competing-risks combination of per-cycle probabilities through rates,
r_j = -ln(1 - p_j) / cycle x m_j, p'_j = r_j / R (1 - exp(-R cycle)), remainder exp(-R cycle)
(Briggs, Claxton & Sculpher 2006, "Decision Modelling for Health Economic Evaluation",
ch. 3; Gidwani & Russell 2020, PharmacoEconomics; from memory), computed here with numpy's
exp and log, not the package's route (log1p and powers); the Markov cohort trace
pi_{n+1} = pi_n P_n (common practice); the separate rule p' = 1 - (1 - p)^m and its row
bound, worked out by hand below.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.cohort.cycle_matrices import cycle_matrices
from microsim.cohort.expand import expand
from microsim.engines.cycle_engine import simulate_cycles
from microsim.engines.compiled_cycles import simulate_cycles_compiled
from microsim.hazards.cycle_probabilities import competing
from microsim.patients.multipliers import multipliers
from microsim.patients.population import draw_population, patients_for
from microsim.scenario import ScenarioError, parse_scenario, read_scenario
from microsim.scenario.rows import attribute_ranges, parameter_settings, row_bounds
from microsim.simulation import simulate
from support import (Z, attribute, effect, horizon, parameters, population, probability,
                     refusal, scenario_text, start, state, state_shares, strategy, table)

CYCLE = 0.5


def covariate_model(rule: str, marker=None, hr_marker=1.7, size=4000) -> str:
    """well -> sick and well -> dead beside a remainder, with a yes/no and a continuous
    attribute; sick -> dead alone beside its remainder."""
    marker = marker or attribute("marker", "uniform", lower=0, upper=2)
    return scenario_text(
        horizon(10, cycle=CYCLE, rule=rule), start(well=1),
        state("well"), state("sick"), state("dead", absorbing=True),
        probability("well", "sick", "p_a",
                    effects=[effect("smoker", 2.5), effect("marker", hr_marker, centre=1)]),
        probability("well", "dead", "p_b", effects=[effect("smoker", 1.5)]),
        probability("well", "well", "remainder"),
        probability("sick", "dead", 0.25), probability("sick", "sick", "remainder"),
        parameters(p_a=0.3, p_b=0.1),
        population(size, attribute("smoker", "yesno", prevalence=0.4), marker))


def by_hand(p: np.ndarray, m: np.ndarray, cycle: float):
    """The competing combination through rates (numpy exp and log)."""
    r = -np.log(1.0 - p) / cycle * m  # (..., moves)
    total = r.sum(axis=-1, keepdims=True)
    return r / total * (1.0 - np.exp(-total * cycle)), np.exp(-total[..., 0] * cycle)


def test_competing_rule_matches_the_formula_for_a_row_with_covariates():
    model = bind(parse_scenario(covariate_model("competing")))
    patients = draw_population(model.scenario.population, 11, np.arange(500))
    P, risk_p = cycle_matrices(expand(model), 0, multipliers(model, patients))
    smoker = patients["smoker"].to_numpy(float)
    m = np.stack([2.5**smoker * 1.7 ** (patients["marker"].to_numpy() - 1), 1.5**smoker], axis=1)
    moves, stay = by_hand(np.array([0.3, 0.1]), m, CYCLE)
    well = model.states.index("well")
    np.testing.assert_allclose(risk_p[:, well, :2], moves, rtol=1e-12)
    np.testing.assert_allclose(P[:, well, well], stay, rtol=1e-12)
    # the remainder's share and the moves' make a distribution
    np.testing.assert_allclose(P[:, well].sum(axis=1), 1.0, rtol=1e-14)
    # a row with one move is the separate rule's 1 - (1 - p)^m (here m = 1)
    sick = model.states.index("sick")
    assert np.all(P[:, sick, model.states.index("dead")] == 0.25)


def test_the_documented_example():
    # docs/scenario-format.md: without effects, 0.3 and 0.1 become 0.286 and 0.084
    chances = competing([(0.3, -math.log(0.7), 1.0), (0.1, -math.log(0.9), 1.0)])
    expected, stay = by_hand(np.array([0.3, 0.1]), np.ones(2), 1.0)
    np.testing.assert_allclose(chances, expected, rtol=1e-12)
    assert [round(p, 3) for p in chances] == [0.286, 0.084] and round(stay, 2) == 0.63


@pytest.mark.parametrize("extreme", [1e6, 1e-6])
def test_competing_rows_never_exceed_1_for_extreme_multipliers(extreme):
    rng = np.random.default_rng(5)
    p = rng.uniform(0.0, 0.999, size=(3, 10_000))
    m = np.exp(rng.uniform(-1, 1, size=(3, 10_000))) * extreme
    m[0, :100] = 0.0  # a move switched off (a treatment-only move off treatment)
    p[1, 100:200] = 0.0
    chances = competing([(p[j], -np.log1p(-p[j]), m[j]) for j in range(3)])
    total = np.sum(chances, axis=0)
    # at most 1 up to the rounding of three products and a sum (a few units in the last place)
    assert np.all(np.stack(chances) >= 0) and np.all(total <= 1.0 + 4 * np.finfo(float).eps)
    stay = np.prod(np.float_power(1 - p, m), axis=0)
    np.testing.assert_allclose(total + stay, 1.0, rtol=1e-12)
    # by hand where the rates do not underflow or saturate
    fine = np.all(m > 0, axis=0) & np.all(p > 0, axis=0)
    expected, _ = by_hand(p.T[fine], m.T[fine], 1.0)
    np.testing.assert_allclose(np.stack(chances).T[fine], expected, rtol=1e-9, atol=1e-300)


def test_extreme_hazard_ratios_keep_every_row_a_distribution_in_the_model():
    text = covariate_model("competing", hr_marker=1e6)  # marker up to 2: HR^1 = 1e6
    model = bind(parse_scenario(text))
    patients = draw_population(model.scenario.population, 3, np.arange(300))
    exp = expand(model)
    for n in range(model.n_cycles):
        P, _ = cycle_matrices(exp, n, multipliers(model, patients))
        assert np.all(P >= 0)
        np.testing.assert_allclose(P.sum(axis=2), 1.0, rtol=1e-12)


def test_uniform_cohort_trace_is_the_hand_built_matrix_product():
    # one uniform cohort aged 60 whose death risk grows with attained age (HR 1.08 a year)
    text = scenario_text(
        horizon(8, cycle=CYCLE, rule="competing"), start(age=60, well=0.8, sick=0.2),
        state("well"), state("sick"), state("dead", absorbing=True),
        probability("well", "sick", 0.2), probability("well", "dead", 0.05,
                                                      effects=[effect("age", 1.08, centre=60)]),
        probability("well", "well", "remainder"),
        probability("sick", "dead", 0.3), probability("sick", "well", 0.1),
        probability("sick", "sick", "remainder"))
    model = bind(parse_scenario(text))
    pi, trace = np.array([0.8, 0.2, 0.0]), [np.array([0.8, 0.2, 0.0])]
    for n in range(model.n_cycles):
        age = 60 + n * CYCLE
        (well_sick, well_dead), well_stay = by_hand(np.array([0.2, 0.05]),
                                                    np.array([1.0, 1.08 ** (age - 60)]), CYCLE)
        (sick_dead, sick_well), sick_stay = by_hand(np.array([0.3, 0.1]), np.ones(2), CYCLE)
        P = np.array([[well_stay, well_sick, well_dead],
                      [sick_well, sick_stay, sick_dead], [0.0, 0.0, 1.0]])
        pi = pi @ P
        trace.append(pi)
    np.testing.assert_allclose(analytic(model).trace[0], np.array(trace), rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("rule", ["separate", "competing"])
def test_engines_agree_with_the_analytic_side(rule):
    model = bind(parse_scenario(covariate_model(rule)))
    people = draw_population(model.scenario.population, 21)
    sim = simulate(model, people, 22)
    p = analytic(model, patients=people).trace  # (N, T, S)
    # independent patients, each Bernoulli with its own p: the share's standard error is
    # sqrt(sum p (1 - p)) / N (Poisson-binomial variance, common practice)
    se = np.sqrt((p * (1 - p)).sum(axis=0)) / len(people)
    observed, expected = state_shares(sim), p.mean(axis=0)
    inside = se > 0
    assert np.all(np.abs(observed - expected)[inside] < Z * se[inside])
    assert np.array_equal(observed[~inside], expected[~inside])


def test_both_engines_are_bit_identical_under_the_competing_rule():
    model = bind(parse_scenario(covariate_model("competing", hr_marker=1e6, size=800)))
    ids = np.arange(800) * 5 + 3
    people = draw_population(model.scenario.population, 9, ids)
    mult = multipliers(model, people)
    simpy, vectorised = (engine(model, mult, ids, 9)
                         for engine in (simulate_cycles, simulate_cycles_compiled))
    for column in ("patient", "time", "source", "target", "risk"):
        assert np.array_equal(getattr(simpy, column), getattr(vectorised, column)), column
    # starts (-1), both moves out of well (0, 1) and sick -> dead (3); staying is not recorded
    assert set(simpy.risk.tolist()) == {-1, 0, 1, 3}


def test_rows_of_one_move_are_the_same_under_both_rules():
    def histories(rule):
        text = scenario_text(
            horizon(10, rule=rule), start(well=1),
            state("well"), state("sick"), state("dead", absorbing=True),
            probability("well", "sick", 0.2, effects=[effect("smoker", 3)]),
            probability("well", "well", "remainder"),
            probability("sick", "dead", 0.3), probability("sick", "sick", "remainder"),
            population(500, attribute("smoker", "yesno", prevalence=0.5)))
        model = bind(parse_scenario(text))
        people = draw_population(model.scenario.population, 4)
        return simulate_cycles_compiled(model, multipliers(model, people), np.arange(500), 4)

    separate, combined = histories("separate"), histories("competing")
    for column in ("patient", "time", "source", "target", "risk"):
        assert np.array_equal(getattr(separate, column), getattr(combined, column))


# ------------------------------------------------------------- the separate rule's bound

def one_bound(text: str) -> float:
    s = parse_scenario(text)
    values, _ = parameter_settings(s)
    (found,) = [b for b in row_bounds(s, values, attribute_ranges(s)) if b.row.state == "well"]
    return float(found.bound[0])


def test_unbounded_attribute_is_refused_naming_row_and_fix():
    text = covariate_model("separate", marker=attribute("marker", "lognormal", meanlog=0,
                                                        sdlog=0.5))
    error = refusal(text)
    assert error.path == "transitions.well->*"
    for phrase in ("can sum to 1.1", "driven by smoker, marker (unbounded)",
                   'set time.probability_rule = "competing"', "or bound marker (a normal attribute takes upper; a lognormal or gamma one has no "
                   "bound",
                   "or lower the effects"):
        assert phrase in error.message, error.message
    assert "\n" not in str(error)
    # the same row under the competing rule is a distribution for every patient
    parse_scenario(text.replace('"separate"', '"competing"'))


def test_bounded_attributes_are_accepted_and_the_bound_holds_for_every_patient():
    text = covariate_model("separate")
    # by hand: smoker (HR 2.5) and marker at 2 (HR 1.7^(2 - 1)) on p_a = 0.3, smoker
    # (HR 1.5) on p_b = 0.1, each on the rate scale
    expected = (1 - 0.7 ** (2.5 * 1.7)) + (1 - 0.9**1.5)
    assert one_bound(text) == pytest.approx(expected, rel=1e-12)
    model = bind(parse_scenario(text))
    people = draw_population(model.scenario.population, 2)
    P, _ = cycle_matrices(expand(model), 0, multipliers(model, people))
    leaving = 1 - P[:, model.states.index("well"), model.states.index("well")]
    assert leaving.max() <= expected
    assert leaving.max() > expected - 0.01  # smokers with a marker near 2 come close


@pytest.mark.parametrize("hr, refused", [(1.30, False), (1.33, True)])
def test_the_bound_decides_at_1(hr, refused):
    # p_a = 0.6 with marker up to 2 (centre 1) and p_b = 0.3: by hand the bound is
    # 1 - 0.4^HR + 0.3, above 1 when HR > ln 0.3 / ln 0.4 = 1.314
    text = scenario_text(
        horizon(5), start(well=1), state("well"), state("dead", absorbing=True),
        state("gone", absorbing=True),
        probability("well", "dead", 0.6, effects=[effect("marker", hr, centre=1)]),
        probability("well", "gone", 0.3), probability("well", "well", "remainder"),
        population(10, attribute("marker", "uniform", lower=0, upper=2)))
    if refused:
        assert refusal(text).path == "transitions.well->*"
    else:
        assert one_bound(text) == pytest.approx(1 - 0.4**hr + 0.3, rel=1e-12)


def test_attained_age_and_tables_take_their_highest_values():
    # ages 50..70 at time 0, horizon 10 (last cycle starts at 9): attained age up to 79;
    # the age table's highest band is 0.2
    text = scenario_text(
        horizon(10), start(well=1), state("well"), state("sick"), state("dead", absorbing=True),
        probability("well", "sick", 0.1, effects=[effect("age", 1.05, centre=60)]),
        probability("well", "dead", "by_age"), probability("well", "well", "remainder"),
        probability("sick", "dead", 0.3), probability("sick", "sick", "remainder"),
        table("by_age", by="age", starts=[0, 65, 75], values=[0.01, 0.05, 0.2]),
        population(10, attribute("age", "normal", mean=60, sd=5, lower=50, upper=70)))
    assert one_bound(text) == pytest.approx(1 - 0.9 ** (1.05**19) + 0.2, rel=1e-12)


def test_a_strategys_hazard_ratio_counts_in_its_rows():
    text = covariate_model("separate") + "\n" + strategy("usual", comparator=True) + "\n" + \
        strategy("boost", changes=[{"transition": "well->dead", "hazard_ratio": 9.0}])
    error = refusal(text)
    assert error.path == "strategies.boost.transitions.well->*"
    assert "the hazard ratio of strategies.boost" in error.message


def test_one_way_settings_are_bounded_too():
    text = covariate_model("separate").replace("p_a = 0.3", "p_a = { value = 0.3, low = 0.2, "
                                                            "high = 0.9 }")
    error = refusal(text)
    assert error.path == "transitions.well->*"
    assert "with parameters.p_a at its high value 0.9 (one-way range)" in error.message


def file_scenario(tmp_path, markers) -> Path:
    pd.DataFrame({"smoker": [True, False] * (len(markers) // 2),
                  "marker": markers}).to_csv(tmp_path / "people.csv", index=False)
    text = covariate_model("separate")
    start_ = text.index("[population]")
    path = tmp_path / "scenario.toml"
    path.write_text(text[:start_] + '[population]\npatients = 50\nfile = "people.csv"\n')
    return path


def test_file_population_rows_are_bounded_when_the_file_is_read(tmp_path):
    path = file_scenario(tmp_path, [0.5, 1.0, 1.5, 6.0])
    scenario = read_scenario(path)  # only the header is read here: the range is unknown
    with pytest.raises(ScenarioError) as caught:
        patients_for(scenario, None, 1)
    assert caught.value.path == "transitions.well->*"
    assert "driven by smoker, marker" in caught.value.message
    # by hand: marker up to 6 gives HR 1.7^5 on p_a beside p_b's 1.5
    bound = (1 - 0.7 ** (2.5 * 1.7**5)) + (1 - 0.9**1.5)
    assert f"can sum to {bound:.12g}" in caught.value.message


def test_file_population_within_the_bound_runs(tmp_path):
    path = file_scenario(tmp_path, [0.5, 1.0, 1.5, 2.0])
    people = patients_for(read_scenario(path), None, 1)
    assert len(people) == 50


# ------------------------------------------------------------- engines never cap

def test_engines_and_cohort_raise_on_a_row_above_1_instead_of_capping():
    # binding values past the reader's checks (as a bug would): 0.8 + 0.5 beside a remainder
    model = bind(parse_scenario(covariate_model("separate")), {"p_a": 0.8, "p_b": 0.5})
    people = draw_population(model.scenario.population, 1, np.arange(7, 17))
    mult = multipliers(model, people)
    for engine in (simulate_cycles, simulate_cycles_compiled):
        with pytest.raises(RuntimeError, match=r"transitions\.well->\*: the per-cycle "
                           r"probabilities of patient 7 sum to .* at cycle 0, above 1"):
            engine(model, mult, people["patient"].to_numpy(), 1)
    with pytest.raises(RuntimeError, match=r"transitions\.well->\*: .* at cycle 0, above 1"):
        cycle_matrices(expand(model), 0, mult)
