"""The common face of every hazard family, and the numerical solver behind it."""
from __future__ import annotations

import math
from abc import ABC, abstractmethod
from math import exp, inf, log, log1p

import numpy as np
from scipy import integrate, optimize


def check(ok: bool, message: str) -> None:
    """Refuse a bad family parameter (a programming error: the scenario reader checks first)."""
    if not ok:
        raise ValueError(message)


def positive(name: str, value: float) -> float:
    value = float(value)
    check(math.isfinite(value) and value > 0.0, f"{name} must be finite and > 0, got {value!r}")
    return value


def non_negative(name: str, value: float) -> float:
    value = float(value)
    check(math.isfinite(value) and value >= 0.0, f"{name} must be finite and >= 0, got {value!r}")
    return value


def gompertz_time(extra: float, rate: float, shape: float) -> float:
    """Smallest s >= 0 with rate * (exp(shape s) - 1) / shape = extra (rate * s if shape = 0)."""
    if rate <= 0.0:
        return inf
    if shape == 0.0:
        return extra / rate
    z = extra * shape / rate
    return inf if z <= -1.0 else log1p(z) / shape


def gompertz_times(extra, rate, shape) -> np.ndarray:
    """Array form of `gompertz_time`."""
    extra, rate, shape = np.broadcast_arrays(extra, rate, shape)
    with np.errstate(all="ignore"):
        z = extra * shape / rate
        s = np.where(shape == 0.0, extra / rate, np.log1p(z) / shape)
    return np.where((rate > 0.0) & (z > -1.0), s, inf)


def float_arrays(*values) -> list[np.ndarray]:
    """Array-likes as broadcast float arrays, for the vectorised path."""
    return np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in values))


class HazardFamily(ABC):
    """The common face of every family; subclasses are frozen dataclasses."""

    __slots__ = ()

    @abstractmethod
    def hazard(self, t: float) -> float:
        """h(t), the event rate at clock value t."""

    @abstractmethod
    def cumulative_hazard(self, t: float) -> float:
        """H(t), the integral of h from 0 to t."""

    @abstractmethod
    def time_to_reach(self, extra: float, now: float = 0.0) -> float:
        """Smallest s >= 0 with H(now + s) - H(now) = extra (inf if never reached)."""

    @abstractmethod
    def hazard_array(self, t) -> np.ndarray:
        """`hazard` over an array."""

    @abstractmethod
    def cumulative_hazard_array(self, t) -> np.ndarray:
        """`cumulative_hazard` over an array."""

    @abstractmethod
    def time_to_reach_array(self, extra, now=0.0) -> np.ndarray:
        """`time_to_reach` over broadcast arrays."""

    @abstractmethod
    def mean_time(self) -> float:
        """Expected time to event from clock 0 with multiplier 1 (inf if it may never happen)."""

    def log_hazard(self, t: float) -> float:
        """log h(t) (-inf where h is 0); families whose hazard may overflow give it directly."""
        h = self.hazard(t)
        return log(h) if h > 0.0 else -inf

    def survival(self, t: float) -> float:
        """S(t) = exp(-H(t))."""
        return exp(-self.cumulative_hazard(t))

    def survival_array(self, t) -> np.ndarray:
        return np.exp(-self.cumulative_hazard_array(t))

    def inverse_cumulative_hazard(self, total: float) -> float:
        """Smallest t with H(t) = total (inf if H never gets there)."""
        return self.time_to_reach(total, 0.0)

    def inverse_cumulative_hazard_array(self, total) -> np.ndarray:
        return self.time_to_reach_array(total, 0.0)

    def time_to_reach_growing(self, extra: float, now: float, multiplier: float,
                              growth: float) -> float:
        """Smallest s >= 0 with multiplier * int_0^s exp(growth v) h(now + v) dv = extra.

        Numerical here; families with a closed form override it.
        """
        return solve_growing_numerically(self, extra, now, multiplier, growth)

    def time_to_reach_growing_array(self, extra, now, multiplier, growth) -> np.ndarray:
        """`time_to_reach_growing` over broadcast arrays (a loop unless a family overrides it)."""
        extra, now, multiplier, growth = float_arrays(extra, now, multiplier, growth)
        solve = np.frompyfunc(self.time_to_reach_growing, 4, 1)
        return np.asarray(solve(extra, now, multiplier, growth), dtype=float)

    def sample_time(self, u: float, multiplier: float = 1.0, now: float = 0.0,
                    growth: float = 0.0) -> float:
        """Time from `now` to the event for the uniform draw u (see the module docstring)."""
        if growth == 0.0:
            return self.time_to_reach(-log(u) / multiplier, now)
        return self.time_to_reach_growing(-log(u), now, multiplier, growth)

    def sample_times(self, u, multiplier=1.0, now=0.0, growth=0.0) -> np.ndarray:
        """`sample_time` over broadcast arrays (one entry per patient)."""
        u, multiplier, now, growth = float_arrays(u, multiplier, now, growth)
        extra = -np.log(u)
        times = np.array(self.time_to_reach_array(extra / multiplier, now), dtype=float)
        growing = growth != 0.0
        if growing.any():
            times[growing] = self.time_to_reach_growing_array(
                extra[growing], now[growing], multiplier[growing], growth[growing])
        return times


def solve_growing_numerically(family: HazardFamily, extra: float, now: float,
                              multiplier: float, growth: float) -> float:
    """Root of the cumulative hazard under a growing multiplier, for bases with no closed form.

    G(s) = multiplier * int_0^s exp(growth v) h(now + v) dv is computed by adaptive quadrature
    (QUADPACK: Piessens et al. 1983, "QUADPACK: a subroutine package for automatic
    integration") and G(s) = extra is solved by Brent's method (Brent 1973, "Algorithms for
    minimization without derivatives").  The bracket starts at the answer without growth,
    which is an upper bound when growth > 0; otherwise it is doubled until G passes `extra`,
    after checking that G(inf) does (if not, the event never happens: inf).  Costs tens to
    hundreds of microseconds per draw, against well under a microsecond for closed forms.
    Meant for smooth hazards: jumps (piecewise tables, which have their own closed form) cost
    quadrature accuracy.
    """
    def rate_at(v: float) -> float:  # exp(growth v) h(now + v), formed in logs against overflow
        return exp(growth * v + family.log_hazard(now + v))

    def gained(s: float) -> float:
        try:
            integral = integrate.quad(rate_at, 0.0, s, epsabs=0.0, epsrel=1e-11, limit=200)[0]
        except OverflowError:  # the integrand itself passed 1e308: G is infinite for all purposes
            return inf
        return multiplier * integral

    if extra <= 0.0:
        return 0.0
    guess = family.time_to_reach(extra / multiplier, now)
    if (growth < 0.0 or guess == inf) and gained(inf) <= extra:
        return inf
    low, high = 0.0, (guess if 0.0 < guess < inf else 1.0)
    while gained(high) < extra:
        low, high = high, 2.0 * high
    return optimize.brentq(lambda s: gained(s) - extra, low, high, xtol=1e-14, rtol=1e-12)
