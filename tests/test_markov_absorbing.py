"""Absorbing chains against Grinstead & Snell's worked example and distribution facts."""
import numpy as np
import pytest

from microsim.markov import absorption, absorption_continuous, rate_matrix

# Drunkard's walk on 0..4 with absorbing ends, steps left/right with probability 1/2
# (Grinstead & Snell, "Introduction to Probability", ch. 11, from memory).
WALK = np.zeros((5, 5))
WALK[0, 0] = WALK[4, 4] = 1.0
for i in (1, 2, 3):
    WALK[i, i - 1] = WALK[i, i + 1] = 0.5


def test_drunkards_walk():
    result = absorption(WALK)
    assert list(result.transient) == [1, 2, 3] and list(result.absorbing) == [0, 4]
    # Grinstead & Snell ch. 11 (from memory): N, t = N1 = (3, 4, 3), B = NR
    np.testing.assert_allclose(result.fundamental,
                               [[1.5, 1, 0.5], [1, 2, 1], [0.5, 1, 1.5]], atol=1e-12)
    np.testing.assert_allclose(result.expected_time, [3, 4, 3], atol=1e-12)
    np.testing.assert_allclose(result.probabilities,
                               [[0.75, 0.25], [0.5, 0.5], [0.25, 0.75]], atol=1e-12)


def test_variance_matches_tail_sums():
    result = absorption(WALK)
    among = WALK[1:4, 1:4]
    # tail-sum identities (common fact): P(T > n) = (Q^n 1)_i,
    # E[T] = sum_n P(T > n), E[T^2] = sum_n (2n + 1) P(T > n)
    tails = np.array([np.linalg.matrix_power(among, n).sum(axis=1) for n in range(400)])
    mean = tails.sum(axis=0)
    second = ((2 * np.arange(400) + 1)[:, None] * tails).sum(axis=0)
    np.testing.assert_allclose(result.expected_time, mean, atol=1e-9)
    np.testing.assert_allclose(result.time_variance, second - mean**2, atol=1e-9)


def test_geometric_life_expectancy_counts_the_starting_cycle():
    p = 0.1
    result = absorption([[1 - p, p], [0, 1]])
    # geometric distribution on {1, 2, ...} (common fact): mean 1/p, variance (1-p)/p^2
    np.testing.assert_allclose(result.expected_time, [1 / p], rtol=1e-12)
    np.testing.assert_allclose(result.time_variance, [(1 - p) / p**2], rtol=1e-12)


def test_absorption_probabilities_are_the_limit_of_powers():
    chain = np.array([[0.7, 0.2, 0.05, 0.05],
                      [0.1, 0.6, 0.1, 0.2],
                      [0.0, 0.0, 1.0, 0.0],
                      [0.0, 0.0, 0.0, 1.0]])
    result = absorption(chain)
    # reference library: numpy.linalg.matrix_power, B = lim P^n restricted to T x A
    np.testing.assert_allclose(result.probabilities,
                               np.linalg.matrix_power(chain, 2000)[:2, 2:], atol=1e-12)
    start = np.array([0.5, 0.3, 0.2, 0.0])
    np.testing.assert_allclose(result.probabilities_from(start),
                               start @ np.linalg.matrix_power(chain, 2000)[:, 2:], atol=1e-12)
    assert result.expected_time_from(start) == pytest.approx(start[:2] @ result.expected_time)


def test_continuous_exponential_and_erlang():
    lam = 0.25
    one = absorption_continuous(rate_matrix([[0, lam], [0, 0]]))
    # exponential distribution (common fact): mean 1/lambda, variance 1/lambda^2
    np.testing.assert_allclose(one.expected_time, [1 / lam], rtol=1e-12)
    np.testing.assert_allclose(one.time_variance, [1 / lam**2], rtol=1e-12)
    two = absorption_continuous(rate_matrix([[0, lam, 0], [0, 0, lam], [0, 0, 0]]))
    # Erlang-2 (gamma, shape 2) from the first stage (common fact): mean 2/lambda, var 2/lambda^2
    np.testing.assert_allclose(two.expected_time[0], 2 / lam, rtol=1e-12)
    np.testing.assert_allclose(two.time_variance[0], 2 / lam**2, rtol=1e-12)


def test_continuous_competing_risks():
    a, b = 0.3, 0.1
    result = absorption_continuous(rate_matrix([[0, a, b], [0, 0, 0], [0, 0, 0]]))
    # competing exponential risks (common fact): P(first is a) = a / (a + b), mean 1 / (a + b)
    np.testing.assert_allclose(result.probabilities, [[a / (a + b), b / (a + b)]], atol=1e-15)
    np.testing.assert_allclose(result.expected_time, [1 / (a + b)], rtol=1e-12)


def test_refuses_chains_where_some_states_are_never_absorbed():
    trapped = np.array([[0.5, 0.5, 0.0], [0.5, 0.5, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(ValueError, match=r"\{well, sick\} form a closed class"):
        absorption(trapped, names=["well", "sick", "dead"])
    with pytest.raises(ValueError, match="no absorbing state"):
        absorption([[0.5, 0.5], [0.5, 0.5]])
