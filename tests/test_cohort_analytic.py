"""The analytic counterpart of a bound model (`microsim.cohort.analytic`) against outside
references: numpy matrix powers, scipy's matrix exponential and quadrature, closed forms
of survival and discounted life expectancy, and hand-written expanded chains."""
import math
from pathlib import Path

import numpy as np
import pytest
from numpy.linalg import matrix_power
from scipy import integrate
from scipy.linalg import expm

from microsim.cohort.analytic import analytic
from microsim.patients.multipliers import Multipliers
from microsim.markov import cohort_trace, counter_expansion, tunnel_expansion
from microsim.results.outcomes import outcome_values
from microsim.patients.population import draw_population
from support import (after, attribute, effect, event, horizon, model_of, nested, outcomes,
                     population, probability, rate, scenario_text, start, state, table,
                     transition)
from microsim.binding import bind
from microsim.patients.population import patients_for
from microsim.scenario import parse_scenario


def hand_recursion(start, matrix, n):
    """pi_n = pi_0 P^n, one numpy.linalg.matrix_power per cycle (Chapman-Kolmogorov)."""
    return np.array([np.asarray(start) @ matrix_power(matrix, k) for k in range(n + 1)])


# ------------------------------------------------------------------ homogeneous cycle model

def cycle_model(*more: str, onset_effects=None) -> str:
    """The homogeneous cycle model; `onset_effects` on well->sick, `more` blocks after it."""
    return scenario_text(
        horizon(20, cycle=1), start(well=0.8, sick=0.2), outcomes(discount_costs=0.05),
        state("well", utility=1), state("sick", utility=0.6), state("dead", absorbing=True),
        probability("well", "sick", 0.1, cost=500, effects=onset_effects),
        probability("well", "dead", 0.02), probability("well", "well", "remainder"),
        probability("sick", "well", 0.05), probability("sick", "dead", 0.2),
        probability("sick", "sick", "remainder"), *more)


CYCLE_MODEL = cycle_model()
CYCLE_P = np.array([[0.88, 0.10, 0.02], [0.05, 0.75, 0.20], [0.0, 0.0, 1.0]])
CYCLE_START = np.array([0.8, 0.2, 0.0])


def test_cycle_trace_equals_cohort_trace_and_matrix_powers():
    model = model_of(CYCLE_MODEL)
    result = analytic(model)
    assert result.exact and result.trace.shape == (1, 21, 3)
    # reference: the project's closed-form chain and numpy.linalg.matrix_power
    np.testing.assert_allclose(result.trace[0], cohort_trace(CYCLE_START, CYCLE_P, 20),
                               rtol=0, atol=1e-12)
    np.testing.assert_allclose(result.trace[0], hand_recursion(CYCLE_START, CYCLE_P, 20),
                               rtol=0, atol=1e-12)


def test_cycle_occurrences_counted_at_cycle_end_with_discount():
    # expected moves well->sick in cycle k: pi_k[well] * P[well, sick]; one-off costs at the
    # end of the cycle, discounted (1 + d)^-(k + 1) (common practice)
    model = model_of(CYCLE_MODEL)
    result = analytic(model)
    trace = hand_recursion(CYCLE_START, CYCLE_P, 20)
    moves = trace[:-1, 0] * 0.1
    r = model.risk_names.index("well->sick")
    np.testing.assert_allclose(result.exposure.occurrences[0, r, 0], moves.sum(), rtol=1e-12)
    discounted = moves @ 1.05 ** -np.arange(1.0, 21.0)
    np.testing.assert_allclose(result.exposure.occurrences[0, r, 1], discounted, rtol=1e-12)
    costs = outcome_values(model, result.exposure)["costs_discounted"]
    np.testing.assert_allclose(costs[0], 500 * discounted, rtol=1e-12)


def test_cycle_occupancy_half_cycle_rule():
    # the scenario format's half-cycle rule: cycle * (pi_0 / 2 + pi_1 + ... + pi_{n-1})
    # (docs/scenario-format.md; Sonnenberg & Beck 1993, from memory)
    half = CYCLE_MODEL.replace("discount_costs = 0.05", 'discount_costs = 0.05\ncorrection = "half-cycle"')
    result = analytic(model_of(half))
    trace = hand_recursion(CYCLE_START, CYCLE_P, 20)
    expected = trace[0] / 2 + trace[1:-1].sum(axis=0)
    np.testing.assert_allclose(result.exposure.occupancy[0, :, 0], expected, rtol=1e-12)


def test_cycle_occupancy_by_default_is_the_trapezoidal_rule():
    # the default: cycle * (pi_0 / 2 + pi_1 + ... + pi_{n-1} + pi_n / 2), the trapezoidal
    # rule (Elbasha & Chhatwal 2016), which counts the patients still alive at the horizon
    result = analytic(model_of(CYCLE_MODEL))
    trace = hand_recursion(CYCLE_START, CYCLE_P, 20)
    expected = trace[0] / 2 + trace[1:-1].sum(axis=0) + trace[-1] / 2
    np.testing.assert_allclose(result.exposure.occupancy[0, :, 0], expected, rtol=1e-12)


# ------------------------------------------------------------------- homogeneous rate model

RATE_MODEL = scenario_text(
    horizon(10), start(well=0.7, sick=0.3), outcomes(discount_effects=0.035),
    state("well", utility=0.9), state("sick", utility=0.5), state("dead", absorbing=True),
    rate("well", "sick", 0.15), rate("well", "dead", 0.03),
    rate("sick", "well", 0.1), rate("sick", "dead", 0.25),
    event("flare", ["sick"], rate=0.4))
RATE_Q = np.array([[-0.18, 0.15, 0.03], [0.1, -0.35, 0.25], [0.0, 0.0, 0.0]])
RATE_START = np.array([0.7, 0.3, 0.0])


def test_rate_trace_equals_matrix_exponential():
    model = model_of(RATE_MODEL)
    times = np.linspace(0.0, 10.0, 41)
    result = analytic(model, times=times)
    assert result.exact and "exponential" in result.method
    # reference: scipy.linalg.expm, pi(t) = pi(0) exp(Q t)
    expected = np.array([RATE_START @ expm(RATE_Q * t) for t in times])
    np.testing.assert_allclose(result.trace[0], expected, rtol=0, atol=1e-9)


def test_rate_occupancy_and_event_counts_equal_quadrature():
    # reference: scipy.integrate.quad_vec of pi(0) exp(Q s) e^{-delta s}, delta = ln(1.035)
    model = model_of(RATE_MODEL)
    result = analytic(model)
    delta = math.log(1.035)
    undiscounted = integrate.quad_vec(lambda s: RATE_START @ expm(RATE_Q * s), 0, 10,
                                      epsabs=1e-13)[0]
    discounted = integrate.quad_vec(lambda s: RATE_START @ expm(RATE_Q * s) * math.exp(-delta * s),
                                    0, 10, epsabs=1e-13)[0]
    np.testing.assert_allclose(result.exposure.occupancy[0, :, 0], undiscounted, rtol=1e-9)
    np.testing.assert_allclose(result.exposure.occupancy[0, :, 2], discounted, rtol=1e-9)
    names = [r.name for r in model.risks]
    # expected occurrences = integral of pi_i(s) q_ij ds
    np.testing.assert_allclose(result.exposure.occurrences[0, names.index("flare"), 0],
                               0.4 * undiscounted[1], rtol=1e-9)
    np.testing.assert_allclose(result.exposure.occurrences[0, names.index("sick->dead"), 2],
                               0.25 * discounted[1], rtol=1e-9)


SURVIVAL_MODEL = scenario_text(
    horizon(30), start(alive=1), outcomes(discount_costs=0.05, discount_effects=0.035),
    state("alive", utility=0.85, cost=1000), state("dead", absorbing=True),
    rate("alive", "dead", 0.08))


def discounted_life(mu, d, horizon):
    """integral_0^T e^{-mu t} e^{-delta t} dt = (1 - e^{-(mu+delta) T}) / (mu + delta),
    delta = ln(1 + d): standard continuous discounting (common practice)."""
    k = mu + math.log1p(d)
    return (1 - math.exp(-k * horizon)) / k


@pytest.mark.parametrize("batch", [1, 2])  # 2 identical rows take the forward-equation path
def test_discounted_qalys_closed_form(batch):
    model = model_of(SURVIVAL_MODEL)
    mult = Multipliers(np.zeros((batch, 1)), np.zeros(1), None)
    result = analytic(model, mult=mult)
    values = outcome_values(model, result.exposure)
    tol = 1e-12 if batch == 1 else 1e-8
    for b in range(batch):
        np.testing.assert_allclose(values["qalys_discounted"][b],
                                   0.85 * discounted_life(0.08, 0.035, 30), rtol=tol)
        np.testing.assert_allclose(values["qalys"][b], 0.85 * discounted_life(0.08, 0.0, 30),
                                   rtol=tol)
        np.testing.assert_allclose(values["costs_discounted"][b],
                                   1000 * discounted_life(0.08, 0.05, 30), rtol=tol)
        np.testing.assert_allclose(values["life_years"][b], discounted_life(0.08, 0.0, 30),
                                   rtol=tol)


# ------------------------------------------------ time-varying hazards from time 0 (Markov)

def varying_model(hazard: dict, clock: str) -> str:
    return scenario_text(
        horizon(12), start(first=1),
        state("first"), state("second"), state("dead", absorbing=True),
        transition("first", "second", hazard=hazard, clock=clock),
        rate("first", "dead", 0.05), rate("second", "dead", 0.1))


WEIBULL = (dict(family="weibull", shape=1.7, scale=4),
           lambda t: (t / 4.0) ** 1.7, lambda t: 1.7 / 4.0 * (t / 4.0) ** 0.7)
GOMPERTZ = (dict(family="gompertz", rate=0.05, shape=0.2),
            lambda t: 0.05 * math.expm1(0.2 * t) / 0.2, lambda t: 0.05 * math.exp(0.2 * t))


@pytest.mark.parametrize("clock", ["since_start", "since_entry"])
@pytest.mark.parametrize("family", [WEIBULL, GOMPERTZ], ids=["weibull", "gompertz"])
def test_parametric_hazard_from_time_zero_matches_survival(family, clock):
    # 'first' is occupied only from time 0, so time since entry is time since start and the
    # model is Markov; survival in 'first' is exp(-H(t) - mu t) (competing risks, common
    # practice); 'second' is the convolution integral_0^t S1(s) h(s) e^{-0.1 (t - s)} ds
    text, cumulative, hazard = family
    model = model_of(varying_model(text, clock))
    times = np.linspace(0.0, 12.0, 25)
    result = analytic(model, times=times)
    assert result.exact and "forward equations" in result.method
    survival = np.array([math.exp(-cumulative(t) - 0.05 * t) for t in times])
    np.testing.assert_allclose(result.trace[0, :, 0], survival, rtol=0, atol=1e-7)
    second = [integrate.quad(lambda s: math.exp(-cumulative(s) - 0.05 * s) * hazard(s)
                             * math.exp(-0.1 * (t - s)), 0, t, epsabs=1e-12)[0] for t in times]
    np.testing.assert_allclose(result.trace[0, :, 1], second, rtol=0, atol=1e-7)


def test_forward_equations_on_a_grid_that_does_not_start_at_0_start_at_time_0():
    # edge: the grid [3, 12] still starts every patient at time 0 (same reference)
    text, cumulative, _ = WEIBULL
    result = analytic(model_of(varying_model(text, "since_start")), times=np.array([3.0, 12.0]))
    survival = [math.exp(-cumulative(t) - 0.05 * t) for t in (3.0, 12.0)]
    np.testing.assert_allclose(result.trace[0, :, 0], survival, rtol=0, atol=1e-7)


@pytest.mark.parametrize("family", [
    (dict(family="weibull", shape=0.7, scale=4), lambda t: (t / 4.0) ** 0.7),
    (dict(family="loglogistic", shape=0.8, scale=4), lambda t: math.log1p((t / 4.0) ** 0.8)),
], ids=["weibull", "loglogistic"])
def test_falling_hazard_from_time_zero_matches_survival(family):
    # a falling hazard (shape < 1) is infinite at 0 but its cumulative hazard is finite:
    # survival in 'first' is exp(-H(t) - 0.05 t) as for any other shape (common practice)
    text, cumulative = family
    model = model_of(varying_model(text, "since_start"))
    times = np.linspace(0.0, 12.0, 25)
    result = analytic(model, times=times)
    survival = np.array([math.exp(-cumulative(t) - 0.05 * t) for t in times])
    np.testing.assert_allclose(result.trace[0, :, 0], survival, rtol=0, atol=1e-7)


# ------------------------------------------------------------- life tables (step hazards)

def table_model(by: str, *more: str, start_age=None) -> str:
    """well <-> sick -> dead with well->sick a step table by time or by age."""
    steps = (table("steps", by=by, starts=[0, 2.5, 6], values=[0.1, 0.4, 0.05]) if by == "time"
             else table("steps", by=by, starts=[0, 60, 70, 80], values=[0.01, 0.03, 0.08, 0.2]))
    return scenario_text(
        horizon(20), start(age=start_age, well=1), outcomes(discount_effects=0.035),
        state("well", utility=1), state("sick", utility=0.5), state("dead", absorbing=True),
        rate("well", "sick", "steps"), rate("sick", "well", 0.3), rate("sick", "dead", 0.2),
        steps, *more)


def step_generator(rate):
    return np.array([[-rate, rate, 0.0], [0.3, -0.5, 0.2], [0.0, 0.0, 0.0]])


def piecewise_reference(t, edges, rates):
    """pi(t) by one scipy.linalg.expm per constant piece [edges[k], edges[k+1])."""
    pi, now = np.array([1.0, 0.0, 0.0]), 0.0
    for k, rate in enumerate(rates):
        step = min(t, edges[k + 1]) - now
        if step <= 0:
            break
        pi, now = pi @ expm(step_generator(rate) * step), now + step
    return pi


@pytest.mark.parametrize("by", ["time", "age"])
def test_step_hazard_matches_piecewise_exponentials(by):
    # a table by time (breaks at 2.5, 6), or by age for a cohort aged 63 (breaks at 7, 17)
    model = model_of(table_model(by, start_age=63 if by == "age" else None))
    edges, rates = (([0, 2.5, 6, np.inf], [0.1, 0.4, 0.05]) if by == "time"
                    else ([0, 7, 17, np.inf], [0.03, 0.08, 0.2]))
    times = np.linspace(0.0, 20.0, 41)
    result = analytic(model, times=times)
    assert result.exact and "exponential" in result.method
    expected = np.array([piecewise_reference(t, edges, rates) for t in times])
    np.testing.assert_allclose(result.trace[0], expected, rtol=0, atol=1e-12)
    # discounted QALYs: integral of (pi_well + 0.5 pi_sick) e^{-delta t} by scipy quadrature,
    # split at the breaks
    delta = math.log(1.035)
    pieces = [0.0] + [e for e in edges[1:-1]] + [20.0]
    qalys = sum(integrate.quad(lambda t: (piecewise_reference(t, edges, rates) @ [1, 0.5, 0])
                               * math.exp(-delta * t), a, b, epsabs=1e-12)[0]
                for a, b in zip(pieces, pieces[1:]))
    value = outcome_values(model, result.exposure)["qalys_discounted"][0]
    assert value == pytest.approx(qalys, rel=1e-9)


def test_life_table_by_age_per_patient_matches_piecewise_exponentials():
    # patients of different ages cross the table's bands at different times: the forward
    # equations per patient against each patient's own piecewise exponentials
    model = model_of(table_model(
        "age", population(6, attribute("age", "uniform", lower=50, upper=75))))
    people = draw_population(model.scenario.population, 2)
    times = np.linspace(0.0, 20.0, 21)
    result = analytic(model, patients=people, times=times)
    for b, age in enumerate(people.age):
        starts = np.array([0, 60, 70, 80]) - age
        inside = starts > 0
        edges = [0.0, *starts[inside], np.inf]
        rates = np.array([0.01, 0.03, 0.08, 0.2])[np.argmax(inside) - 1 if inside.any() else 3:]
        expected = np.array([piecewise_reference(t, edges, rates) for t in times])
        np.testing.assert_allclose(result.trace[b], expected, rtol=0, atol=1e-7)


# ---------------------------------------------------------- tunnel states (time in state)

TUNNEL_MODEL = scenario_text(
    horizon(25, cycle=1), start(healthy=1),
    state("healthy"), state("sick"), state("dead", absorbing=True),
    probability("healthy", "sick", 0.08), probability("healthy", "dead", 0.02),
    probability("healthy", "healthy", "remainder"),
    probability("sick", "dead", "die_by_stay"), probability("sick", "healthy", "recover_by_stay"),
    probability("sick", "sick", "remainder"),
    table("die_by_stay", by="time_in_state", starts=[0, 1, 2], values=[0.2, 0.1, 0.05]),
    table("recover_by_stay", by="time_in_state", starts=[0, 1, 2], values=[0.0, 0.1, 0.2]))
DIE = np.array([0.20, 0.10, 0.05])  # in the 1st, 2nd, 3rd+ cycle of a stay
RECOVER = np.array([0.00, 0.10, 0.20])


def tunnel_recursion(n_cycles):
    """Hand recursion that follows the sick by the cycle of their stay (1, 2, 3+)."""
    healthy, sick, dead = 1.0, np.zeros(3), 0.0
    rows = [(healthy, sick.sum(), dead)]
    for _ in range(n_cycles):
        stay = sick * (1 - DIE - RECOVER)
        healthy, sick, dead = (healthy * 0.90 + sick @ RECOVER,
                               np.array([healthy * 0.08, stay[0], stay[1] + stay[2]]),
                               dead + healthy * 0.02 + sick @ DIE)
        rows.append((healthy, sick.sum(), dead))
    return np.array(rows)


def test_tunnel_table_matches_recursion_and_tunnel_expansion():
    result = analytic(model_of(TUNNEL_MODEL))
    assert result.exact and "expanded" in result.method
    np.testing.assert_allclose(result.trace[0], tunnel_recursion(25), rtol=0, atol=1e-12)
    base = np.array([[0.90, 0.08, 0.02], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    chain = tunnel_expansion(base, {1: np.column_stack([RECOVER, 1 - DIE - RECOVER, DIE])})
    reference = chain.collapse(cohort_trace(chain.expand_start([1, 0, 0]), chain.matrices, 25))
    np.testing.assert_allclose(result.trace[0], reference, rtol=0, atol=1e-12)


# ---------------------------------------------------------------------- count memory

def count_model(kind: str) -> str:
    """well -> sick whose hazard is multiplied by 1, 1.5, 2 after 0, 1, 2+ earlier flares."""
    value = "probability" if kind == "cycle" else "rate"
    stays = ([probability("well", "well", "remainder"), probability("sick", "sick", "remainder")]
             if kind == "cycle" else [])
    return scenario_text(
        horizon(15, cycle=1), start(well=1),
        state("well"), state("sick"), state("dead", absorbing=True),
        transition("well", "sick", **{value: 0.1},
                   memory=[after("flare", multipliers=[1, 1.5, 2])]),
        transition("well", "dead", **{value: 0.02}), transition("sick", "dead", **{value: 0.2}),
        *stays, event("flare", ["well"], **{value: 0.3}))


MULTIPLIERS = (1.0, 1.5, 2.0)


def hand_count_chain():
    """Expanded per-cycle matrix over (state, flares 0/1/2+) built by hand: the move uses the
    count at the start of the cycle, on the rate scale p' = 1 - (1 - p)^m (Fleurence &
    Hollenbeak 2007, from memory); the flare happens independently with probability 0.3 and
    adds one (capped at 2) whatever the move. Order: well0..2, sick0..2, dead."""
    P = np.zeros((7, 7))
    flare = 0.3
    for c, m in enumerate(MULTIPLIERS):
        up = min(c + 1, 2)
        p_sick = 1 - (1 - 0.1) ** m
        moves = {c: 1 - p_sick - 0.02, 3 + c: p_sick, 6: 0.02}  # same count, no flare
        for target, p in moves.items():
            P[c, target] += p * (1 - flare)
            shifted = 6 if target == 6 else target - c + up
            P[c, shifted] += p * flare
        P[3 + c, 3 + c], P[3 + c, 6] = 0.8, 0.2
    P[6, 6] = 1.0
    collapse = np.zeros((7, 3))
    collapse[0:3, 0] = collapse[3:6, 1] = collapse[6, 2] = 1
    return P, collapse


def test_cycle_count_memory_matches_hand_built_chain():
    result = analytic(model_of(count_model("cycle")))
    assert result.exact and "expanded" in result.method
    P, collapse = hand_count_chain()
    start = np.eye(7)[0]
    np.testing.assert_allclose(result.trace[0], hand_recursion(start, P, 15) @ collapse,
                               rtol=0, atol=1e-12)


def test_cycle_count_memory_expected_flares():
    # expected flares = sum over cycles of the share in 'well' times 0.3 (hand chain)
    model = model_of(count_model("cycle"))
    result = analytic(model)
    P, collapse = hand_count_chain()
    trace = hand_recursion(np.eye(7)[0], P, 15) @ collapse
    flare = [r.name for r in model.risks].index("flare")
    np.testing.assert_allclose(result.exposure.occurrences[0, flare, 0], 0.3 * trace[:-1, 0].sum(),
                               rtol=1e-12)


def test_rate_count_memory_matches_counter_expansion():
    # reference: microsim.markov.counter_expansion of a hand-written generator per count,
    # then scipy.linalg.expm
    model = model_of(count_model("rate"))
    times = np.linspace(0, 15, 16)
    result = analytic(model, times=times)
    assert result.exact and "expanded" in result.method
    plain = np.zeros((3, 3, 3))
    counting = np.zeros((3, 3, 3))
    for c, m in enumerate(MULTIPLIERS):
        plain[c, 0, 1], plain[c, 0, 2], plain[c, 1, 2] = 0.1 * m, 0.02, 0.2
        counting[c, 0, 0] = 0.3  # the flare leaves the state unchanged and counts
        plain[c, 0, 0] = -(0.1 * m + 0.02 + 0.3)
        plain[c, 1, 1] = -0.2
    chain = counter_expansion(plain, counting, generator=True)
    start = chain.expand_start([1, 0, 0])
    expected = chain.collapse(np.array([start @ expm(chain.matrices * t) for t in times]))
    np.testing.assert_allclose(result.trace[0], expected, rtol=0, atol=1e-9)


# ---------------------------------------------------------------- covariate effects

COVARIATE_MODEL = scenario_text(
    horizon(10), start(well=1),
    state("well"), state("sick"), state("dead", absorbing=True),
    rate("well", "sick", 0.1, effects=[effect("smoker", 2.5)]),
    rate("well", "dead", 0.02),
    rate("sick", "dead", 0.3, effects=[effect("smoker", 1.5)]),
    population(40, attribute("smoker", "yesno", prevalence=0.4)))


def test_yes_no_hazard_ratio_per_patient_matches_expm():
    # proportional hazards (Cox 1972): exposed patients' rates are multiplied by the HR;
    # reference: scipy.linalg.expm of each patient's own generator
    model = model_of(COVARIATE_MODEL)
    people = draw_population(model.scenario.population, 11)
    assert 0 < people.smoker.sum() < len(people)
    times = np.linspace(0, 10, 11)
    result = analytic(model, patients=people, times=times)
    assert result.trace.shape == (40, 11, 3)
    for b, smoker in enumerate(people.smoker):
        hr_sick, hr_dead = (2.5, 1.5) if smoker else (1.0, 1.0)
        Q = np.array([[-(0.1 * hr_sick + 0.02), 0.1 * hr_sick, 0.02],
                      [0.0, -0.3 * hr_dead, 0.3 * hr_dead], [0.0, 0.0, 0.0]])
        expected = np.array([[1.0, 0.0, 0.0] @ expm(Q * t) for t in times])
        np.testing.assert_allclose(result.trace[b], expected, rtol=0, atol=1e-8)


# a continuous marker on two transitions: every patient has a generator of their own
MARKER_MODEL = scenario_text(
    horizon(12), start(well=1), outcomes(discount_costs=0.035, discount_effects=0.05),
    state("well"), state("sick"), state("dead", absorbing=True),
    rate("well", "sick", 0.1, effects=[effect("marker", 1.8, centre=1.0)]),
    rate("well", "dead", 0.02), rate("sick", "well", 0.05),
    rate("sick", "dead", 0.3, effects=[effect("marker", 1.5, centre=1.0)]),
    population(300, attribute("marker", "lognormal", meanlog=0.0, sdlog=0.6)))


def van_loan_by_scipy(Q: np.ndarray, delta: float, T: float) -> tuple[np.ndarray, np.ndarray]:
    """exp(Q T) and integral_0^T exp((Q - delta I) s) ds, one scipy.linalg.expm of Van
    Loan's block matrix over the whole horizon (Van Loan 1978)."""
    E = len(Q)
    block = np.zeros((2 * E, 2 * E))
    block[:E, :E], block[:E, E:] = Q - delta * np.eye(E), np.eye(E)
    return expm(Q * T), expm(block * T)[:E, E:]


def test_continuous_hazard_ratios_per_patient_match_expm_patient_by_patient():
    # proportional hazards (Cox 1972) with HR^(x - centre) per patient; reference:
    # scipy.linalg.expm of each patient's own generator and Van Loan block, one patient at
    # a time over the whole horizon (where the exact path steps along the grid, all
    # patients together)
    model = model_of(MARKER_MODEL)
    people = draw_population(model.scenario.population, 5)
    assert people.marker.nunique() == len(people)
    result = analytic(model, patients=people)
    deltas = np.log1p([0.0, 0.035, 0.05])
    to_death = model.risk_names.index("sick->dead")
    for b, x in enumerate(people.marker):
        onset, death = 0.1 * 1.8 ** (x - 1.0), 0.3 * 1.5 ** (x - 1.0)
        Q = np.array([[-(onset + 0.02), onset, 0.02], [0.05, -(0.05 + death), death],
                      [0.0, 0.0, 0.0]])
        for w, delta in enumerate(deltas):
            moved, time_in = van_loan_by_scipy(Q, delta, 12.0)
            occupancy = np.array([1.0, 0.0, 0.0]) @ time_in
            np.testing.assert_allclose(result.exposure.occupancy[b, :, w], occupancy, rtol=1e-10)
            # expected occurrences: the time in the source state times the rate
            np.testing.assert_allclose(result.exposure.occurrences[b, to_death, w],
                                       occupancy[1] * death, rtol=1e-10)
        np.testing.assert_allclose(result.trace[b, -1], moved[0], rtol=1e-10, atol=1e-15)


def test_patients_get_the_same_numbers_in_chunks_of_any_size(monkeypatch):
    # memory is bounded by marching a few rows at a time; no row depends on the others
    from microsim.cohort import exponentials
    model = model_of(MARKER_MODEL)
    people = draw_population(model.scenario.population, 5)
    whole = analytic(model, patients=people)
    monkeypatch.setattr(exponentials, "CHUNK", 7)
    chunked = analytic(model, patients=people)
    np.testing.assert_array_equal(chunked.trace, whole.trace)
    np.testing.assert_array_equal(chunked.exposure.occupancy, whole.exposure.occupancy)
    np.testing.assert_array_equal(chunked.exposure.occurrences, whole.exposure.occurrences)


@pytest.mark.parametrize("strategy", [None, "protein_lowering", "everyone_treated"])
def test_cycles_give_the_same_numbers_in_blocks_of_any_size(monkeypatch, strategy):
    # the bundled demo (a life table by attained age, attributes, treatment windows):
    # a cycle model's matrices are built for a block of cycles at once; one cycle per block
    # is the plain cycle-by-cycle product, and no cycle depends on its block
    from microsim.cohort import analytic as module
    from microsim.patients.treatment import patient_multipliers
    from microsim.scenario import read_scenario
    scenario = read_scenario(Path(__file__).parents[1] / "scenarios" / "lakemoor_kidney.toml")
    model = bind(scenario, strategy=strategy)
    mult = patient_multipliers(model, draw_population(scenario.population, 3).head(300), 4)
    whole = analytic(model, mult=mult)
    assert 1 < model.n_cycles <= module.BLOCK_ELEMENTS // (10 * 10 * 300)  # one block
    monkeypatch.setattr(module, "BLOCK_ELEMENTS", 1)
    single = analytic(model, mult=mult)
    np.testing.assert_allclose(single.trace, whole.trace, rtol=0, atol=1e-14)
    for part in ("occupancy", "occurrences", "on_treatment"):
        np.testing.assert_allclose(getattr(single.exposure, part),
                                   getattr(whole.exposure, part), rtol=1e-13, atol=1e-14)


def test_rate_trace_on_a_grid_that_does_not_start_at_0_is_still_from_time_0():
    # edge: the grid [3, 12] (or a single time) still starts every patient at time 0;
    # reference: scipy.linalg.expm, pi(t) = pi(0) exp(Q t)
    model = model_of(RATE_MODEL)
    for times in ([3.0, 10.0], [4.5]):
        result = analytic(model, times=np.array(times))
        expected = np.array([RATE_START @ expm(RATE_Q * t) for t in times])
        np.testing.assert_allclose(result.trace[0], expected, rtol=0, atol=1e-12)


def test_continuous_hazard_ratio_on_one_exit_gives_the_closed_form_life_expectancy():
    # one exit at rate r m, m = HR^(x - centre): the discounted time alive to the horizon
    # is (1 - exp(-(r m + delta) H)) / (r m + delta) (common practice), per patient
    text = scenario_text(
        horizon(40), start(well=1), outcomes(discount_effects=0.035),
        state("well"), state("dead", absorbing=True),
        rate("well", "dead", 0.04, effects=[effect("marker", 2.0, centre=1.0)]),
        population(200, attribute("marker", "uniform", lower=0.0, upper=6.0)))
    model = model_of(text)
    people = draw_population(model.scenario.population, 9)
    result = analytic(model, patients=people)
    rates = 0.04 * 2.0 ** (people.marker.to_numpy() - 1.0)  # 0.02 to 1.28 a year
    for w, delta in enumerate(np.log1p([0.0, 0.0, 0.035])):
        alive = -np.expm1(-(rates + delta) * 40.0) / (rates + delta)
        np.testing.assert_allclose(result.exposure.occupancy[:, 0, w], alive, rtol=1e-12)
        np.testing.assert_allclose(result.exposure.occurrences[:, 0, w], rates * alive,
                                   rtol=1e-12)


def test_continuous_attribute_on_probability_rate_scale():
    # a per-cycle probability p with an effect HR^(x - centre) becomes
    # 1 - (1 - p)^(HR^(x - centre)) (Fleurence & Hollenbeak 2007, from memory)
    text = cycle_model(population(5, attribute("marker", "uniform", lower=0, upper=3)),
                       onset_effects=[effect("marker", 1.8, centre=1.0)])
    model = model_of(text)
    people = draw_population(model.scenario.population, 3)
    result = analytic(model, patients=people)
    for b, x in enumerate(people.marker):
        p = 1 - 0.9 ** (1.8 ** (x - 1.0))
        P = CYCLE_P.copy()
        P[0] = [1 - p - 0.02, p, 0.02]
        np.testing.assert_allclose(result.trace[b], hand_recursion(CYCLE_START, P, 20),
                                   rtol=0, atol=1e-12)


def test_weibull_survival_over_a_long_horizon_follows_its_closed_form_for_every_patient():
    # Weibull onset with a covariate and a constant competing death rate over 100 years:
    # the share still well is exp(-m (t / scale)^shape - mu t) (closed form, common
    # practice). The solver once took steps of decades where the share had all but gone
    # and its interpolation fell below 0 by 3e-7; its steps are now at most a cycle.
    text = scenario_text(
        horizon(100), start(well=1.0), state("well"), state("ill"), state("dead", absorbing=True),
        transition("well", "ill", hazard=dict(family="weibull", shape=1.4, scale=4.0),
                   effects=[dict(attribute="severity", hazard_ratio=1.5, centre=1.0)]),
        rate("well", "dead", 0.01), rate("ill", "dead", 0.04),
        population(64, nested(name="severity", distribution="gamma", shape=4, scale=0.5)))
    scenario = parse_scenario(text)
    people = patients_for(scenario, 64, 1)
    result = analytic(bind(scenario), people)
    m = 1.5 ** (people.severity.to_numpy()[:, None] - 1.0)
    t = result.times[None, :]
    expected = np.exp(-m * (t / 4.0) ** 1.4 - 0.01 * t)
    np.testing.assert_allclose(result.trace[:, :, 0], expected, rtol=1e-6, atol=1e-9)
    assert result.trace.min() >= -1e-9
