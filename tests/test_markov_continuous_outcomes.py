"""Continuous-time expected outcomes by Van Loan's block exponential, against closed forms
and scipy.integrate.quad."""
import numpy as np
import pytest
import scipy.integrate
import scipy.linalg

from microsim.markov import (absorption_continuous, continuous_transition_value,
                             continuous_value, occupancy, rate_matrix)

MU, D, U = 0.05, 0.035, 0.75
DELTA = np.log1p(D)
DEATH = rate_matrix([[0, MU], [0, 0]])


def test_constant_death_rate_closed_forms():
    # expected discounted QALYs with constant death rate mu and discount rate delta (common
    # practice): u / (mu + delta) over an infinite horizon, u (1 - e^{-(mu+delta) T}) / (mu+delta)
    assert continuous_value([1, 0], DEATH, [0, np.inf], [U, 0], D) == pytest.approx(
        U / (MU + DELTA), rel=1e-12)
    T = 30.0
    assert continuous_value([1, 0], DEATH, [0, T], [U, 0], D) == pytest.approx(
        U * (1 - np.exp(-(MU + DELTA) * T)) / (MU + DELTA), rel=1e-12)


ILLNESS = rate_matrix([[0, 0.08, 0.01], [0.02, 0, 0.15], [0, 0, 0]])
START = np.array([0.9, 0.1, 0.0])
VALUES = np.array([0.9, 0.6, 0.0])


def quad(function, upper, points=None):
    """Reference: scipy.integrate.quad with tight tolerances."""
    return scipy.integrate.quad(function, 0, upper, points=points, epsabs=1e-13,
                                epsrel=1e-12, limit=200)[0]


def test_illness_death_against_quadrature():
    T = 25.0
    exact = quad(lambda t: START @ scipy.linalg.expm(ILLNESS * t) @ VALUES * np.exp(-DELTA * t), T)
    assert continuous_value(START, ILLNESS, [0, T], VALUES, D) == pytest.approx(exact, rel=1e-9)


def test_piecewise_generators_against_quadrature():
    later = rate_matrix([[0, 0.12, 0.03], [0.01, 0, 0.25], [0, 0, 0]])
    b, T = 10.0, 25.0
    at_b = START @ scipy.linalg.expm(ILLNESS * b)

    def share(t):
        if t < b:
            return START @ scipy.linalg.expm(ILLNESS * t)
        return at_b @ scipy.linalg.expm(later * (t - b))

    exact = quad(lambda t: share(t) @ VALUES * np.exp(-DELTA * t), T, points=[b])
    result = continuous_value(START, np.stack([ILLNESS, later]), [0, b, T], VALUES, D)
    assert result == pytest.approx(exact, rel=1e-9)


def test_piecewise_death_rate_with_infinite_last_piece():
    mu1, mu2, b = 0.02, 0.2, 15.0
    stack = np.stack([rate_matrix([[0, mu1], [0, 0]]), rate_matrix([[0, mu2], [0, 0]])])
    # closed form: (1 - e^{-(mu1+delta) b}) / (mu1+delta) + e^{-(mu1+delta) b} / (mu2+delta)
    first, second = mu1 + DELTA, mu2 + DELTA
    closed = (1 - np.exp(-first * b)) / first + np.exp(-first * b) / second
    assert continuous_value([1, 0], stack, [0, b, np.inf], [1, 0], D) == pytest.approx(
        closed, rel=1e-12)


def test_one_off_death_cost():
    cost, T = 5000.0, 40.0
    # integral of e^{-mu t} mu C e^{-delta t} on [0, T] (closed form)
    closed = MU * cost * (1 - np.exp(-(MU + DELTA) * T)) / (MU + DELTA)
    one_off = np.array([[0, cost], [0, 0]])
    assert continuous_transition_value([1, 0], DEATH, [0, T], one_off, D) == pytest.approx(
        closed, rel=1e-12)


def test_undiscounted_occupancy_tends_to_the_fundamental_matrix():
    # Kemeny & Snell / Neuts: expected time in each transient state is N = (-Q_TT)^-1
    long_run = occupancy([1, 0, 0], ILLNESS, [0, 2000.0])[0]
    np.testing.assert_allclose(long_run[:2], absorption_continuous(ILLNESS).fundamental[0],
                               rtol=1e-9)


def test_sparse_path_agrees_with_dense_path():
    # reference library: scipy.sparse.linalg.expm_multiply against scipy.linalg.expm
    dense = occupancy(START, ILLNESS, [0, 12.0], D)
    sparse = occupancy(START, ILLNESS, [0, 12.0], D, dense_limit=1)
    np.testing.assert_allclose(sparse, dense, rtol=1e-10)


def test_infinite_horizon_needs_discounting():
    with pytest.raises(ValueError, match="discount rate > 0"):
        occupancy([1, 0], DEATH, [0, np.inf])
