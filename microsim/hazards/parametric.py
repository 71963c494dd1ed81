"""Parametric hazard families: constant, Weibull, Gompertz, log-logistic."""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from math import exp, expm1, inf, log, log1p

import numpy as np
from scipy import special

from microsim.hazards.base import (HazardFamily, check, float_arrays, gompertz_time,
                                   gompertz_times, non_negative, positive)

_LARGE_EXPONENT = 700.0  # above this exp() overflows soon: switch to the log form


def check_shape_scale(family) -> None:
    """Check and store a shape-scale family's parameters (Weibull, log-logistic)."""
    object.__setattr__(family, "shape", positive("shape", family.shape))
    object.__setattr__(family, "scale", positive("scale", family.scale))
    object.__setattr__(family, "_inverse_shape", 1.0 / family.shape)


def hazard_at_zero(shape: float, scale: float) -> float:
    """h(0) of a shape-scale family (Weibull, log-logistic): infinite for shape < 1,
    1/scale for shape 1 (both are then exponential at the origin), 0 above."""
    return inf if shape < 1.0 else (1.0 / scale if shape == 1.0 else 0.0)


@dataclass(frozen=True, slots=True)
class ConstantHazard(HazardFamily):
    """h(t) = rate: the exponential distribution (rate 0: never)."""

    rate: float

    def __post_init__(self):
        object.__setattr__(self, "rate", non_negative("rate", self.rate))

    def hazard(self, t):
        return self.rate

    def cumulative_hazard(self, t):
        return self.rate * t

    def time_to_reach(self, extra, now=0.0):
        return extra / self.rate if self.rate > 0.0 else inf

    def time_to_reach_growing(self, extra, now, multiplier, growth):
        return gompertz_time(extra, multiplier * self.rate, growth)

    def hazard_array(self, t):
        return np.full(np.shape(t), self.rate)

    def cumulative_hazard_array(self, t):
        return self.rate * np.asarray(t, dtype=float)

    def time_to_reach_array(self, extra, now=0.0):
        extra, now = float_arrays(extra, now)
        return extra / self.rate if self.rate > 0.0 else np.full(extra.shape, inf)

    def time_to_reach_growing_array(self, extra, now, multiplier, growth, limit=inf):
        return gompertz_times(extra, np.multiply(multiplier, self.rate), growth)

    def mean_time(self):
        return 1.0 / self.rate if self.rate > 0.0 else inf


@dataclass(frozen=True, slots=True)
class WeibullHazard(HazardFamily):
    """H(t) = (t / scale) ** shape."""

    shape: float
    scale: float
    _inverse_shape: float = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        check_shape_scale(self)

    def hazard(self, t):
        if t == 0.0:
            return hazard_at_zero(self.shape, self.scale)
        return self.shape / self.scale * (t / self.scale) ** (self.shape - 1.0)

    def cumulative_hazard(self, t):
        return (t / self.scale) ** self.shape

    def time_to_reach(self, extra, now=0.0):
        s = self.scale * ((now / self.scale) ** self.shape + extra) ** self._inverse_shape - now
        return s if s > 0.0 else 0.0

    def hazard_array(self, t):
        with np.errstate(divide="ignore"):
            z = np.asarray(t, dtype=float) / self.scale
            return self.shape / self.scale * z ** (self.shape - 1.0)

    def cumulative_hazard_array(self, t):
        return (np.asarray(t, dtype=float) / self.scale) ** self.shape

    def time_to_reach_array(self, extra, now=0.0):
        extra, now = float_arrays(extra, now)
        reached = self.scale * ((now / self.scale) ** self.shape + extra) ** self._inverse_shape
        return np.maximum(reached - now, 0.0)

    def mean_time(self):
        return self.scale * math.gamma(1.0 + self._inverse_shape)


@dataclass(frozen=True, slots=True)
class GompertzHazard(HazardFamily):
    """h(t) = rate exp(shape t); shape < 0 leaves a cure fraction exp(rate / shape)."""

    rate: float
    shape: float

    def __post_init__(self):
        object.__setattr__(self, "rate", non_negative("rate", self.rate))
        shape = float(self.shape)
        check(math.isfinite(shape), f"shape must be finite, got {shape!r}")
        object.__setattr__(self, "shape", shape)

    def hazard(self, t):
        return self.rate * exp(self.shape * t)

    def log_hazard(self, t):
        return log(self.rate) + self.shape * t if self.rate > 0.0 else -inf

    def cumulative_hazard(self, t):
        if self.shape == 0.0:
            return self.rate * t
        return self.rate * expm1(self.shape * t) / self.shape

    def time_to_reach(self, extra, now=0.0):
        return gompertz_time(extra, self.rate * exp(self.shape * now), self.shape)

    def time_to_reach_growing(self, extra, now, multiplier, growth):
        return gompertz_time(extra, multiplier * self.rate * exp(self.shape * now),
                             self.shape + growth)

    def hazard_array(self, t):
        return self.rate * np.exp(self.shape * np.asarray(t, dtype=float))

    def log_hazard_array(self, t):
        with np.errstate(divide="ignore"):
            return np.log(self.rate) + self.shape * np.asarray(t, dtype=float)

    def cumulative_hazard_array(self, t):
        t = np.asarray(t, dtype=float)
        if self.shape == 0.0:
            return self.rate * t
        return self.rate * np.expm1(self.shape * t) / self.shape

    def time_to_reach_array(self, extra, now=0.0):
        extra, now = float_arrays(extra, now)
        return gompertz_times(extra, self.rate * np.exp(self.shape * now), self.shape)

    def time_to_reach_growing_array(self, extra, now, multiplier, growth, limit=inf):
        rate_now = np.multiply(multiplier, self.rate) * np.exp(self.shape * np.asarray(now, float))
        return gompertz_times(np.asarray(extra, float), rate_now, np.add(self.shape, growth))

    def mean_time(self):
        """(1/shape) e^z E1(z), z = rate/shape (Lenart 2014, "The moments of the Gompertz
        distribution and maximum likelihood estimation of its parameters")."""
        if self.rate == 0.0 or self.shape < 0.0:
            return inf
        if self.shape == 0.0:
            return 1.0 / self.rate
        z = self.rate / self.shape
        if z > _LARGE_EXPONENT:  # e^z E1(z) ~ sum (-1)^k k! / z^(k+1): Abramowitz & Stegun 5.1.51
            return sum((-1) ** k * math.factorial(k) / z ** (k + 1) for k in range(5)) / self.shape
        return exp(z) * float(special.exp1(z)) / self.shape


@dataclass(frozen=True, slots=True)
class LogLogisticHazard(HazardFamily):
    """H(t) = log(1 + (t / scale) ** shape): the log-logistic distribution."""

    shape: float
    scale: float
    _inverse_shape: float = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        check_shape_scale(self)

    def hazard(self, t):
        if t == 0.0:
            return hazard_at_zero(self.shape, self.scale)
        z = (t / self.scale) ** self.shape
        return self.shape * z / (t * (1.0 + z))

    def cumulative_hazard(self, t):
        return log1p((t / self.scale) ** self.shape)

    def time_to_reach(self, extra, now=0.0):
        # (t/scale)^shape = (1 + (now/scale)^shape) e^extra - 1, in a form free of cancellation
        z = (now / self.scale) ** self.shape
        if extra < _LARGE_EXPONENT:
            reached = self.scale * (z * exp(extra) + expm1(extra)) ** self._inverse_shape
        else:
            reached = self.scale * exp((extra + log1p(z - exp(-extra))) * self._inverse_shape)
        s = reached - now
        return s if s > 0.0 else 0.0

    def hazard_array(self, t):
        t = np.asarray(t, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = (t / self.scale) ** self.shape
            h = self.shape * z / (t * (1.0 + z))
        return np.where(t == 0.0, self.hazard(0.0), h)

    def cumulative_hazard_array(self, t):
        return np.log1p((np.asarray(t, dtype=float) / self.scale) ** self.shape)

    def time_to_reach_array(self, extra, now=0.0):
        extra, now = float_arrays(extra, now)
        z = (now / self.scale) ** self.shape
        large = extra >= _LARGE_EXPONENT
        moderate = np.where(large, 0.0, extra)
        reached = (z * np.exp(moderate) + np.expm1(moderate)) ** self._inverse_shape
        if large.any():
            x = extra[large]
            reached[large] = np.exp((x + np.log1p(z[large] - np.exp(-x))) * self._inverse_shape)
        return np.maximum(self.scale * reached - now, 0.0)

    def mean_time(self):
        """scale (pi/shape) / sin(pi/shape) for shape > 1, else inf (common practice)."""
        if self.shape <= 1.0:
            return inf
        b = math.pi / self.shape
        return self.scale * b / math.sin(b)
