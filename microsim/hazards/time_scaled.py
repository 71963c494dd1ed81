"""Accelerated failure time: a family whose clock runs slower (or faster) for a patient.

With time ratio a > 0 (a = exp(x'beta) for covariates x and coefficients beta), the
accelerated-failure-time model is S(t | x) = S0(t / a): H(t) = H0(t / a) and
h(t) = h0(t / a) / a (Cox & Oakes 1984, "Analysis of Survival Data", ch. 5; Kalbfleisch &
Prentice 2002, "The Statistical Analysis of Failure Time Data", 2nd ed., 2.3.3). Every
method maps onto the base family's on the scaled clock:

- the time from clock value c to an extra cumulative hazard e is a * s0, where s0 is the
  base's time from c / a;
- under a proportional multiplier that grows as m exp(g v) while the clock runs (attained
  age: g is the log hazard ratio per time unit), substituting v = a w in
  m int_0^s exp(g v) h0((c + v) / a) / a dv = e gives
  m int_0^(s/a) exp(g a w) h0(c / a + w) dw = e: the base's growing problem from c / a
  with growth g a, and s = a times its answer.

So proportional-hazards multipliers (covariates, attained age, memory, treatment) and a
time ratio combine as h(t) = m(t) h0(t / a) / a. `scale` may be an array (one ratio per
patient) for the array methods.
"""
from __future__ import annotations

from dataclasses import dataclass
from math import inf, log

import numpy as np

from microsim.hazards.base import HazardFamily, check


@dataclass(frozen=True, slots=True)
class TimeScaledHazard(HazardFamily):
    """`base` on a clock divided by `scale` (the time ratio): S(t) = S0(t / scale)."""

    base: HazardFamily
    scale: float | np.ndarray

    def __post_init__(self):
        scale = np.asarray(self.scale)
        if not np.all(np.isfinite(scale) & (scale > 0.0)):
            check(False, f"scale (a time ratio) must be finite and > 0, got {self.scale!r}")

    def hazard(self, t):
        return self.base.hazard(t / self.scale) / self.scale

    def log_hazard(self, t):
        return self.base.log_hazard(t / self.scale) - log(self.scale)

    def cumulative_hazard(self, t):
        return self.base.cumulative_hazard(t / self.scale)

    def time_to_reach(self, extra, now=0.0):
        return self.scale * self.base.time_to_reach(extra, now / self.scale)

    def time_to_reach_growing(self, extra, now, multiplier, growth):
        a = self.scale
        return a * self.base.time_to_reach_growing(extra, now / a, multiplier, growth * a)

    def hazard_array(self, t):
        return self.base.hazard_array(np.divide(t, self.scale)) / self.scale

    def log_hazard_array(self, t):
        return self.base.log_hazard_array(np.divide(t, self.scale)) - np.log(self.scale)

    def cumulative_hazard_array(self, t):
        return self.base.cumulative_hazard_array(np.divide(t, self.scale))

    def time_to_reach_array(self, extra, now=0.0):
        a = self.scale
        return a * self.base.time_to_reach_array(extra, np.divide(now, a))

    def time_to_reach_growing_array(self, extra, now, multiplier, growth, limit=inf):
        a = self.scale
        return a * self.base.time_to_reach_growing_array(
            extra, np.divide(now, a), multiplier, np.multiply(growth, a), np.divide(limit, a))

    def mean_time(self):
        return self.scale * self.base.mean_time()
