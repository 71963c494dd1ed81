"""The stacked exponential and its discounted integrals (`microsim.cohort.uniformised`)
against outside references: scipy.linalg.expm of Van Loan's block matrix, one matrix and
one discount rate at a time (reference library; Van Loan 1978), and the closed forms of a
two-state chain with one exit rate r and discount rate delta (common practice, worked by
hand):

    exp(Q h) = [[e^{-r h}, 1 - e^{-r h}], [0, 1]],
    integral_0^h e^{-delta u} exp(Q u) du, first row =
        [(1 - e^{-(r + delta) h}) / (r + delta),
         (1 - e^{-delta h}) / delta - (1 - e^{-(r + delta) h}) / (r + delta)].

Both methods scale and square, and a relative error e before the s squarings grows to
about 2^s e, with 2^s below ||Q h||_inf: so each comparison allows ROUNDING (a few dozen
units of the double precision 2^-53, for products of 6 x 6 matrices) times
max(1, ||Q h||), of the norm of the block it checks.
"""
import numpy as np
import pytest
import scipy.linalg

from microsim.cohort.uniformised import exponential_and_integrals

ROUNDING = 20 * 2.0 ** -53
DELTAS = (0.0, 0.034, 0.5)


def random_generators(rng, count: int, size: int, scale: float) -> np.ndarray:
    """Generators with rates spread over six orders of magnitude, one absorbing state."""
    rates = scale * 10.0 ** rng.uniform(-6, 0, (count, size, size))
    rates *= rng.random((count, size, size)) < 0.6  # sparse, as models are
    rates[:, -1] = 0.0
    rates[:, np.arange(size), np.arange(size)] = 0.0
    return rates - np.eye(size) * rates.sum(axis=2)[:, :, None]


def van_loan_by_scipy(Q: np.ndarray, delta: float, h: float) -> np.ndarray:
    """The top right block of exp([[Q - delta I, I], [0, 0]] h)."""
    E = len(Q)
    block = np.zeros((2 * E, 2 * E))
    block[:E, :E], block[:E, E:] = Q - delta * np.eye(E), np.eye(E)
    return scipy.linalg.expm(block * h)[:E, E:]


def test_every_matrix_of_the_stack_equals_scipy_expm_of_the_van_loan_block():
    rng = np.random.default_rng(7)
    size = 6
    # rates up to 0.01 ... 900 per unit of time: from no squaring to a dozen
    Q = np.concatenate([random_generators(rng, 8, size, scale) for scale in (0.01, 1.0, 40.0, 900.0)])
    h = rng.uniform(0.0, 2.0, len(Q))
    h[:3] = [0.0, 1e-9, 2.0]  # an empty step, a tiny one, the longest
    F, G = exponential_and_integrals(Q, h, DELTAS)
    for u in range(len(h)):
        tolerance = ROUNDING * max(1.0, np.abs(Q[u] * h[u]).sum(axis=1).max() + DELTAS[-1] * h[u])
        expected_F = scipy.linalg.expm(Q[u] * h[u])
        np.testing.assert_allclose(F[u], expected_F, rtol=0,
                                   atol=tolerance * max(1.0, np.abs(expected_F).max()))
        for delta, G_delta in zip(DELTAS, G):
            expected_G = van_loan_by_scipy(Q[u], delta, h[u])
            np.testing.assert_allclose(G_delta[u], expected_G, rtol=0,
                                       atol=tolerance * max(h[u], np.abs(expected_G).max()))
    assert (F >= 0).all() and all((G_delta >= 0).all() for G_delta in G)  # no cancellation
    np.testing.assert_array_equal(F[0], np.eye(size))  # the empty step
    assert all((G_delta[0] == 0).all() for G_delta in G)


@pytest.mark.parametrize("r", [1e-8, 0.07, 3.0, 250.0])
def test_two_state_chain_equals_its_closed_form(r):
    h = np.array([0.25, 1.0, 10.0])
    Q = np.broadcast_to(np.array([[-r, r], [0.0, 0.0]]), (3, 2, 2))
    F, G = exponential_and_integrals(Q, h, DELTAS)
    tolerance = ROUNDING * np.maximum(1.0, 2 * r * h + DELTAS[-1] * h)  # ||Q h||_inf
    expected_F = ((F[:, 0, 0], np.exp(-r * h)), (F[:, 0, 1], -np.expm1(-r * h)),
                  (F[:, 1, 1], np.ones(3)))
    for got, expected in expected_F:
        np.testing.assert_array_less(np.abs(got - expected), tolerance)
        # no cancellation: small entries keep their relative accuracy too
        np.testing.assert_allclose(got, expected, rtol=tolerance.max(), atol=1e-300)
    for delta, G_delta in zip(DELTAS, G):
        alive = -np.expm1(-(r + delta) * h) / (r + delta)
        ever = -np.expm1(-delta * h) / delta if delta else h
        np.testing.assert_array_less(np.abs(G_delta[:, 0, 1] - (ever - alive)), tolerance * h)
        for got, expected in ((G_delta[:, 0, 0], alive), (G_delta[:, 1, 1], ever)):
            np.testing.assert_array_less(np.abs(got - expected), tolerance * h)
            np.testing.assert_allclose(got, expected, rtol=tolerance.max())
        assert (G_delta[:, 1, 0] == 0).all()  # nothing comes back to life
    assert (F[:, 1, 0] == 0).all()


def test_each_matrix_gets_the_same_numbers_in_any_stack():
    # matrices needing different numbers of terms and squarings, side by side
    rng = np.random.default_rng(3)
    Q = random_generators(rng, 5, 4, 1.0) * np.array([1e-3, 1.0, 30.0, 500.0, 0.0])[:, None, None]
    h = np.full(5, 1.5)
    F, G = exponential_and_integrals(Q, h, DELTAS)
    for u in range(5):
        alone_F, alone_G = exponential_and_integrals(Q[u:u + 1], h[u:u + 1], DELTAS)
        np.testing.assert_array_equal(F[u], alone_F[0])
        for G_delta, alone in zip(G, alone_G):
            np.testing.assert_array_equal(G_delta[u], alone[0])


def test_refuses_a_negative_rate_or_discount_rate():
    with pytest.raises(ValueError, match="non-negative rates"):
        exponential_and_integrals(np.array([[[-0.1, -0.2], [0.0, 0.0]]]), np.array([1.0]), (0.0,))
    with pytest.raises(ValueError, match="non-negative rates"):
        exponential_and_integrals(np.array([[[-0.1, 0.1], [0.0, 0.0]]]), np.array([1.0]), (-0.1,))
