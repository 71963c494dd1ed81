"""The stacked exponential and its integral (`microsim.cohort.uniformised`) against outside
references: scipy.linalg.expm of Van Loan's block matrix, one matrix at a time (reference
library; Van Loan 1978), and the closed forms of a two-state chain with one exit rate r and
discount rate delta (common practice, worked by hand):

    exp(A h) = [[e^{-(r + delta) h}, e^{-delta h} (1 - e^{-r h})], [0, e^{-delta h}]],
    integral_0^h of the first row = [(1 - e^{-(r + delta) h}) / (r + delta),
                                     (1 - e^{-delta h}) / delta - (1 - e^{-(r + delta) h}) / (r + delta)].

Both methods scale and square, and a relative error e before the s squarings grows to
about 2^s e, with 2^s below ||A h||_inf: so each comparison allows ROUNDING (a few dozen
units of the double precision 2^-53, for products of 6 x 6 matrices) times max(1, ||A h||),
of the norm of the block it checks.
"""
import numpy as np
import pytest
import scipy.linalg

from microsim.cohort.uniformised import exponential_and_integral

ROUNDING = 20 * 2.0 ** -53


def random_generators(rng, count: int, size: int, scale: float) -> np.ndarray:
    """Generators with rates spread over six orders of magnitude, one absorbing state."""
    rates = scale * 10.0 ** rng.uniform(-6, 0, (count, size, size))
    rates *= rng.random((count, size, size)) < 0.6  # sparse, as models are
    rates[:, -1] = 0.0
    rates[:, np.arange(size), np.arange(size)] = 0.0
    return rates - np.eye(size) * rates.sum(axis=2)[:, :, None]


def by_scipy(A: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray]:
    """exp([[A, I], [0, 0]] h) = [[exp(A h), integral_0^h exp(A u) du], [0, I]]."""
    E = len(A)
    block = np.zeros((2 * E, 2 * E))
    block[:E, :E], block[:E, E:] = A, np.eye(E)
    moved = scipy.linalg.expm(block * h)
    return moved[:E, :E], moved[:E, E:]


@pytest.mark.parametrize("scale, delta", [(0.01, 0.0), (1.0, 0.03), (40.0, 0.0), (900.0, 0.5)])
def test_every_matrix_of_the_stack_equals_scipy_expm_of_the_van_loan_block(scale, delta):
    rng = np.random.default_rng(7)
    size = 6
    Q = random_generators(rng, 50, size, scale)
    h = rng.uniform(0.0, 2.0, 50)
    h[:3] = [0.0, 1e-9, 2.0]  # an empty step, a tiny one, the longest
    A = Q - delta * np.eye(size)
    F, G = exponential_and_integral(A, h)
    for u in range(len(h)):
        expected_F, expected_G = by_scipy(A[u], h[u])
        tolerance = ROUNDING * max(1.0, np.abs(A[u] * h[u]).sum(axis=1).max())
        np.testing.assert_allclose(F[u], expected_F, rtol=0,
                                   atol=tolerance * max(1.0, np.abs(expected_F).max()))
        np.testing.assert_allclose(G[u], expected_G, rtol=0,
                                   atol=tolerance * max(h[u], np.abs(expected_G).max()))
    assert (F >= 0).all() and (G >= 0).all()  # sums of non-negative terms only


@pytest.mark.parametrize("r", [1e-8, 0.07, 3.0, 250.0])
@pytest.mark.parametrize("delta", [0.0, 0.034])
def test_two_state_chain_equals_its_closed_form(r, delta):
    h = np.array([0.25, 1.0, 10.0])
    A = np.broadcast_to(np.array([[-r - delta, r], [0.0, -delta]]), (3, 2, 2))
    F, G = exponential_and_integral(A, h)
    tolerance = ROUNDING * np.maximum(1.0, 2 * (r + delta) * h)  # ||A h||_inf
    stay, keep = np.exp(-(r + delta) * h), np.exp(-delta * h)
    alive = -np.expm1(-(r + delta) * h) / (r + delta)
    ever = -np.expm1(-delta * h) / delta if delta else h
    for got, expected, norm in ((F[:, 0, 0], stay, 1.0), (F[:, 0, 1], keep * -np.expm1(-r * h), 1.0),
                                (F[:, 1, 1], keep, 1.0), (G[:, 0, 0], alive, h),
                                (G[:, 0, 1], ever - alive, h), (G[:, 1, 1], ever, h)):
        np.testing.assert_array_less(np.abs(got - expected), tolerance * norm)
    # no cancellation: entries far below the norm keep their relative accuracy too (the
    # closed form of the dead column, a difference, has none to compare with)
    for got, expected in ((F[:, 0, 0], stay), (F[:, 0, 1], keep * -np.expm1(-r * h)),
                          (F[:, 1, 1], keep), (G[:, 0, 0], alive), (G[:, 1, 1], ever)):
        np.testing.assert_allclose(got, expected, rtol=tolerance.max(), atol=1e-300)
    assert (F[:, 1, 0] == 0).all() and (G[:, 1, 0] == 0).all()  # nothing comes back to life


def test_a_stack_of_one_kind_gives_each_matrix_the_same_numbers_as_alone():
    # matrices needing different numbers of squarings, side by side
    rng = np.random.default_rng(3)
    Q = random_generators(rng, 5, 4, 1.0) * np.array([1e-3, 1.0, 30.0, 500.0, 0.0])[:, None, None]
    h = np.full(5, 1.5)
    F, G = exponential_and_integral(Q, h)
    for u in range(5):
        alone = exponential_and_integral(Q[u:u + 1], h[u:u + 1])
        np.testing.assert_array_equal(F[u], alone[0][0])
        np.testing.assert_array_equal(G[u], alone[1][0])


def test_refuses_a_matrix_with_a_negative_rate():
    A = np.array([[[-0.1, -0.2], [0.0, 0.0]]])
    with pytest.raises(ValueError, match="non-negative off-diagonal"):
        exponential_and_integral(A, np.array([1.0]))
