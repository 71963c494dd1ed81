"""Steady states against numpy/scipy eigen-solvers; reducible and periodic chains refused."""
import numpy as np
import pytest
import scipy.linalg

from microsim.markov import (NoUniqueSteadyState, closed_classes, communicating_classes,
                             period, rate_matrix, steady_state, steady_state_continuous)

P = np.array([[0.5, 0.3, 0.2, 0.0],
              [0.1, 0.6, 0.1, 0.2],
              [0.2, 0.2, 0.5, 0.1],
              [0.3, 0.0, 0.3, 0.4]])


def left_eigenvector(matrix):
    """Reference: numpy.linalg.eig on P^T, the eigenvector of eigenvalue 1, normalised."""
    values, vectors = np.linalg.eig(matrix.T)
    vector = np.real(vectors[:, np.argmin(np.abs(values - 1))])
    return vector / vector.sum()


def test_matches_left_eigenvector():
    pi = steady_state(P)
    np.testing.assert_allclose(pi, left_eigenvector(P), atol=1e-12)  # reference: numpy eig
    # aperiodic irreducible chains converge: rows of P^n tend to pi (Grinstead & Snell ch. 11)
    np.testing.assert_allclose(np.linalg.matrix_power(P, 200), np.tile(pi, (4, 1)), atol=1e-12)


def test_transient_states_get_zero_share():
    chain = np.array([[0.5, 0.5, 0.0],
                      [0.0, 0.3, 0.7],
                      [0.0, 0.6, 0.4]])
    pi = steady_state(chain)
    assert pi[0] == 0.0
    np.testing.assert_allclose(pi, left_eigenvector(chain), atol=1e-12)  # reference: numpy eig


def test_reducible_chain_names_its_closed_classes():
    chain = np.array([[0.6, 0.2, 0.2],
                      [0.0, 1.0, 0.0],
                      [0.0, 0.0, 1.0]])
    listed = r"2 closed classes \(\{dead\}, \{cured\}\)"
    with pytest.raises(NoUniqueSteadyState, match=listed) as err:
        steady_state(chain, names=["sick", "dead", "cured"])
    assert err.value.reason == "reducible"
    assert [list(c) for c in err.value.classes] == [[1], [2]]


def test_periodic_chain_is_refused_but_offers_the_stationary_vector():
    flip = np.array([[0.0, 1.0], [1.0, 0.0]])
    with pytest.raises(NoUniqueSteadyState, match="period 2") as err:
        steady_state(flip)
    assert err.value.reason == "periodic" and err.value.period == 2
    # the stationary vector of a two-state flip is (1/2, 1/2) (common textbook example)
    np.testing.assert_allclose(err.value.stationary, [0.5, 0.5], atol=1e-15)
    np.testing.assert_allclose(steady_state(flip, periodic_ok=True), [0.5, 0.5], atol=1e-15)


def test_period_by_breadth_first_levels():
    cycle3 = np.roll(np.eye(3), 1, axis=1)  # 0 -> 1 -> 2 -> 0: period 3 (by definition)
    assert period(cycle3, [0, 1, 2]) == 3
    # a bipartite walk 0-1-2-3-0 returns only in even steps: period 2
    walk = np.array([[0, .5, 0, .5], [.5, 0, .5, 0], [0, .5, 0, .5], [.5, 0, .5, 0]])
    assert period(walk, [0, 1, 2, 3]) == 2
    lazy = 0.5 * walk + 0.5 * np.eye(4)  # a self-loop makes the class aperiodic
    assert period(lazy, [0, 1, 2, 3]) == 1
    # returns to 0 in 2 or 3 steps only: gcd(2, 3) = 1
    mixed = np.array([[0, 1, 0], [0.5, 0, 0.5], [1, 0, 0]])
    assert period(mixed, [0, 1, 2]) == 1


def test_classes_and_closed_classes():
    chain = np.array([[0.5, 0.5, 0.0, 0.0],
                      [0.5, 0.4, 0.1, 0.0],
                      [0.0, 0.0, 0.5, 0.5],
                      [0.0, 0.0, 0.5, 0.5]])
    assert sorted(map(list, communicating_classes(chain))) == [[0, 1], [2, 3]]
    assert [list(c) for c in closed_classes(chain)] == [[2, 3]]


def test_continuous_steady_state():
    a, b = 0.4, 0.1
    # two-state chain, common textbook result: pi = (b, a) / (a + b)
    np.testing.assert_allclose(steady_state_continuous(rate_matrix([[0, a], [b, 0]])),
                               [b / (a + b), a / (a + b)], atol=1e-15)
    generator = rate_matrix([[0, 1.0, 0.5], [0.2, 0, 0.3], [0.7, 0.1, 0]])
    null = scipy.linalg.null_space(generator.T)[:, 0]  # reference: scipy null space of Q^T
    np.testing.assert_allclose(steady_state_continuous(generator), null / null.sum(), atol=1e-12)
    with pytest.raises(NoUniqueSteadyState, match="closed classes"):
        steady_state_continuous(rate_matrix([[0, 1, 1], [0, 0, 0], [0, 0, 0]]))
