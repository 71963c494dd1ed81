"""The closed-form queues (microsim.markov.queues) against references outside the module.

References: a birth-death generator solved with numpy.linalg (the stationary distribution of
M/M/c and M/M/c/K, truncated far in the tail); scipy.stats.poisson for Erlang's loss formula
(B = P(N = c) / P(N <= c) for N Poisson with mean a, Erlang 1917, from memory); hand-worked
numbers (M/M/1 with lambda = 1, mu = 2: Lq = Wq = 0.5; Erlang C(3, 2) = 4/9, both from
memory); the M/D/1 wait rho / (2 mu (1 - rho)) (Gross, Shortle, Thompson & Harris 2008,
ch. 5, from memory); scipy.special.gamma for Weibull moments.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from microsim.markov import queues


def birth_death(rate: float, service_rate: float, servers: int, limit: int) -> np.ndarray:
    """Stationary distribution of the M/M/c/limit generator, solved with numpy."""
    size = limit + 1
    q = np.zeros((size, size))
    for n in range(size):
        if n < limit:
            q[n, n + 1] = rate
        if n > 0:
            q[n, n - 1] = min(n, servers) * service_rate
        q[n, n] = -q[n].sum()
    a = q.T.copy()
    a[-1] = 1.0  # pi Q = 0 with one balance equation replaced by sum(pi) = 1
    b = np.zeros(size)
    b[-1] = 1.0
    return np.linalg.solve(a, b)


def figures(p: np.ndarray, rate: float, servers: int) -> dict:
    n = np.arange(len(p))
    admitted = 1 - p[-1]
    queue = float(np.sum(np.maximum(n - servers, 0) * p))
    return {"p_wait": float(p[servers:-1].sum() / admitted), "mean_queue": queue,
            "mean_wait": queue / (rate * admitted),
            "utilisation": float(np.sum(np.minimum(n, servers) * p) / servers),
            "p_blocked": float(p[-1])}


@pytest.mark.parametrize("rate, service_rate, servers", [(0.5, 1.0, 1), (1.0, 2.0, 1),
                                                          (2.0, 1.0, 3), (7.2, 1.0, 8),
                                                          (0.3, 0.05, 10)])
def test_mmc_matches_the_birth_death_chain(rate, service_rate, servers):
    exact = queues.mmc(rate, service_rate, servers)
    chain = figures(birth_death(rate, service_rate, servers, 600), rate, servers)
    for name, value in chain.items():
        assert getattr(exact, name) == pytest.approx(value, rel=1e-7, abs=1e-12), name


@pytest.mark.parametrize("rate, service_rate, servers, limit", [(2.0, 1.0, 3, 3), (2.0, 1.0, 3, 7),
                                                                 (5.0, 1.0, 2, 12), (0.4, 1.0, 1, 2)])
def test_mmck_matches_the_birth_death_chain(rate, service_rate, servers, limit):
    exact = queues.mmck(rate, service_rate, servers, limit)
    chain = figures(birth_death(rate, service_rate, servers, limit), rate, servers)
    for name, value in chain.items():
        assert getattr(exact, name) == pytest.approx(value, rel=1e-9, abs=1e-12), name


def test_hand_worked_numbers():
    one = queues.mmc(1.0, 2.0, 1)  # rho = 1/2
    assert (one.p_wait, one.mean_wait, one.mean_queue) == pytest.approx((0.5, 0.5, 0.5))
    assert queues.erlang_c(3, 2.0) == pytest.approx(4 / 9)


@pytest.mark.parametrize("servers, load", [(1, 0.5), (3, 2.0), (10, 12.0), (50, 45.0)])
def test_erlang_b_is_the_truncated_poisson(servers, load):
    reference = stats.poisson.pmf(servers, load) / stats.poisson.cdf(servers, load)
    assert queues.erlang_b(servers, load) == pytest.approx(reference, rel=1e-10)
    assert queues.mmck(load, 1.0, servers, servers).p_blocked == pytest.approx(reference, rel=1e-10)


def test_a_large_waiting_room_becomes_mmc():
    assert queues.mmck(2.0, 1.0, 3, 400).mean_wait == pytest.approx(queues.mmc(2.0, 1.0, 3).mean_wait,
                                                                     rel=1e-12)


def test_mg1_with_exponential_service_is_mm1_and_deterministic_is_md1():
    rate, mu = 0.7, 1.0
    assert queues.mg1(rate, 1 / mu, 2 / mu**2).mean_wait == pytest.approx(queues.mmc(rate, mu).mean_wait)
    rho = rate / mu
    assert queues.mg1(rate, 1 / mu, 1 / mu**2).mean_wait == pytest.approx(rho / (2 * mu * (1 - rho)))


def test_service_moments_of_a_weibull_survival():
    shape, scale = 2.0, 3.0
    first, second = queues.service_moments(lambda t: math.exp(-(t / scale) ** shape))
    assert first == pytest.approx(scale * special.gamma(1 + 1 / shape), rel=1e-9)
    assert second == pytest.approx(scale**2 * special.gamma(1 + 2 / shape), rel=1e-9)


@pytest.mark.parametrize("build", [lambda: queues.mmc(1.0, 1.0, 1), lambda: queues.mmc(3.0, 1.0, 3),
                                   lambda: queues.mg1(2.0, 0.5, 1.0)])
def test_no_steady_state_at_full_load(build):
    with pytest.raises(ValueError, match="no steady state"):
        build()


def test_no_arrivals_means_no_waiting():
    empty = queues.mmc(0.0, 1.0, 2)
    assert (empty.p_wait, empty.mean_wait, empty.utilisation) == (0.0, 0.0, 0.0)
    assert queues.mmck(0.0, 1.0, 2, 4).p_blocked == 0.0


def test_littles_law_holds_inside_every_formula():
    for state, rate in ((queues.mmc(2.0, 1.0, 3), 2.0), (queues.mg1(0.5, 1.0, 3.0), 0.5),
                        (queues.mmck(5.0, 1.0, 2, 6), 5.0)):
        admitted = rate * (1 - state.p_blocked)
        assert state.mean_queue == pytest.approx(queues.little_queue_length(admitted, state.mean_wait))
