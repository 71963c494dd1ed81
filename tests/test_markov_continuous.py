"""Generators and transient distributions against scipy.linalg.expm and closed forms."""
import numpy as np
import pytest
import scipy.linalg

from microsim.markov import rate_matrix, transient, transient_piecewise

RATES = np.array([[0.0, 0.20, 0.05],
                  [0.30, 0.0, 0.10],
                  [0.0, 0.0, 0.0]])
Q = rate_matrix(RATES)
START = np.array([0.7, 0.3, 0.0])


def test_rate_matrix_diagonal_is_minus_row_sums():
    np.testing.assert_allclose(Q.sum(axis=1), 0.0, atol=1e-15)
    np.testing.assert_array_equal(Q - np.diag(np.diag(Q)), RATES)
    with pytest.raises(ValueError, match="diagonal"):
        rate_matrix(RATES + np.eye(3))


def test_transient_matches_scipy_expm():
    times = np.array([0.0, 0.5, 1.0, 1.5, 4.0, 10.0])
    result = transient(START, Q, times)
    for row, t in zip(result, times):
        # reference library: scipy.linalg.expm, pi(t) = pi(0) exp(Q t)
        np.testing.assert_allclose(row, START @ scipy.linalg.expm(Q * t), atol=1e-12)


def test_two_state_closed_form():
    a, b = 0.4, 0.1
    times = np.linspace(0, 20, 41)
    result = transient([1.0, 0.0], rate_matrix([[0, a], [b, 0]]), times)
    # two-state chain, common textbook result: p_01(t) = a/(a+b) (1 - exp(-(a+b) t))
    np.testing.assert_allclose(result[:, 1], a / (a + b) * (1 - np.exp(-(a + b) * times)),
                               atol=1e-12)


def test_large_chain_uses_sparse_action_and_agrees_with_dense():
    size = 210  # just above DENSE_LIMIT
    rates = np.zeros((size, size))
    idx = np.arange(size - 1)
    rates[idx, idx + 1], rates[idx + 1, idx] = 0.8, 0.3
    generator = rate_matrix(rates)
    start = np.zeros(size)
    start[0] = 1.0
    times = [0.0, 2.0, 7.5]
    sparse = transient(start, generator, times)  # S > 200: expm_multiply path
    dense = transient(start, generator, times, dense_limit=size)
    for row, t in zip(sparse, times):
        # reference library: scipy.linalg.expm on the full matrix
        np.testing.assert_allclose(row, start @ scipy.linalg.expm(generator * t), atol=1e-9)
    np.testing.assert_allclose(sparse, dense, atol=1e-9)


def test_piecewise_is_the_product_of_exponentials():
    later = rate_matrix(RATES * np.array([[0, 2, 3], [1, 0, 2], [0, 0, 0]]))
    times = [0.0, 1.0, 2.0, 3.5, 6.0]
    result = transient_piecewise(START, np.stack([Q, later]), [0.0, 2.0, np.inf], times)
    at_break = START @ scipy.linalg.expm(Q * 2.0)
    # reference library: scipy.linalg.expm, pi(t) = pi(0) exp(Q1 b) exp(Q2 (t - b)) for t > b
    np.testing.assert_allclose(result[1], START @ scipy.linalg.expm(Q * 1.0), atol=1e-12)
    np.testing.assert_allclose(result[2], at_break, atol=1e-12)
    np.testing.assert_allclose(result[3], at_break @ scipy.linalg.expm(later * 1.5), atol=1e-12)
    np.testing.assert_allclose(result[4], at_break @ scipy.linalg.expm(later * 4.0), atol=1e-12)


def test_refuses_bad_times_and_breaks():
    with pytest.raises(ValueError, match="within"):
        transient_piecewise(START, Q, [0.0, 5.0], [1.0, 6.0])
    with pytest.raises(ValueError, match="sorted"):
        transient(START, Q, [2.0, 1.0])
    with pytest.raises(ValueError, match="breaks"):
        transient_piecewise(START, np.stack([Q, Q]), [0.0, 1.0], [0.5])
