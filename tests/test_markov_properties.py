"""Property tests on random chains (hypothesis): invariants that hold for every valid input."""
import numpy as np
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from microsim.markov import (change_cycle, cohort_trace, counter_expansion,
                             probabilities_from_rates, project_to_simplex, rate_matrix,
                             split_counted, steady_state, tunnel_expansion)

SETTINGS = settings(max_examples=25, deadline=None)
sizes = st.integers(min_value=2, max_value=6)


@st.composite
def stochastic(draw, positive=False):
    size = draw(sizes)
    low = 0.01 if positive else 0.0
    weights = draw(arrays(float, (size, size), elements=st.floats(low, 1.0)))
    weights[np.arange(size), np.arange(size)] += 1e-3  # rows never all zero
    return weights / weights.sum(axis=1, keepdims=True)


@st.composite
def generators(draw):
    size = draw(sizes)
    rates = draw(arrays(float, (size, size), elements=st.floats(0.0, 5.0)))
    np.fill_diagonal(rates, 0.0)
    return rate_matrix(rates)


@SETTINGS
@given(stochastic(), st.integers(0, 40))
def test_traces_stay_distributions(matrix, n):
    start = np.full(len(matrix), 1 / len(matrix))
    trace = cohort_trace(start, matrix, n)
    assert trace.min() >= 0
    np.testing.assert_allclose(trace.sum(axis=1), 1.0, atol=1e-12)  # probability is conserved


@SETTINGS
@given(generators(), st.floats(0.01, 3.0))
def test_exponential_of_a_generator_is_stochastic(generator, cycle):
    # exp(Q t) of a generator is a transition matrix (common fact; scipy.linalg.expm)
    matrix = probabilities_from_rates(generator, cycle)
    assert matrix.min() >= -1e-12
    np.testing.assert_allclose(matrix.sum(axis=1), 1.0, atol=1e-9)


@SETTINGS
@given(stochastic(), st.integers(1, 6))
def test_whole_cycle_change_is_the_matrix_power(matrix, factor):
    # reference library: numpy.linalg.matrix_power
    np.testing.assert_allclose(change_cycle(matrix, factor).matrix,
                               np.linalg.matrix_power(matrix, factor), atol=1e-12)


@SETTINGS
@given(generators(), st.sampled_from([2, 4, 12]))
def test_root_of_an_embeddable_matrix_is_valid_and_reproduces_it(generator, parts):
    matrix = scipy.linalg.expm(generator * 0.2)  # near the identity: a valid principal root
    root = change_cycle(matrix, 1 / parts)
    assert not root.regularised
    # Chhatwal et al. 2016: the root raised to the power gives the original matrix back
    np.testing.assert_allclose(np.linalg.matrix_power(root.matrix, parts), matrix, atol=1e-9)


@SETTINGS
@given(stochastic(positive=True))
def test_steady_state_is_invariant(matrix):
    pi = steady_state(matrix)
    np.testing.assert_allclose(pi @ matrix, pi, atol=1e-12)  # definition: pi P = pi
    assert abs(pi.sum() - 1) < 1e-12 and pi.min() >= 0


@SETTINGS
@given(stochastic(), st.integers(1, 4), st.integers(0, 15))
def test_expansions_without_memory_effects_collapse_to_the_chain(matrix, copies, n):
    # lumpability (Kemeny & Snell 1960, ch. 6): when risks do not depend on the memory
    # level, summing the expanded trace over levels gives the original chain's trace
    size = len(matrix)
    start = np.full(size, 1 / size)
    original = cohort_trace(start, matrix, n)
    counted = np.zeros((size, size), dtype=bool)
    counted[0, :] = True
    counters = counter_expansion(*split_counted(np.broadcast_to(matrix, (copies, size, size)),
                                                counted))
    tunnels = tunnel_expansion(matrix, {0: np.tile(matrix[0], (copies, 1))})
    for chain in (counters, tunnels):
        trace = cohort_trace(chain.expand_start(start), chain.matrices, n)
        np.testing.assert_allclose(chain.collapse(trace), original, atol=1e-12)


@SETTINGS
@given(arrays(float, (4, 5), elements=st.floats(-2.0, 2.0)))
def test_projection_lands_on_the_simplex_and_fixes_its_points(rows):
    projected = project_to_simplex(rows)
    assert projected.min() >= 0
    np.testing.assert_allclose(projected.sum(axis=1), 1.0, atol=1e-12)
    # a projection is idempotent: points of the simplex stay where they are
    np.testing.assert_allclose(project_to_simplex(projected), projected, atol=1e-12)
