"""The chain summary (`microsim.cohort.summaries.chain_summary`, `microsim chain`) against
outside references: scipy.integrate.quad for survival integrals of Weibull and Gompertz
hazards, hand-built numpy products of per-cycle matrices, the fundamental matrix of
Kemeny & Snell (1960, "Finite Markov Chains", ch. 3) by numpy.linalg.inv, and the
matrix exponential by scipy.linalg.expm; plus which models count as time-homogeneous."""
import math

import numpy as np
import pandas as pd
import pytest
from numpy.linalg import inv, matrix_power
from scipy import integrate
from scipy.linalg import expm

from microsim.cli import main
from microsim.cohort.analytic import analytic
from microsim.cohort.expand import expand
from microsim.cohort.summaries import chain_summary
from microsim.cohort.time_dependence import time_dependence
from microsim.binding import bind
from microsim.patients.treatment import uniform_multipliers
from microsim.scenario import parse_scenario
from support import (after, effect, event, horizon, model_of, outcomes, probability, rate,
                     scenario_text, section, start, state, strategy, table, transition)

# ------------------------------------- Weibull progression competing with constant death

SHAPE, SCALE, MU, END = 1.7, 4.0, 0.05, 10.0


def weibull_text(clock: str = "since_start", shape: float = SHAPE) -> str:
    return scenario_text(
        horizon(END), start(first=1), state("first"), state("progressed", absorbing=True),
        state("dead", absorbing=True),
        transition("first", "progressed", hazard=dict(family="weibull", shape=shape, scale=SCALE),
                   clock=clock),
        rate("first", "dead", MU))


def weibull_survival(t, shape=SHAPE):
    return math.exp(-(t / SCALE) ** shape - MU * t)


def weibull_progression(t, shape=SHAPE):
    """h_W(t) S_W(t) e^{-mu t}: the density of progressing at t (competing risks, common practice)."""
    return shape / SCALE * (t / SCALE) ** (shape - 1) * weibull_survival(t, shape)


def quad(f, a, b):
    return integrate.quad(f, a, b, epsabs=1e-13, epsrel=1e-12, limit=200)[0]


@pytest.mark.parametrize("clock, shape", [("since_start", SHAPE), ("since_entry", SHAPE),
                                          ("since_start", 0.7)])
def test_weibull_progression_to_the_horizon_matches_quadrature(clock, shape):
    # 'first' is filled only at time 0, so both clocks are the time since start; shape 0.7
    # is a falling hazard, infinite at 0.
    # Reference: scipy.integrate.quad of P(progress by T) = int_0^T h_W S_W e^{-mu t} dt and
    # of the expected time in 'first', int_0^T S_W e^{-mu t} dt.
    summary = chain_summary(model_of(weibull_text(clock, shape)))
    row = summary.part("absorption_to_end").table.set_index("from_state").loc["first"]
    assert row["in_progressed_at_end"] == pytest.approx(
        quad(lambda t: weibull_progression(t, shape), 0, END), abs=1e-7)
    assert row["in_dead_at_end"] == pytest.approx(
        quad(lambda t: MU * weibull_survival(t, shape), 0, END), abs=1e-7)
    assert row["time_in_first_years"] == pytest.approx(
        quad(lambda t: weibull_survival(t, shape), 0, END), abs=1e-7)
    assert row["expected_time_years"] == row["time_in_first_years"]
    assert row["not_absorbed_at_end"] == pytest.approx(weibull_survival(END, shape), abs=1e-7)
    # the closed form of the chain frozen at time 0 is not offered (its hazard there is 0)
    assert "absorption" not in summary.tables()


def test_weibull_first_cycle_probabilities_match_quadrature():
    # over the first cycle [0, 1]: P(first -> progressed) = int_0^1 h_W S_W e^{-mu t} dt (quad)
    part = chain_summary(model_of(weibull_text())).part("cycle_probabilities")
    assert "first cycle" in part.heading and "from time 0" in part.heading
    row = part.table.set_index("from_state").loc["first"]
    assert row["progressed"] == pytest.approx(quad(weibull_progression, 0, 1), abs=1e-9)
    assert row["first"] == pytest.approx(weibull_survival(1.0), abs=1e-9)


# -------------------------------------------------------------- Gompertz mortality by age

G_RATE, G_SHAPE, AGE0, CAP = 2e-5, 0.1, 60.0, 50.0


def gompertz_cumulative(age):
    return G_RATE / G_SHAPE * math.expm1(G_SHAPE * age)


def test_gompertz_life_expectancy_to_the_cap_matches_quadrature():
    # Reference: quad of int_0^cap exp(-H(a0 + t) + H(a0)) dt, H the Gompertz cumulative
    # hazard rate/shape (e^{shape a} - 1) on attained age.
    text = scenario_text(
        section("time", unit="years", horizon="lifetime", lifetime_cap=CAP), start(age=AGE0, alive=1),
        state("alive"), state("dead", absorbing=True),
        transition("alive", "dead", hazard=dict(family="gompertz", rate=G_RATE, shape=G_SHAPE),
                   clock="age"))
    summary = chain_summary(model_of(text))
    part = summary.part("absorption_to_end")
    assert "lifetime cap" in part.heading and "age 60" in part.heading
    assert "what the cap cuts off" in part.note
    row = part.table.iloc[0]

    def survival(t):
        return math.exp(-gompertz_cumulative(AGE0 + t) + gompertz_cumulative(AGE0))

    assert row["expected_time_years"] == pytest.approx(quad(survival, 0, CAP), abs=1e-7)
    assert row["not_absorbed_at_end"] == pytest.approx(survival(CAP), abs=1e-9)
    assert row["in_dead_at_end"] == pytest.approx(1 - survival(CAP), abs=1e-9)


# ----------------------------------------------------------- cycle model with an age table

AGE_TABLE = table("mortality", by="age", starts=[0, 62, 65], values=[0.01, 0.05, 0.2])


def age_table_text(correction: str) -> str:
    return scenario_text(
        horizon(8), start(age=60, well=1), outcomes(correction=correction),
        state("well"), state("sick"), state("dead", absorbing=True),
        probability("well", "sick", 0.1), probability("well", "dead", "mortality"),
        probability("well", "well", "remainder"),
        probability("sick", "well", 0.2), probability("sick", "dead", 0.15),
        probability("sick", "sick", "remainder"), AGE_TABLE)


def hand_matrix(age):
    """The per-cycle matrix at attained age `age`, written out by hand."""
    m = 0.01 if age < 62 else 0.05 if age < 65 else 0.2
    return np.array([[0.9 - m, 0.1, m], [0.2, 0.65, 0.15], [0, 0, 1.0]])


HAND_WEIGHTS = {  # quadrature weights in cycles of pi_0 .. pi_8 (Elbasha & Chhatwal 2016)
    "none": [1] * 8 + [0],
    "half-cycle": [0.5] + [1] * 7 + [0],
    "trapezoidal": [0.5] + [1] * 7 + [0.5],
}


@pytest.mark.parametrize("correction", sorted(HAND_WEIGHTS))
def test_cycle_model_with_age_table_matches_hand_product(correction):
    # Reference: pi_{n+1} = pi_n P(60 + n), a numpy product of hand-written matrices, then
    # the correction's weights written out by hand.
    summary = chain_summary(model_of(age_table_text(correction)))
    part = summary.part("absorption_to_end")
    assert f"'{correction}' within-cycle correction" in part.heading
    table_ = part.table.set_index("from_state")
    for i, name in enumerate(["well", "sick"]):
        pi = np.eye(3)[i]
        trace = [pi]
        for n in range(8):
            pi = pi @ hand_matrix(60 + n)
            trace.append(pi)
        time_in = np.asarray(HAND_WEIGHTS[correction]) @ np.array(trace)
        row = table_.loc[name]
        np.testing.assert_allclose([row["time_in_well_years"], row["time_in_sick_years"]],
                                   time_in[:2], rtol=0, atol=1e-12)
        assert row["in_dead_at_end"] == pytest.approx(trace[-1][2], abs=1e-12)
        assert row["not_absorbed_at_end"] == pytest.approx(trace[-1][:2].sum(), abs=1e-12)
    assert "steady_state" in {p.name for p in summary.parts}
    assert summary.part("steady_state").table is None


# ------------------------------------------- homogeneous models: the closed form and the limit

CYCLE_Q = np.array([[0.85, 0.1], [0.05, 0.75]])  # among well, sick; the rest goes to dead


def homogeneous_cycle_text(length, correction="none") -> str:
    return scenario_text(
        horizon(length), start(well=1), outcomes(correction=correction),
        state("well"), state("sick"), state("dead", absorbing=True),
        probability("well", "sick", 0.1), probability("well", "dead", 0.05),
        probability("well", "well", "remainder"),
        probability("sick", "well", 0.05), probability("sick", "dead", 0.2),
        probability("sick", "sick", "remainder"))


def times_of(table_, suffix="years"):
    return table_.set_index("from_state")[[f"time_in_well_{suffix}", f"time_in_sick_{suffix}"]].to_numpy()


def test_closed_form_is_kemeny_snell_fundamental_matrix():
    # Kemeny & Snell 1960: N = (I - Q)^-1 expected cycles in each transient state, counting
    # the start; t = N 1; absorption probabilities B = N R (all into 'dead' here)
    summary = chain_summary(model_of(homogeneous_cycle_text(20)))
    closed = summary.part("absorption").table
    N = inv(np.eye(2) - CYCLE_Q)
    np.testing.assert_allclose(times_of(closed), N, rtol=1e-12)
    np.testing.assert_allclose(closed["expected_time_years"], N.sum(axis=1), rtol=1e-12)
    np.testing.assert_allclose(closed["ends_in_dead"], 1.0, rtol=1e-12)
    assert summary.part("steady_state").table is not None  # everyone ends in 'dead'


@pytest.mark.parametrize("correction, start_cycle", [("none", 0.0), ("half-cycle", 0.5)])
def test_to_the_horizon_approaches_the_closed_form(correction, start_cycle):
    # Up to n cycles the time in each state is sum_{k<n} Q^k = (I - Q^n) N (geometric
    # series), less half the start cycle with the half-cycle correction (its first weight is
    # 1/2); it tends to Kemeny & Snell's N as n grows.
    N = inv(np.eye(2) - CYCLE_Q)
    gaps = []
    for n in (5, 20, 80, 200):
        summary = chain_summary(model_of(homogeneous_cycle_text(n, correction)))
        to_end = times_of(summary.part("absorption_to_end").table)
        expected = (np.eye(2) - matrix_power(CYCLE_Q, n)) @ N - start_cycle * np.eye(2)
        np.testing.assert_allclose(to_end, expected, rtol=0, atol=1e-11)
        np.testing.assert_allclose(times_of(summary.part("absorption").table), N, rtol=1e-12)
        gaps.append(np.abs(to_end + start_cycle * np.eye(2) - N).max())
    assert gaps == sorted(gaps, reverse=True) and gaps[-1] < 1e-9


RATES = np.array([[-0.3, 0.2], [0.1, -0.6]])  # among well, sick (exits to dead: 0.1, 0.5)


def homogeneous_rate_text(length) -> str:
    return scenario_text(
        horizon(length), start(well=1), state("well"), state("sick"), state("dead", absorbing=True),
        rate("well", "sick", 0.2), rate("well", "dead", 0.1),
        rate("sick", "well", 0.1), rate("sick", "dead", 0.5))


def test_rate_model_to_the_horizon_approaches_the_closed_form():
    # continuous time: int_0^T e^{Qt} dt = N (I - e^{QT}), N = (-Q)^-1 (scipy.linalg.expm),
    # tending to N (Neuts 1981, "Matrix-Geometric Solutions in Stochastic Models")
    N = inv(-RATES)
    for length in (2, 10, 60):
        summary = chain_summary(model_of(homogeneous_rate_text(length)))
        np.testing.assert_allclose(times_of(summary.part("absorption").table), N, rtol=1e-10)
        to_end = times_of(summary.part("absorption_to_end").table)
        np.testing.assert_allclose(to_end, N @ (np.eye(2) - expm(RATES * length)), rtol=0, atol=1e-10)
        probabilities = summary.part("cycle_probabilities").table.set_index("from_state")
        np.testing.assert_allclose(probabilities.loc[["well", "sick"], ["well", "sick"]],
                                   expm(RATES), rtol=0, atol=1e-12)
    assert np.abs(to_end - N).max() < 1e-4  # e^{-0.25 * 60} of what is left


def test_lifetime_homogeneous_model_gives_the_closed_form_only():
    text = homogeneous_rate_text(1).replace("horizon = 1", 'horizon = "lifetime"')
    names = [p.name for p in chain_summary(model_of(text)).parts]
    assert names == ["cycle_probabilities", "steady_state", "absorption"]


def test_count_memory_starts_as_on_entering_the_state():
    # a state's own entries count from the start in it (as Expansion.start does): from
    # 'sick' the exit is 3 times faster after one entry, so the time there is 1 / (3 * 0.5)
    text = scenario_text(
        horizon(200), start(well=1), state("well"), state("sick"), state("dead", absorbing=True),
        rate("well", "sick", 1.0), rate("sick", "dead", 0.5, memory=[after("sick", multipliers=[1, 3])]))
    summary = chain_summary(model_of(text))
    for name in ("absorption", "absorption_to_end"):
        row = summary.part(name).table.set_index("from_state").loc["sick"]
        assert row["time_in_sick_years"] == pytest.approx(1 / 1.5, rel=1e-9), name


# --------------------------------------------------------------- which chains change over time

def dependence(text: str, strategy_name=None):
    model = bind(parse_scenario(text), strategy=strategy_name)
    return time_dependence(expand(model), uniform_multipliers(model))


def three_state(*rows, age=None, more=()):
    return scenario_text(horizon(10), start(age=age, well=1), state("well"), state("sick"),
                         state("dead", absorbing=True), *rows, *more)


CONSTANT_ROWS = (rate("well", "sick", 0.2), rate("sick", "dead", 0.3))
TREATED = (strategy("usual", comparator=True),)


@pytest.mark.parametrize("text, strategy_name, phrase", [
    (three_state(rate("well", "sick", "steps"), rate("sick", "dead", 0.3),
                 more=[table("steps", by="time", starts=[0, 3], values=[0.1, 0.4])]),
     None, "table by time"),
    (three_state(rate("well", "sick", "steps"), rate("sick", "dead", 0.3), age=50,
                 more=[table("steps", by="age", starts=[0, 55], values=[0.1, 0.4])]),
     None, "table by age"),
    (three_state(transition("well", "sick", hazard=dict(family="loglogistic", shape=2, scale=3),
                            clock="since_start"), rate("sick", "dead", 0.3)),
     None, "loglogistic hazard on the time since start"),
    (three_state(rate("well", "sick", 0.2), rate("sick", "dead", 0.3, effects=[effect("age", 1.05)]),
                 age=50), None, "effect of attained age"),
    (three_state(*CONSTANT_ROWS, more=[*TREATED, strategy("late", start=2, changes=[
        dict(transition="well->sick", hazard_ratio=0.5)])]), "late", "starts at 2"),
    (three_state(*CONSTANT_ROWS, more=[*TREATED, strategy("short", stop=4, changes=[
        dict(transition="well->sick", hazard_ratio=0.5)])]), "short", "stops at 4"),
    (three_state(rate("well", "sick", 0.2), transition(
        "sick", "dead", hazard=dict(family="weibull", shape=2, scale=3))),
     None, "semi-Markov"),
], ids=["time table", "age table", "loglogistic", "age effect", "late start", "early stop",
        "semi-markov"])
def test_what_makes_the_chain_change_over_time(text, strategy_name, phrase):
    found = dependence(text, strategy_name)
    assert not found.homogeneous and any(phrase in r for r in found.reasons), found.reasons


def test_what_leaves_the_expanded_chain_the_same():
    # time-in-state tables of cycle models (tunnel states), count memory, a treatment from
    # 0 to the end, a table that no longer changes after the start age, a hazard ratio of 1
    cycle = scenario_text(
        horizon(10), start(well=1), state("well"), state("dead", absorbing=True),
        probability("well", "dead", "by_stay"), probability("well", "well", "remainder"),
        table("by_stay", by="time_in_state", starts=[0, 2], values=[0.1, 0.3]))
    memory = three_state(rate("well", "sick", 0.2), rate("sick", "dead", 0.3),
                         more=[event("flare", ["well"], rate=0.5,
                                     memory=[after("flare", multipliers=[1, 2])])])
    treated = three_state(*CONSTANT_ROWS, more=[*TREATED, strategy("whole", changes=[
        dict(transition="well->sick", hazard_ratio=0.5)])])
    settled = three_state(rate("well", "sick", "steps"), rate("sick", "dead", 0.3), age=70,
                          more=[table("steps", by="age", starts=[0, 40, 60], values=[0.5, 0.1, 0.2])])
    neutral = three_state(rate("well", "sick", 0.2), rate("sick", "dead", 0.3, effects=[effect("age", 1)]),
                          age=50)
    for text, name in [(cycle, None), (memory, None), (treated, "whole"), (settled, None),
                       (neutral, None)]:
        found = dependence(text, name)
        assert found.homogeneous, found.reasons


def test_the_analytic_method_follows_the_same_answer():
    # smooth changes take the forward equations, steps the exact exponentials
    smooth = model_of(weibull_text())
    steps = model_of(three_state(rate("well", "sick", "steps"), rate("sick", "dead", 0.3),
                                 more=[table("steps", by="time", starts=[0, 3], values=[0.1, 0.4])]))
    assert "forward equations" in analytic(smooth).method
    assert "exponential" in analytic(steps).method


# ------------------------------------------------------------- wording and the command line

def test_time_varying_model_has_no_steady_state_number_and_says_why():
    summary = chain_summary(model_of(weibull_text()))
    steady = summary.part("steady_state")
    assert steady.table is None
    assert "changes over time" in steady.note and "weibull hazard" in steady.note
    assert "first->progressed" in steady.note
    assert "no closed form" in summary.part("absorption_to_end").note


def test_semi_markov_model_says_it_is_not_exact():
    text = three_state(rate("well", "sick", 0.2),
                       transition("sick", "dead", hazard=dict(family="weibull", shape=2, scale=3)))
    summary = chain_summary(model_of(text))
    assert summary.notes and "not exact" in summary.notes[0] and "semi-Markov" in summary.notes[0]


def test_summary_command_prints_the_time_dependent_table(tmp_path, capsys):
    path = tmp_path / "weibull.toml"
    path.write_text(weibull_text())
    assert main(["chain", str(path), "--out", str(tmp_path)]) == 0
    out = capsys.readouterr()
    assert out.err == ""
    assert "Absorption up to the end of the horizon, 10 years" in out.out
    assert "Steady state: none, because the chain changes over time" in out.out
    assert "Absorption, closed form" not in out.out and "not_absorbed_at_end" in out.out
    written = pd.read_parquet(tmp_path / "weibull" / "latest" / "absorption_to_end.parquet")
    assert written.loc[0, "in_progressed_at_end"] == pytest.approx(
        quad(weibull_progression, 0, END), abs=1e-7)
    assert not (tmp_path / "weibull" / "latest" / "absorption.csv").exists()
    assert (tmp_path / "weibull" / "latest" / "cycle_probabilities.csv").exists()


def test_summary_command_names_both_tables_of_a_homogeneous_model(tmp_path, capsys):
    path = tmp_path / "chain.toml"
    path.write_text(homogeneous_cycle_text(20))
    assert main(["chain", str(path), "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "Absorption, closed form" in out and "Absorption up to the end of the horizon" in out
    for name in ("absorption", "absorption_to_end", "steady_state", "expected_outcomes"):
        assert (tmp_path / "chain" / "latest" / f"{name}.csv").exists(), name
