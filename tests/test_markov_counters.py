"""Counter expansion against binomial and Poisson counts and a hand-rolled recursion."""
import numpy as np
import pytest
import scipy.stats

from microsim.markov import (cohort_trace, counter_expansion, rate_matrix, split_counted,
                             transient, transition_counts)

CAP = 3


def flare_chain(die, flare):
    """Alive (0) / dead (1); a flare leaves the patient alive and adds one to the count.

    `die` is by count (CAP + 1,); `flare` is one probability or one per cycle (n,)."""
    lead = np.shape(flare) + (CAP + 1,)
    die = np.broadcast_to(die, lead)
    flare = np.asarray(flare, dtype=float)[..., None]
    plain = np.zeros(lead + (2, 2))
    counting = np.zeros(lead + (2, 2))
    plain[..., 0, 0] = (1 - die) * (1 - flare)
    plain[..., 0, 1] = die
    plain[..., 1, 1] = 1.0
    counting[..., 0, 0] = (1 - die) * flare
    return counter_expansion(plain, counting)


def test_discrete_counts_are_binomial():
    m, f, n = 0.05, 0.3, 10
    chain = flare_chain(m, f)
    trace = cohort_trace(chain.expand_start([1, 0]), chain.matrices, n)
    alive = trace[n, chain.origin == 0]  # by count 0..CAP
    # reference library: scipy.stats.binom; flares among survivors are Binomial(n, f)
    survive = (1 - m) ** n
    np.testing.assert_allclose(alive[:CAP], survive * scipy.stats.binom.pmf(range(CAP), n, f),
                               atol=1e-14)
    np.testing.assert_allclose(alive[CAP], survive * scipy.stats.binom.sf(CAP - 1, n, f),
                               atol=1e-14)
    np.testing.assert_allclose(chain.collapse(trace)[n], [survive, 1 - survive], atol=1e-14)


def test_count_dependent_and_time_varying_risks_match_recursion():
    m, hr, n = 0.05, 1.5, 15
    die = m * hr ** np.arange(CAP + 1)
    flares = np.linspace(0.1, 0.4, n)
    chain = flare_chain(die, flares)
    assert chain.matrices.shape == (n, 2 * (CAP + 1), 2 * (CAP + 1))
    trace = cohort_trace(chain.expand_start([1, 0]), chain.matrices, n)
    alive = np.zeros(CAP + 1)  # hand-rolled recursion over the alive by count
    alive[0] = 1.0
    for f in flares:
        survivors = alive * (1 - die)
        alive = survivors * (1 - f)
        alive[1:] += survivors[:-1] * f
        alive[CAP] += survivors[CAP] * f
    np.testing.assert_allclose(trace[n, chain.origin == 0], alive, atol=1e-14)


def test_continuous_counts_are_poisson():
    lam, mu, t = 0.4, 0.1, 6.0
    plain = np.zeros((CAP + 1, 2, 2))
    counting = np.zeros((CAP + 1, 2, 2))
    plain[:, 0, 0], plain[:, 0, 1] = -(lam + mu), mu
    counting[:, 0, 0] = lam  # the flare: rate lam, alive -> alive with one more count
    chain = counter_expansion(plain, counting, generator=True)
    np.testing.assert_allclose(chain.matrices.sum(axis=1), 0.0, atol=1e-15)
    shares = transient(chain.expand_start([1, 0]), chain.matrices, [t])[0]
    alive = shares[chain.origin == 0]
    # reference library: scipy.stats.poisson; flares while alive are Poisson(lam t)
    survive = np.exp(-mu * t)
    np.testing.assert_allclose(alive[:CAP], survive * scipy.stats.poisson.pmf(range(CAP), lam * t),
                               atol=1e-12)
    np.testing.assert_allclose(alive[CAP], survive * scipy.stats.poisson.sf(CAP - 1, lam * t),
                               atol=1e-12)


def test_counting_entries_into_a_state():
    # healthy (0) <-> sick (1), dead (2); count entries into sick with a cap above any
    # reachable count, so the mean count equals the expected number of moves (linearity)
    P = np.array([[0.85, 0.10, 0.05], [0.30, 0.60, 0.10], [0.0, 0.0, 1.0]])
    n = 6
    counted = np.zeros((3, 3), dtype=bool)
    counted[0, 1] = True
    plain, counting = split_counted(np.broadcast_to(P, (n + 1, 3, 3)), counted)
    chain = counter_expansion(plain, counting)
    np.testing.assert_allclose(chain.matrices.sum(axis=1), 1.0, atol=1e-15)
    trace = cohort_trace(chain.expand_start([1, 0, 0]), chain.matrices, n)
    original = cohort_trace([1, 0, 0], P, n)
    np.testing.assert_allclose(chain.collapse(trace), original, atol=1e-14)
    mean_count = trace[n] @ chain.level
    assert mean_count == pytest.approx(transition_counts(original, P)[:, 0, 1].sum(), rel=1e-12)
    assert chain.labels(["healthy", "sick", "dead"])[4] == "sick (count 1)"


def test_refuses_parts_that_do_not_add_up():
    plain = np.zeros((2, 2, 2))
    plain[:, :, 1] = 1.0
    with pytest.raises(ValueError, match="plain \\+ counting"):
        counter_expansion(plain, plain)
    with pytest.raises(ValueError, match=">= 0"):
        counter_expansion(plain * 2, -plain)
    with pytest.raises(ValueError, match="generator|rate matrix|sums"):
        counter_expansion(rate_matrix([[0, 1], [0, 0]])[None], np.ones((1, 2, 2)), generator=True)
