"""The common face of every hazard family, and the numerical solvers behind it."""
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
    """Array form of `gompertz_time` (the same arithmetic; one branch for a scalar shape)."""
    with np.errstate(all="ignore"):
        if np.ndim(shape) == 0:
            z = np.multiply(extra, shape) / rate
            s = np.divide(extra, rate) if shape == 0.0 else np.log1p(z) / shape
        else:
            extra, rate, shape = np.broadcast_arrays(extra, rate, shape)
            z = extra * shape / rate
            s = np.where(shape == 0.0, extra / rate, np.log1p(z) / shape)
        return np.where((np.greater(rate, 0.0)) & (z > -1.0), s, inf)


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

    def log_hazard_array(self, t) -> np.ndarray:
        """`log_hazard` over an array (what a likelihood reads)."""
        with np.errstate(divide="ignore"):
            return np.log(self.hazard_array(t))

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

    def time_to_reach_growing_array(self, extra, now, multiplier, growth,
                                    limit=inf) -> np.ndarray:
        """`time_to_reach_growing` over broadcast arrays: numerical here (`solve_growing_array`),
        closed forms where a family overrides it. A time beyond `limit` may come back as inf:
        it bounds the numerical search, and closed forms ignore it."""
        return solve_growing_array(self, extra, now, multiplier, growth, limit)

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
    minimization without derivatives").  The bracket is doubled until G passes `extra`, after
    checking that G(inf) does (if not, the event never happens: inf), from the answer without
    growth, or from 1 when growth > 0 and that answer is larger: it bounds the root from above
    but can be astronomically loose (1e15 and more), too wide for the search.  Costs tens to
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
    if growth > 0.0:
        high = min(high, 1.0)
    while gained(high) < extra:
        low, high = high, 2.0 * high
    return optimize.brentq(lambda s: gained(s) - extra, low, high, xtol=1e-14, rtol=1e-12)


_NODES, _WEIGHTS = np.polynomial.legendre.leggauss(16)
_RATIO = 0.25  # each graded piece is 3 times as long as its distance from the clock's origin
_GRADED = (4, 22)  # graded pieces, by how near the origin is; 0.25**22 < 1e-13
_UNIFORM = (2, 8)  # equal pieces, more when the multiplier grows much over the range
_STEP = 8.0  # the most growth * (change of the clock) one piece may span
_CHUNK = 1024  # elements solved together: (elements, pieces, nodes) stays in cache


def solve_growing_array(family: HazardFamily, extra, now, multiplier, growth,
                        limit=inf) -> np.ndarray:
    """`solve_growing_numerically` over arrays, with no Python loop over the elements.

    Substituting w = H(now + v) - H(now), whose inverse v = tau(w) is the family's closed
    form `time_to_reach_array`, turns G(s) = multiplier * int_0^s exp(growth v) h(now + v) dv
    into multiplier * F(W), F(W) = int_0^W exp(growth tau(w)) dw, W = H(now + s) - H(now).
    Its integrand is bounded and smooth, analytic but for a branch point at w = -H(now) (the
    clock's origin, where a Weibull or log-logistic hazard is 0 or infinite). F is integrated
    by 16-point Gauss-Legendre rules on pieces graded geometrically toward that point (the
    composite rules on geometric meshes of Davis & Rabinowitz 1984, "Methods of Numerical
    Integration", 2nd ed., ch. 2, from memory), and F(W) = extra / multiplier is solved by
    Newton's method inside the piece that brackets the root. F is convex for growth > 0 and
    concave for growth < 0, so Newton started at the piece's upper (lower) end converges
    monotonically and never leaves it (Fourier's condition; Ortega & Rheinboldt 1970,
    "Iterative Solution of Nonlinear Equations in Several Variables", 13.3, from memory).

    The search runs up to W = H(now + limit) - H(now) (and, for growth > 0, to extra /
    multiplier, beyond which F already exceeds the target); a root beyond it is inf.
    Elements this cannot bound (growth < 0 with no limit) or whose multiplier grows by more
    than e**8 across one piece go to `solve_growing_numerically`. Measured against the scalar
    solver's residual |G(s) / extra - 1| (up to about 1e-12): about 1e-16 typically, 1e-13 at
    worst.
    """
    arrays = float_arrays(extra, now, multiplier, growth, limit)
    shape = arrays[0].shape
    flat = [a.ravel() for a in arrays]
    out = np.empty(flat[0].size)
    for lo in range(0, out.size, _CHUNK):
        out[lo:lo + _CHUNK] = _solve_chunk(family, *(a[lo:lo + _CHUNK] for a in flat))
    return out.reshape(shape)


def _solve_chunk(family, extra, now, multiplier, growth, limit) -> np.ndarray:
    out = np.where(extra > 0.0, inf, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        target = extra / multiplier
        origin = family.cumulative_hazard_array(now)
        bound = np.where(np.isfinite(limit),
                         family.cumulative_hazard_array(now + limit) - origin, inf)
    rising = growth >= 0.0
    top = np.where(rising, np.minimum(target, bound), bound)
    alive = (extra > 0.0) & (multiplier > 0.0) & (rising | (target <= bound))
    fallback = alive & ~np.isfinite(top)
    rows = np.flatnonzero(alive & np.isfinite(top) & (top > 0.0))
    if rows.size:
        times, rough = _newton(family, target[rows], now[rows], growth[rows], top[rows],
                               origin[rows], rising[rows] & (target[rows] <= bound[rows]))
        out[rows] = times
        fallback[rows[rough]] = True
    for i in np.flatnonzero(fallback):
        out[i] = solve_growing_numerically(family, float(extra[i]), float(now[i]),
                                           float(multiplier[i]), float(growth[i]))
    return out


def _pieces(top, origin, graded: int, uniform: int) -> np.ndarray:
    """Breakpoints (rows, graded + uniform + 1) from 0 to top: geometric toward -origin,
    and equal steps."""
    steps = (top + origin)[:, None] * _RATIO ** np.arange(1, graded + 1) - origin[:, None]
    equal = top[:, None] * (np.arange(1, uniform) / uniform)
    points = np.concatenate([np.zeros((top.size, 1)), np.clip(steps, 0.0, top[:, None]),
                             equal, top[:, None]], axis=1)
    return np.sort(points, axis=1)


def _integral(family, now, growth, lo, hi) -> np.ndarray:
    """int_lo^hi exp(growth tau(w)) dw by 16-point Gauss-Legendre, for every element's
    interval(s): lo and hi (rows,) or (rows, pieces), now and growth (rows,). A sum along
    the nodes rather than a BLAS product, so an element's value cannot depend on others."""
    half = 0.5 * (hi - lo)
    w = (0.5 * (hi + lo))[..., None] + half[..., None] * _NODES
    per_row = (-1,) + (1,) * (w.ndim - 1)
    tau = family.time_to_reach_array(w, now.reshape(per_row))
    with np.errstate(over="ignore"):  # past the root, where the rules are not needed
        return half * (np.exp(growth.reshape(per_row) * tau) * _WEIGHTS).sum(axis=-1)


def _newton(family, target, now, growth, top, origin, certain):
    """Roots of F(W) = target on [0, top] (inf where F(top) < target, unless `certain`),
    and which elements are too rough for the rules."""
    with np.errstate(divide="ignore"):  # graded breakpoints above 0 (all of them at origin 0)
        needed = np.ceil(np.log1p(top / origin) / np.log(1.0 / _RATIO)) - 1.0
    graded = np.asarray(_GRADED)[np.searchsorted(_GRADED, np.minimum(needed, _GRADED[-1]))]
    spread = np.abs(growth) * family.time_to_reach_array(top, now)
    uniform = np.where(spread <= _STEP, _UNIFORM[0], _UNIFORM[-1])
    n = target.size
    low, high, w, value = (np.empty(n) for _ in range(4))
    reached, rough = np.empty(n, bool), np.empty(n, bool)
    tier = graded * (_UNIFORM[-1] + 1) + uniform  # one group of elements per pair
    for key in np.unique(tier).tolist():
        rows = np.flatnonzero(tier == key)
        g, u = divmod(key, _UNIFORM[-1] + 1)
        points = _pieces(top[rows], origin[rows], g, u)
        clock = family.time_to_reach_array(points, now[rows, None])
        rough[rows] = np.abs(growth[rows]) * np.diff(clock, axis=1).max(axis=1) > _STEP
        pieces = _integral(family, now[rows], growth[rows], points[:, :-1], points[:, 1:])
        cumulative = np.concatenate([np.zeros((rows.size, 1)), np.cumsum(pieces, axis=1)], axis=1)
        goal = target[rows]
        reached[rows] = certain[rows] | (cumulative[:, -1] >= goal)
        piece = np.minimum((cumulative[:, 1:-1] < goal[:, None]).sum(axis=1), points.shape[1] - 2)
        at = np.arange(rows.size)
        low[rows], high[rows] = points[at, piece], points[at, piece + 1]
        start = np.where(growth[rows] >= 0.0, piece + 1, piece)  # convex: from above
        w[rows], value[rows] = points[at, start], cumulative[at, start]
    pending = np.flatnonzero(reached & ~rough)
    for _ in range(60):  # quadratic convergence: a handful of steps
        if not pending.size:
            break
        p = pending
        slope = np.exp(growth[p] * family.time_to_reach_array(w[p], now[p]))
        step = np.clip(w[p] + (target[p] - value[p]) / slope, low[p], high[p])
        value[p] += _integral(family, now[p], growth[p], w[p], step)
        moved = np.abs(step - w[p]) > 1e-15 * step
        w[p] = step
        pending = p[moved]
    rough[pending] = True
    return np.where(reached, family.time_to_reach_array(w, now), inf), rough
