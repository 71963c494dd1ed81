"""Families defined by the distribution of log T: the log-normal and the generalised gamma.

Both are written on the standardised log time w = (log t - location) / scale, where their
survival S_w(w) and density f_w(w) are smooth; on the clock t, H(t) = -log S_w(w) and
h(t) = f_w(w) / (scale t S_w(w)). Every quantity is formed in logs (log survival, log
density) so that neither tail underflows: the log-normal through scipy.special.log_ndtr and
its inverse ndtri_exp; the generalised gamma through the regularised incomplete gamma
functions (scipy.special.gammainc, gammaincc and their inverses), with their own log tails
where those underflow, and Temme's uniform expansion where the gamma shape 1/Q^2 is too
large for them (`microsim.hazards.incomplete_gamma`).

Scalar methods run the array arithmetic on one value, so the event engine and the
vectorised engine compute the same bits.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from math import inf

import numpy as np
from scipy import integrate, special

from microsim.hazards.base import HazardFamily, check, float_arrays, positive
from microsim.hazards.incomplete_gamma import (TEMME_BELOW, gamma_quantile, log_density_w,
                                               log_survival_w, solve_log_survival)

LOG_ROOT_TWO_PI = 0.5 * math.log(2.0 * math.pi)


class LogLocationScale(HazardFamily):
    """The shared arithmetic: subclasses give log S_w, log f_w and the inverse of log S_w."""

    __slots__ = ()

    def standardised(self, t) -> np.ndarray:
        with np.errstate(divide="ignore"):
            return (np.log(np.asarray(t, dtype=float)) - self.location) / self.spread

    def cumulative_hazard_array(self, t):
        return 0.0 - self.log_survival_w(self.standardised(t))  # 0.0 - : no -0.0 at t = 0

    def log_hazard_array(self, t):
        t = np.asarray(t, dtype=float)
        w = self.standardised(t)
        with np.errstate(divide="ignore", invalid="ignore"):
            log_h = (self.log_density_w(w) - self.log_survival_w(w) - math.log(self.spread)
                     - np.log(t))
        return np.where(t > 0.0, log_h, -inf)  # the hazard starts at 0

    def hazard_array(self, t):
        return np.exp(self.log_hazard_array(t))

    def time_to_reach_array(self, extra, now=0.0):
        extra, now = float_arrays(extra, now)
        target = self.cumulative_hazard_array(now) + extra
        with np.errstate(over="ignore"):
            reached = np.exp(self.location + self.spread * self.inverse_log_survival_w(-target))
        return np.maximum(reached - now, 0.0)

    def hazard(self, t):
        return float(self.hazard_array(t))

    def log_hazard(self, t):
        return float(self.log_hazard_array(t))

    def cumulative_hazard(self, t):
        return float(self.cumulative_hazard_array(t))

    def time_to_reach(self, extra, now=0.0):
        return float(self.time_to_reach_array(extra, now))


@dataclass(frozen=True, slots=True)
class LogNormalHazard(LogLocationScale):
    """log T ~ Normal(meanlog, sdlog): H(t) = -log Phi(-(log t - meanlog) / sdlog)."""

    meanlog: float
    sdlog: float

    def __post_init__(self):
        meanlog = float(self.meanlog)
        check(math.isfinite(meanlog), f"meanlog must be finite, got {meanlog!r}")
        object.__setattr__(self, "meanlog", meanlog)
        object.__setattr__(self, "sdlog", positive("sdlog", self.sdlog))

    @property
    def location(self) -> float:
        return self.meanlog

    @property
    def spread(self) -> float:
        return self.sdlog

    def log_survival_w(self, w):
        return special.log_ndtr(-w)

    def log_density_w(self, w):
        return -0.5 * w * w - LOG_ROOT_TWO_PI

    def inverse_log_survival_w(self, log_s):
        return -special.ndtri_exp(log_s)

    def mean_time(self):
        return math.exp(self.meanlog + 0.5 * self.sdlog ** 2)


@dataclass(frozen=True, slots=True)
class GeneralisedGammaHazard(LogLocationScale):
    """The generalised gamma of Prentice (1974), in the (mu, sigma, Q) form of Cox, Chu,
    Schneider & Munoz (2007), "Parametric survival analysis and taxonomy of hazard
    functions for the generalized gamma distribution" (Stat. Med.): with w = (log t - mu) /
    sigma and gamma shape k = 1 / Q^2, S(t) = 1 - P(k, k e^(Q w)) for Q > 0, P(k, k e^(Q w))
    for Q < 0, and the log-normal 1 - Phi(w) at Q = 0. Q = 1 is the Weibull with shape
    1 / sigma and scale e^mu; Q = sigma the gamma.
    """

    mu: float
    sigma: float
    q: float

    def __post_init__(self):
        for name in ("mu", "q"):
            value = float(getattr(self, name))
            check(math.isfinite(value), f"{name} must be finite, got {value!r}")
            object.__setattr__(self, name, value)
        object.__setattr__(self, "sigma", positive("sigma", self.sigma))

    @property
    def location(self) -> float:
        return self.mu

    @property
    def spread(self) -> float:
        return self.sigma

    def log_survival_w(self, w):
        return log_survival_w(w, self.q)

    def log_density_w(self, w):
        return log_density_w(w, self.q)

    def inverse_log_survival_w(self, log_s):
        if abs(self.q) < TEMME_BELOW:  # no closed inverse there: Newton from the log-normal's
            return solve_log_survival(log_s, self.q, -special.ndtri_exp(log_s))
        return gamma_quantile(log_s, self.q)

    def mean_time(self):
        """E[T] = e^mu (Q^2)^(sigma/Q) Gamma(k + sigma/Q) / Gamma(k), k = 1/Q^2, when
        k + sigma/Q > 0, else inf (from T = e^mu (Q^2 Y)^(sigma/Q), Y ~ Gamma(k), for
        Q > 0 and Q < 0 alike); near Q = 0, where the gamma functions cancel, as
        e^mu E[e^(sigma w)] by quadrature over the (exact) density of w."""
        q, sigma = self.q, self.sigma
        if abs(q) < TEMME_BELOW:
            def integrand(w):
                return math.exp(sigma * w + float(log_density_w(w, q)))
            return math.exp(self.mu) * integrate.quad(integrand, -inf, inf, epsabs=0.0,
                                                      epsrel=1e-12)[0]
        k = 1.0 / q ** 2
        if k + sigma / q <= 0.0:
            return inf
        return math.exp(self.mu + 2.0 * sigma / q * math.log(abs(q))
                        + special.gammaln(k + sigma / q) - special.gammaln(k))
