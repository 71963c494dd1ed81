"""Discrete cohort traces and n-step matrices against numpy and textbook closed forms."""
import numpy as np
import pytest

from microsim.markov import cohort_trace, n_step

P = np.array([[0.80, 0.15, 0.04, 0.01],
              [0.10, 0.70, 0.15, 0.05],
              [0.00, 0.05, 0.75, 0.20],
              [0.00, 0.00, 0.00, 1.00]])
START = np.array([0.6, 0.3, 0.1, 0.0])


def test_trace_matches_matrix_powers():
    trace = cohort_trace(START, P, 30)
    for n in (0, 1, 7, 30):
        # reference library: numpy.linalg.matrix_power, pi(n) = pi(0) P^n
        np.testing.assert_allclose(trace[n], START @ np.linalg.matrix_power(P, n), atol=1e-12)


def test_time_varying_trace_is_the_ordered_product():
    rng = np.random.default_rng(1)
    stack = rng.uniform(0.1, 1.0, (5, 4, 4))
    stack /= stack.sum(axis=2, keepdims=True)
    trace = cohort_trace(START, stack, 5)
    # reference library: numpy.linalg.multi_dot, pi(5) = pi(0) P(0) P(1) ... P(4)
    np.testing.assert_allclose(trace[5], np.linalg.multi_dot([START, *stack]), atol=1e-12)
    # a longer stack (e.g. indexed by attained age) is read from its start
    np.testing.assert_allclose(cohort_trace(START, stack, 3), trace[:4], atol=1e-15)


def test_two_state_power_closed_form():
    a, b = 0.3, 0.1
    two = np.array([[1 - a, a], [b, 1 - b]])
    for n in (1, 4, 25):
        # textbook two-state chain (e.g. Grinstead & Snell, ch. 11; from memory):
        # P^n = [[b, a], [b, a]] / (a+b) + (1-a-b)^n [[a, -a], [-b, b]] / (a+b)
        expected = (np.array([[b, a], [b, a]])
                    + (1 - a - b) ** n * np.array([[a, -a], [-b, b]])) / (a + b)
        np.testing.assert_allclose(n_step(two, n), expected, atol=1e-12)


def test_refuses_matrices_that_are_not_stochastic():
    with pytest.raises(ValueError, match="sums to"):
        cohort_trace(START, P * 0.9, 3)
    bad = P.copy()
    bad[0, :2] = [1.1, -0.15]
    with pytest.raises(ValueError, match="negative probability"):
        cohort_trace(START, bad, 3)
    with pytest.raises(ValueError, match="2 matrices given for 3 cycles"):
        cohort_trace(START, np.stack([P, P]), 3)
    with pytest.raises(ValueError, match="start"):
        cohort_trace(START[:3], P, 3)
