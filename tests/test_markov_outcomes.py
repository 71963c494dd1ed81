"""Discrete expected outcomes: within-cycle corrections (Elbasha & Chhatwal 2016) and discounting.

Test case: alive/dead with a constant death rate mu, so the alive share at t is exactly
exp(-mu t) at every cycle point, and the discounted integrand is f(t) = u exp(-lambda t)
with lambda = mu + ln(1 + d).
"""
import numpy as np
import pytest

from microsim.markov import (cohort_trace, cycle_weights, expected_value, one_off_value,
                             state_time, transition_counts, transition_value)

MU, D, CYCLE, N, U = 0.1, 0.035, 1.0, 20, 0.8
SURVIVE = np.exp(-MU * CYCLE)
P = np.array([[SURVIVE, 1 - SURVIVE], [0.0, 1.0]])
TRACE = cohort_trace([1.0, 0.0], P, N)
VALUES = np.array([U, 0.0])
LAMBDA = MU + np.log1p(D)
RHO = np.exp(-LAMBDA * CYCLE)  # ratio of successive integrand values
T = N * CYCLE
EXACT = U * (1 - np.exp(-LAMBDA * T)) / LAMBDA  # integral of u exp(-lambda t) on [0, T]


def value(correction):
    return expected_value(TRACE, VALUES, CYCLE, D, correction=correction)


def test_trapezoidal_rule():
    # composite trapezoid rule on a geometric sequence (summed by hand):
    # c (1 + rho) / 2 (1 - rho^n) / (1 - rho)
    closed = U * CYCLE * (1 + RHO) / 2 * (1 - RHO**N) / (1 - RHO)
    assert value("trapezoidal") == pytest.approx(closed, rel=1e-12)
    # trapezoid error bound (standard numerical analysis): T c^2 max|f''| / 12, f'' <= u lambda^2
    assert 0 < value("trapezoidal") - EXACT <= T * CYCLE**2 * U * LAMBDA**2 / 12


def test_simpson_rule():
    # Simpson's 1/3 rule on a geometric sequence: c/3 (1 + 4 rho + rho^2) (1 - rho^n) / (1 - rho^2)
    closed = U * CYCLE / 3 * (1 + 4 * RHO + RHO**2) * (1 - RHO**N) / (1 - RHO**2)
    assert value("simpson") == pytest.approx(closed, rel=1e-12)
    # Simpson error bound (standard numerical analysis): T c^4 max|f''''| / 180
    assert abs(value("simpson") - EXACT) <= T * CYCLE**4 * U * LAMBDA**4 / 180
    assert abs(value("simpson") - EXACT) < abs(value("trapezoidal") - EXACT) / 100


def test_simpson_refuses_an_odd_number_of_cycles():
    with pytest.raises(ValueError, match="even number of cycles, got 19"):
        expected_value(TRACE[:20], VALUES, CYCLE, D, correction="simpson")


def test_none_counts_each_cycle_at_its_start():
    # left Riemann sum (start-of-cycle counting): c (1 - rho^n) / (1 - rho); overstates a
    # decreasing integrand (Elbasha & Chhatwal 2016)
    closed = U * CYCLE * (1 - RHO**N) / (1 - RHO)
    assert value("none") == pytest.approx(closed, rel=1e-12)
    assert value("none") > EXACT


def test_half_cycle_and_trapezoid_differ_only_at_the_horizon():
    # the traditional half-cycle correction removes half of the first cycle; unlike the
    # trapezoid it adds nothing for the last half cycle (Elbasha & Chhatwal 2016)
    last = U * TRACE[-1, 0] * (1 + D) ** -T * CYCLE
    assert value("half-cycle") == pytest.approx(value("trapezoidal") - last / 2, rel=1e-12)
    assert value("half-cycle") == pytest.approx(value("none") - U * CYCLE / 2, rel=1e-12)
    # a cohort that is all dead by the horizon: the two corrections agree
    stack = np.stack([P] * (N - 1) + [np.array([[0.0, 1.0], [0.0, 1.0]])])
    ended = cohort_trace([1.0, 0.0], stack, N)
    assert expected_value(ended, VALUES, CYCLE, D, correction="half-cycle") == pytest.approx(
        expected_value(ended, VALUES, CYCLE, D, correction="trapezoidal"), rel=1e-12)


def test_discounting_everyone_alive_is_an_annuity_due():
    alive = np.ones((11, 1))
    v = 1 / (1 + D)
    # annuity-due (common practice): sum_{k<n} v^k = (1 - v^n) / (1 - v)
    assert expected_value(alive, [1.0], 1.0, D, correction="none") == pytest.approx(
        (1 - v**10) / (1 - v), rel=1e-12)
    # half-year cycles: weights are c v^(k c)
    np.testing.assert_allclose(cycle_weights(4, 0.5, D, correction="none"),
                               0.5 * v ** (0.5 * np.arange(5)) * [1, 1, 1, 1, 0], rtol=1e-14)


def test_state_time_and_time_varying_values():
    times = state_time(TRACE, CYCLE, D, correction="trapezoidal")
    assert times @ VALUES == pytest.approx(value("trapezoidal"), rel=1e-14)
    # values that change by cycle (e.g. by age): doubling the utility from cycle 10 on adds the
    # trapezoid contribution of cycles 10..20 again, by linearity of the rule
    varying = np.tile(VALUES, (N + 1, 1))
    varying[10:] *= 2
    weights = cycle_weights(N, CYCLE, D, correction="trapezoidal")
    assert expected_value(TRACE, varying, CYCLE, D, correction="trapezoidal") == pytest.approx(
        value("trapezoidal") + U * weights[10:] @ TRACE[10:, 0], rel=1e-12)


def test_transition_counts_conserve_the_cohort():
    counts = transition_counts(TRACE, P)
    np.testing.assert_allclose(counts.sum(axis=2), TRACE[:-1], atol=1e-15)
    # everyone who died during the horizon died exactly once (conservation, common fact)
    assert counts[:, 0, 1].sum() == pytest.approx(TRACE[-1, 1] - TRACE[0, 1], rel=1e-12)


def test_transition_cost_paid_at_the_end_of_the_cycle():
    cost = 1000.0
    one_off = np.array([[0.0, cost], [0.0, 0.0]])
    v = (1 + D) ** -CYCLE
    # deaths in cycle k: exp(-mu k c) (1 - exp(-mu c)), discounted at (k + 1) c; geometric sum
    closed = cost * (1 - SURVIVE) * v * (1 - (SURVIVE * v) ** N) / (1 - SURVIVE * v)
    assert transition_value(TRACE, P, one_off, CYCLE, D) == pytest.approx(closed, rel=1e-12)
    assert one_off_value(TRACE, [cost * (1 - SURVIVE), 0.0], CYCLE, D) == pytest.approx(
        closed, rel=1e-12)


def test_refuses_unknown_correction():
    with pytest.raises(ValueError, match="correction must be one of"):
        value("midpoint")
