"""Rate/probability conversions and cycle-length changes (Chhatwal et al. 2016)."""
import numpy as np
import pytest
import scipy.linalg

from microsim.markov import (NotATransitionMatrix, change_cycle, naive_probabilities,
                             probabilities_from_rates, probability_to_rate, project_to_simplex,
                             rate_matrix, rate_to_probability)


def test_rate_and_probability():
    # common practice: p = 1 - exp(-r t), r = -ln(1 - p) / t
    assert rate_to_probability(0.1, 5.0) == pytest.approx(1 - np.exp(-0.5), rel=1e-14)
    assert probability_to_rate(0.3, 2.0) == pytest.approx(-np.log(0.7) / 2, rel=1e-14)
    # common practice: a yearly probability p becomes 1 - (1 - p)^(1/12) per month
    monthly = rate_to_probability(probability_to_rate(0.2, 12.0), 1.0)
    assert monthly == pytest.approx(1 - 0.8 ** (1 / 12), rel=1e-13)
    with pytest.raises(ValueError):
        probability_to_rate(1.0, 1.0)


def test_exact_embedding_handles_competing_risks():
    a, b, cycle = 0.3, 0.2, 1.0
    generator = rate_matrix([[0, a, b], [0, 0, 0], [0, 0, 0]])
    exact = probabilities_from_rates(generator, cycle)
    # competing exponential risks (common practice): stay exp(-(a+b)c),
    # move to j with probability q_j / (a+b) (1 - exp(-(a+b)c))
    total = 1 - np.exp(-(a + b) * cycle)
    np.testing.assert_allclose(exact[0], [1 - total, a / (a + b) * total, b / (a + b) * total],
                               atol=1e-15)
    naive = naive_probabilities(generator, cycle)
    # the one-rate-at-a-time formula overstates each move when risks compete
    assert naive[0, 1] == pytest.approx(1 - np.exp(-a)) and naive[0, 1] > exact[0, 1]


def test_exact_embedding_two_state_with_recovery():
    a, b, c = 0.5, 0.2, 2.0
    matrix = probabilities_from_rates(rate_matrix([[0, a], [b, 0]]), c)
    # two-state chain (common textbook result): p_01(c) = a / (a+b) (1 - exp(-(a+b) c))
    decay = np.exp(-(a + b) * c)
    np.testing.assert_allclose(matrix, [[1 - a / (a + b) * (1 - decay), a / (a + b) * (1 - decay)],
                                        [b / (a + b) * (1 - decay), 1 - b / (a + b) * (1 - decay)]],
                               atol=1e-14)


ANNUAL_RATES = rate_matrix([[0, 0.15, 0.02], [0.05, 0, 0.10], [0, 0, 0]])


def test_monthly_root_reproduces_the_annual_matrix():
    annual = scipy.linalg.expm(ANNUAL_RATES)
    monthly = change_cycle(annual, 1 / 12)
    assert not monthly.regularised and monthly.max_adjustment < 1e-12
    # Chhatwal et al. 2016: the 1/12 root raised to the 12th power gives the annual matrix
    np.testing.assert_allclose(np.linalg.matrix_power(monthly.matrix, 12), annual, atol=1e-9)
    # reference library: scipy.linalg.expm of the monthly generator is the principal root
    np.testing.assert_allclose(monthly.matrix, scipy.linalg.expm(ANNUAL_RATES / 12), atol=1e-12)


def test_whole_factor_is_the_matrix_power():
    annual = scipy.linalg.expm(ANNUAL_RATES)
    # reference library: numpy.linalg.matrix_power
    np.testing.assert_allclose(change_cycle(annual, 5).matrix,
                               np.linalg.matrix_power(annual, 5), atol=1e-15)


# An annual matrix that rules out 0 -> 2 within a year while 0 -> 1 -> 2 is possible: its
# monthly root must have a negative 0 -> 2 entry (the problem Chhatwal et al. 2016 describe).
IMPOSSIBLE_ROOT = np.array([[0.5, 0.5, 0.0],
                            [0.0, 0.5, 0.5],
                            [0.0, 0.0, 1.0]])


def test_invalid_root_is_refused_with_its_worst_entry():
    worst = r"most negative entry is -\S+ at \[0, 2\]"
    with pytest.raises(NotATransitionMatrix, match=worst) as err:
        change_cycle(IMPOSSIBLE_ROOT, 1 / 12)
    assert err.value.rows == (0,) and err.value.at == (0, 2) and err.value.most_negative < 0
    root = scipy.linalg.fractional_matrix_power(IMPOSSIBLE_ROOT, 1 / 12)  # reference: scipy
    assert err.value.most_negative == pytest.approx(np.real(root[0, 2]), abs=1e-15)


def test_invalid_root_is_regularised_and_reported():
    result = change_cycle(IMPOSSIBLE_ROOT, 1 / 12, on_invalid="regularise")
    assert result.regularised and result.changed_rows == (0,)
    assert result.matrix.min() >= 0
    np.testing.assert_allclose(result.matrix.sum(axis=1), 1.0, atol=1e-15)
    root = np.real(scipy.linalg.fractional_matrix_power(IMPOSSIBLE_ROOT, 1 / 12))
    # projection of a row summing to 1 with one negative entry -e (KKT conditions of the
    # simplex projection, Held, Wolfe & Crowder 1974): that entry becomes 0, the others
    # fall by e / 2, so the largest change is e
    assert result.max_adjustment == pytest.approx(-root[0, 2], rel=1e-9)
    np.testing.assert_allclose(result.matrix[1:], root[1:], atol=1e-12)


def test_complex_root_is_refused():
    flip = np.array([[0.1, 0.9], [0.9, 0.1]])  # eigenvalue -0.8: no real principal root
    with pytest.raises(NotATransitionMatrix, match="complex") as err:
        change_cycle(flip, 0.5)
    assert err.value.imaginary > 0.1


def test_simplex_projection_satisfies_its_optimality_conditions():
    rng = np.random.default_rng(7)
    rows = rng.normal(0.2, 0.5, (50, 6))
    projected = project_to_simplex(rows)
    assert projected.min() >= 0
    np.testing.assert_allclose(projected.sum(axis=1), 1.0, atol=1e-12)
    # KKT (Held, Wolfe & Crowder 1974): x = max(u - theta, 0): u - x equals theta on the
    # support, and u <= theta off it
    for u, x in zip(rows, projected):
        theta = (u - x)[x > 0]
        np.testing.assert_allclose(theta, theta[0], atol=1e-12)
        assert np.all(u[x == 0] <= theta[0] + 1e-12)
