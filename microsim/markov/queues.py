"""Steady states of classic queues in closed form: what a capacity simulation must reproduce.

Each function returns the long-run figures a simulated service is compared with: the
probability that an arriving patient waits, the mean wait before service, the mean number
waiting, the utilisation of the servers (mean busy servers / servers) and, for a finite
waiting room, the probability of being turned away. Arrivals are Poisson at `rate`, so by
PASTA (Wolff 1982, "Poisson arrivals see time averages", Operations Research 30:223-231) an
arriving patient sees the time-average state of the system.

Sources (from memory): Erlang (1917), "Solution of some problems in the theory of
probabilities of significance in automatic telephone exchanges"; Gross, Shortle, Thompson &
Harris (2008), "Fundamentals of Queueing Theory", 4th ed., ch. 2 (M/M/1, M/M/c, M/M/c/K)
and ch. 5 (M/G/1, the Pollaczek-Khinchine formula: Pollaczek 1930, Khinchine 1932); Little
(1961), "A proof for the queuing formula: L = lambda W", Operations Research 9:383-387.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

ERLANG = "Erlang 1917; Gross, Shortle, Thompson & Harris 2008, ch. 2"
POLLACZEK_KHINCHINE = "Pollaczek 1930, Khinchine 1932; Gross, Shortle, Thompson & Harris 2008, ch. 5"
LITTLE = "Little 1961, 'A proof for the queuing formula: L = lambda W'"


@dataclass(frozen=True)
class SteadyState:
    """Long-run figures of a queue; waits in the time unit of the rates."""
    model: str  # "M/M/1", "M/M/3", "M/M/3/10", "M/G/1"
    source: str
    p_wait: float  # an arriving patient (among those let in) finds every server busy
    mean_wait: float  # mean time from arrival to the start of service, over those let in
    mean_queue: float  # time-average number waiting
    utilisation: float  # time-average busy servers / servers
    p_blocked: float = 0.0  # an arriving patient finds the waiting room full


def little_queue_length(rate: float, mean_wait: float) -> float:
    """L = lambda W (Little 1961): the mean number in any stable system is the rate at which
    it is entered times the mean time spent in it."""
    return rate * mean_wait


def offered_load(rate: float, service_rate: float) -> float:
    """a = lambda / mu, the mean number of servers the arrivals would keep busy."""
    if rate < 0 or service_rate <= 0:
        raise ValueError(f"need rate >= 0 and service_rate > 0, got {rate}, {service_rate}")
    return rate / service_rate


def erlang_b(servers: int, load: float) -> float:
    """Erlang's loss formula B(c, a), by the stable recursion B(k) = a B(k-1) / (k + a B(k-1))
    (Erlang 1917), which never forms a^c / c! itself."""
    b = 1.0
    for k in range(1, servers + 1):
        b = load * b / (k + load * b)
    return b


def erlang_c(servers: int, load: float) -> float:
    """Erlang's delay formula C(c, a) = c B / (c - a (1 - B)): the probability that an arrival
    waits in M/M/c (Erlang 1917); needs a < c."""
    b = erlang_b(servers, load)
    return servers * b / (servers - load * (1.0 - b))


def stable(rate: float, mean_service: float, servers: int) -> bool:
    """A queue with unlimited room settles only when rho = lambda E[S] / c < 1."""
    return rate * mean_service < servers


def _check_stable(rate: float, mean_service: float, servers: int) -> None:
    if not stable(rate, mean_service, servers):
        raise ValueError(f"no steady state: rho = {rate * mean_service / servers:g} >= 1")


def mmc(rate: float, service_rate: float, servers: int = 1) -> SteadyState:
    """M/M/c: P(wait) = C(c, a), Wq = C / (c mu - lambda), Lq = lambda Wq, utilisation a / c
    (Gross et al. 2008, section 2.3; M/M/1 is c = 1: P(wait) = rho, Wq = rho / (mu - lambda))."""
    load = offered_load(rate, service_rate)
    _check_stable(rate, 1.0 / service_rate, servers)
    p_wait = erlang_c(servers, load) if rate > 0 else 0.0
    mean_wait = p_wait / (servers * service_rate - rate)
    return SteadyState(f"M/M/{servers}", ERLANG, p_wait, mean_wait,
                       little_queue_length(rate, mean_wait), load / servers)


def mmck(rate: float, service_rate: float, servers: int, system_limit: int) -> SteadyState:
    """M/M/c/K: at most K patients in the system (c in service, K - c waiting); arrivals who
    find K are turned away. The birth-death chain has p_n proportional to a^n / n! for n <= c
    and a^n / (c! c^(n-c)) above (Gross et al. 2008, section 2.5), formed here in logs so
    that large K and loads cannot overflow; K = c is Erlang's loss system."""
    if system_limit < servers:
        raise ValueError(f"system_limit {system_limit} is below servers {servers}")
    load = offered_load(rate, service_rate)
    n = np.arange(system_limit + 1)
    if rate == 0:
        p = (n == 0).astype(float)
    else:
        steps = np.log(load) - np.log(np.minimum(n[1:], servers))  # p_n / p_(n-1)
        log_terms = np.concatenate([[0.0], np.cumsum(steps)])
        p = np.exp(log_terms - log_terms.max())
        p /= p.sum()
    blocked = float(p[-1])
    admitted = 1.0 - blocked
    mean_queue = float(np.sum(np.maximum(n - servers, 0) * p))
    waiting = float(p[servers:system_limit].sum())
    p_wait = waiting / admitted if admitted > 0 else 0.0
    mean_wait = mean_queue / (rate * admitted) if rate > 0 else 0.0
    busy = float(np.sum(np.minimum(n, servers) * p))
    return SteadyState(f"M/M/{servers}/{system_limit}", ERLANG, p_wait, mean_wait, mean_queue,
                       busy / servers, blocked)


def mg1(rate: float, mean_service: float, second_moment: float) -> SteadyState:
    """M/G/1 by the Pollaczek-Khinchine formula Wq = lambda E[S^2] / (2 (1 - rho)), with
    rho = lambda E[S] the utilisation and the probability of waiting (Gross et al. 2008,
    section 5.1.1); any service distribution with a finite second moment."""
    if mean_service <= 0 or second_moment < mean_service ** 2 * (1 - 1e-12):
        raise ValueError(f"E[S] = {mean_service}, E[S^2] = {second_moment} are not moments "
                         "of a service time")
    _check_stable(rate, mean_service, 1)
    rho = rate * mean_service
    mean_wait = rate * second_moment / (2.0 * (1.0 - rho))
    return SteadyState("M/G/1", POLLACZEK_KHINCHINE, rho, mean_wait,
                       little_queue_length(rate, mean_wait), rho)


def service_moments(survival, upper: float = math.inf) -> tuple[float, float]:
    """E[S] and E[S^2] of a service time from its survival function: the integrals of S(t)
    and of 2 t S(t) over [0, upper) (integration by parts), by adaptive quadrature
    (QUADPACK: Piessens et al. 1983)."""
    from scipy import integrate
    first = integrate.quad(survival, 0.0, upper, limit=200)[0]
    second = integrate.quad(lambda t: 2.0 * t * survival(t), 0.0, upper, limit=200)[0]
    return first, second
