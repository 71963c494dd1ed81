"""Piecewise-constant hazards: life tables by attained age or by time."""
from __future__ import annotations

import math
from bisect import bisect_left, bisect_right
from dataclasses import dataclass, field
from math import exp, expm1, inf

import numpy as np

from microsim.hazards.base import (HazardFamily, check, float_arrays, gompertz_time,
                                   gompertz_times, non_negative)


@dataclass(frozen=True, slots=True)
class PiecewiseConstantHazard(HazardFamily):
    """Rate rates[k] from clock starts[k] up to starts[k+1]; the last rate holds forever.

    Life tables by attained age or time: starts[0] must be 0.  Sampling walks the pieces
    (Walke 2010, "Example for a piecewise constant hazard data simulation in R").
    """

    starts: tuple[float, ...]
    rates: tuple[float, ...]
    _cumulative: tuple[float, ...] = field(init=False, repr=False, compare=False)
    _arrays: tuple[np.ndarray, np.ndarray, np.ndarray] = field(init=False, repr=False,
                                                               compare=False)

    def __post_init__(self):
        starts = tuple(float(s) for s in self.starts)
        rates = tuple(non_negative(f"rates[{k}]", r) for k, r in enumerate(self.rates))
        check(len(starts) == len(rates) >= 1,
              f"need as many starts as rates (at least one), got {len(starts)} and {len(rates)}")
        check(starts[0] == 0.0, f"starts[0] must be 0, got {starts[0]!r}")
        check(all(math.isfinite(s) for s in starts) and
              all(b > a for a, b in zip(starts, starts[1:])),
              f"starts must be finite and strictly increasing, got {starts!r}")
        cumulative = [0.0]
        for k in range(1, len(starts)):
            cumulative.append(cumulative[-1] + rates[k - 1] * (starts[k] - starts[k - 1]))
        object.__setattr__(self, "starts", starts)
        object.__setattr__(self, "rates", rates)
        object.__setattr__(self, "_cumulative", tuple(cumulative))
        object.__setattr__(self, "_arrays", (np.array(starts), np.array(rates),
                                             np.array(cumulative)))

    def hazard(self, t):
        return self.rates[bisect_right(self.starts, t) - 1]

    def cumulative_hazard(self, t):
        k = bisect_right(self.starts, t) - 1
        return self._cumulative[k] + self.rates[k] * (t - self.starts[k])

    def time_to_reach(self, extra, now=0.0):
        target = self.cumulative_hazard(now) + extra
        k = bisect_left(self._cumulative, target) - 1  # piece where H passes target
        if k < 0:
            return 0.0
        rate = self.rates[k]
        if rate == 0.0:  # only the last piece can be flat here
            return inf
        s = self.starts[k] + (target - self._cumulative[k]) / rate - now
        return s if s > 0.0 else 0.0

    def time_to_reach_growing(self, extra, now, multiplier, growth):
        """Walk the pieces; on each the hazard is multiplier * rate * exp(growth v): Gompertz."""
        starts, rates = self.starts, self.rates
        k = bisect_right(starts, now) - 1
        elapsed = 0.0
        while True:
            length = starts[k + 1] - now - elapsed if k + 1 < len(starts) else inf
            rate_now = multiplier * rates[k]
            s = gompertz_time(extra, rate_now, growth)
            if s <= length:
                return elapsed + s
            if rate_now > 0.0:
                used = rate_now * (expm1(growth * length) / growth if growth else length)
                extra = max(extra - used, 0.0)
            multiplier *= exp(growth * length)
            elapsed += length
            k += 1

    def hazard_array(self, t):
        starts, rates, _ = self._arrays
        return rates[np.searchsorted(starts, t, side="right") - 1]

    def cumulative_hazard_array(self, t):
        starts, rates, cumulative = self._arrays
        t = np.asarray(t, dtype=float)
        k = np.searchsorted(starts, t, side="right") - 1
        return cumulative[k] + rates[k] * (t - starts[k])

    def time_to_reach_array(self, extra, now=0.0):
        starts, rates, cumulative = self._arrays
        extra, now = float_arrays(extra, now)
        target = self.cumulative_hazard_array(now) + extra
        k = np.searchsorted(cumulative, target, side="left") - 1
        piece = np.maximum(k, 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            s = starts[piece] + (target - cumulative[piece]) / rates[piece] - now
        return np.where(k < 0, 0.0, np.maximum(s, 0.0))

    def time_to_reach_growing_array(self, extra, now, multiplier, growth, limit=inf):
        """`time_to_reach_growing` over arrays: every element walks the pieces with the same
        arithmetic, one piece per step (`limit` is not needed: the form is closed)."""
        starts, rates, _ = self._arrays
        extra, now, multiplier, growth = (a.copy() for a in float_arrays(extra, now, multiplier,
                                                                          growth))
        piece = np.searchsorted(starts, now, side="right") - 1
        elapsed = np.zeros(extra.shape)
        out = np.empty(extra.shape)
        walking = np.ones(extra.shape, bool)
        last = len(starts) - 1
        for _ in range(len(starts)):
            k = piece[walking]
            ends = np.where(k < last, starts[np.minimum(k + 1, last)], inf)
            length = ends - now[walking] - elapsed[walking]
            rate_now = multiplier[walking] * rates[k]
            s = gompertz_times(extra[walking], rate_now, growth[walking])
            done = s <= length
            where = np.flatnonzero(walking)
            out[where[done]] = elapsed[where[done]] + s[done]
            on, length, rate_now = where[~done], length[~done], rate_now[~done]
            g = growth[on]
            with np.errstate(divide="ignore", invalid="ignore"):
                used = rate_now * np.where(g != 0.0, np.expm1(g * length) / g, length)
            extra[on] = np.where(rate_now > 0.0, np.maximum(extra[on] - used, 0.0), extra[on])
            multiplier[on] *= np.exp(g * length)
            elapsed[on] += length
            piece[on] += 1
            walking[where[done]] = False
        return out

    def mean_time(self):
        """Sum over pieces of the integral of S, which is exponential on each piece."""
        lengths = np.append(np.diff(self.starts), inf)
        rates = np.array(self.rates)
        survival_at_start = np.exp(-np.array(self._cumulative))
        with np.errstate(invalid="ignore"):
            integrals = np.where(rates > 0.0, -np.expm1(-rates * lengths) / rates, lengths)
        return float(np.sum(survival_at_start * integrals))
