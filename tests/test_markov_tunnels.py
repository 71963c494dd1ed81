"""Tunnel-state expansion against a hand-rolled recursion over durations and a closed form."""
import numpy as np
import pytest

from microsim.markov import absorption, cohort_trace, tunnel_expansion

# healthy (0), sick (1), dead (2); sick's risks depend on the cycle of the stay, 1..3+
HEALTHY = [0.90, 0.08, 0.02]
DIE = np.array([0.20, 0.10, 0.05])
RECOVER = np.array([0.00, 0.10, 0.20])
STAY = 1 - DIE - RECOVER
SICK_ROWS = np.column_stack([RECOVER, STAY, DIE])
BASE = np.array([HEALTHY, [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])  # sick's row is replaced


def recursion(n_cycles, die=DIE, recover=RECOVER):
    """Hand-rolled cohort recursion that tracks the sick by cycle of their stay."""
    healthy, sick, dead = 1.0, np.zeros(3), 0.0
    rows = [(healthy, *sick, dead)]
    for k in range(n_cycles):
        d, r = (die[k], recover[k]) if die.ndim == 2 else (die, recover)
        stay = sick * (1 - d - r)
        next_sick = np.array([healthy * HEALTHY[1], stay[0], stay[1] + stay[2]])
        healthy, dead = healthy * HEALTHY[0] + sick @ r, dead + healthy * HEALTHY[2] + sick @ d
        sick = next_sick
        rows.append((healthy, *sick, dead))
    return np.array(rows)


def test_matches_recursion_over_durations():
    chain = tunnel_expansion(BASE, {1: SICK_ROWS})
    trace = cohort_trace(chain.expand_start([1, 0, 0]), chain.matrices, 30)
    expected = recursion(30)
    np.testing.assert_allclose(trace, expected, atol=1e-13)
    np.testing.assert_allclose(chain.collapse(trace),
                               np.column_stack([expected[:, 0], expected[:, 1:4].sum(axis=1),
                                                expected[:, 4]]), atol=1e-13)
    assert chain.labels(["healthy", "sick", "dead"]) == [
        "healthy", "sick (cycle in state 1)", "sick (cycle in state 2)",
        "sick (cycle in state 3+)", "dead"]


def test_time_varying_rows_match_recursion():
    n = 12
    scale = np.linspace(1.0, 2.0, n)[:, None]
    die, recover = DIE * scale, RECOVER * scale
    rows = np.stack([np.column_stack([r, 1 - d - r, d]) for d, r in zip(die, recover)])
    chain = tunnel_expansion(BASE, {1: rows})
    assert chain.matrices.shape == (n, 5, 5)
    trace = cohort_trace(chain.expand_start([1, 0, 0]), chain.matrices, n)
    np.testing.assert_allclose(trace, recursion(n, die, recover), atol=1e-13)


def test_expected_stay_closed_form():
    # a stay ended only by death with duration-dependent stay probabilities s1, s2, s3 (+):
    # E[cycles in state] = sum_n P(stay > n) = 1 + s1 + s1 s2 / (1 - s3) (geometric tail)
    s = np.array([0.7, 0.8, 0.9])
    rows = np.column_stack([np.zeros(3), s, 1 - s])
    chain = tunnel_expansion([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]], {1: rows})
    result = absorption(chain.matrices)
    entry = list(result.transient).index(chain.entry[1])
    assert result.expected_time[entry] == pytest.approx(1 + s[0] + s[0] * s[1] / (1 - s[2]),
                                                        rel=1e-12)


def test_moves_between_two_tunnel_states_enter_the_first_tunnel():
    rows_a = [[0.5, 0.5], [0.2, 0.8]]  # a: stays 0.5 then 0.2
    rows_b = [[0.4, 0.6], [0.9, 0.1], [0.3, 0.7]]
    chain = tunnel_expansion(np.eye(2), {0: rows_a, 1: rows_b})
    assert list(chain.origin) == [0, 0, 1, 1, 1] and list(chain.entry) == [0, 2]
    np.testing.assert_allclose(chain.matrices.sum(axis=1), 1.0, atol=1e-15)
    # from a's second cycle: stay -> a's capped tunnel, move -> b's first tunnel
    np.testing.assert_allclose(chain.matrices[1], [0, 0.2, 0.8, 0, 0], atol=1e-15)
    np.testing.assert_allclose(chain.matrices[4], [0.3, 0, 0, 0, 0.7], atol=1e-15)


def test_refuses_bad_rows():
    with pytest.raises(ValueError, match="sums to"):
        tunnel_expansion(BASE, {1: SICK_ROWS * 0.9})
    with pytest.raises(ValueError, match="not in"):
        tunnel_expansion(BASE, {3: SICK_ROWS})
