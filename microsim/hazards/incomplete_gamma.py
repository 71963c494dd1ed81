"""The generalised gamma's survival and density on the standardised log time w, in logs.

With gamma shape k = 1 / Q^2 and u = k e^(Q w), the survival is the regularised incomplete
gamma Q(k, u) = gammaincc for Q > 0 and P(k, u) = gammainc for Q < 0 (Cox, Chu, Schneider &
Munoz 2007, "Parametric survival analysis and taxonomy of hazard functions for the
generalized gamma distribution", Stat. Med.). Three regimes keep it accurate everywhere:

- |Q| >= TEMME_BELOW: scipy.special.gammainc / gammaincc (and their inverses for the
  quantile), with log1p(-F) where the survival is near 1. Where the survival underflows
  (below TINY), its log comes from the series of P (Press, Teukolsky, Vetterling &
  Flannery 2007, "Numerical Recipes", 3rd ed., eq. 6.2.5) or the continued fraction of Q
  by the modified Lentz method (ibid., eq. 6.2.7 and section 5.2).
- |Q| < TEMME_BELOW, where k > 10^4: there scipy's P(k, u) loses accuracy (measured: 4e-6
  relative in the lower tail at k = 10^6, 3% at 10^7) and u - k cancels. Temme's uniform
  asymptotic expansion (Temme 1979, "The asymptotic expansion of the incomplete gamma
  functions", SIAM J. Math. Anal.; in the form of DiDonato & Morris 1986, "Computation of
  the incomplete gamma function ratios and their inverse", ACM TOMS), rewritten on w, is
  S = Phi(-z) + Q phi(z) (C0(eta) + Q^2 C1(eta)) with z = w sqrt(2 G(Q w)),
  G(y) = (e^y - 1 - y) / y^2 and eta = Q z. It is exactly the log-normal at Q = 0 and
  smooth through it; the terms left out are O(Q^5) against the survival's scale (measured
  against scipy where scipy is accurate: below 1e-10 relative).
- The log density is exact for every Q: log f_w = -log sqrt(2 pi) - c(k) - w^2 G(Q w),
  with c the remainder of Stirling's series for log Gamma(k).
"""
from __future__ import annotations

import math

import numpy as np
from scipy import special

TEMME_BELOW = 0.01  # |Q| below this: Temme's expansion (gamma shape above 10^4)
TINY = 1e-280  # a survival below this is taken from the log tails
LOG_HALF = math.log(0.5)
LOG_TINY = math.log(TINY)
LOG_ROOT_TWO_PI = 0.5 * math.log(2.0 * math.pi)
TAIL_TERMS = 600  # the series and the continued fraction converge well within this in the tails
NEWTON_STEPS = 60

# Taylor coefficients of Temme's C0 and C1 in eta, by reversion of the series
# eta^2 / 2 = m - log(1 + m) (m = lambda - 1) in exact fractions; they are DiDonato & Morris'
# d0k and d1k, and the tests check them against the closed forms below.
C0_SERIES = (-1 / 3, 1 / 12, -2 / 135, 1 / 864, 1 / 2835, -139 / 777600, 1 / 25515,
             -571 / 261273600, -281 / 151559100, 163879 / 197522841600,
             -5221 / 29554024500, 5246819 / 782190452736000, 5459 / 531972441000)
C1_SERIES = (-1 / 540, -1 / 288, 1 / 378, -77 / 77760, 1 / 4860, -1 / 2488320,
             -2743 / 151559100, 41969 / 5486745600, -11 / 6823440, 47207 / 10158317568000,
             3761 / 27280638000, -3599669 / 62575236218880)
SERIES_BELOW = 0.3  # |eta| below this: the Taylor series (the closed forms cancel there)
MILLS_FROM = 1e3  # z above this: Mills' ratio by its asymptotic series (error below 1e-14)
STIRLING = (1 / 12, -1 / 360, 1 / 1260, -1 / 1680, 1 / 1188)  # B_2j / (2j (2j - 1))


def g_of(y) -> np.ndarray:
    """G(y) = (e^y - 1 - y) / y^2, without the cancellation near 0 (Taylor: sum y^j / (j+2)!)."""
    y = np.asarray(y, dtype=float)
    near = np.abs(y) < 0.1
    series = np.zeros_like(y)
    for j in range(12, -1, -1):  # Horner
        series = series * y + 1.0 / math.factorial(j + 2)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        closed = (np.expm1(y) - y) / (y * y)
    return np.where(near, series, closed)


def stirling_remainder(q: float) -> float:
    """c(k) = log Gamma(k) - (k - 1/2) log k + k - log sqrt(2 pi) at k = 1/q^2 (0 at q = 0),
    by Stirling's series in q^2 where k >= 10 (Abramowitz & Stegun 1964, 6.1.40)."""
    if q * q <= 0.1:
        x = q * q
        return x * sum(c * x ** (2 * j) for j, c in enumerate(STIRLING))
    k = 1.0 / (q * q)
    return float(special.gammaln(k) - (k - 0.5) * math.log(k) + k - LOG_ROOT_TWO_PI)


def log_density_w(w, q: float) -> np.ndarray:
    """log f_w(w): exact for every Q (see the module docstring)."""
    w = np.asarray(w, dtype=float)
    with np.errstate(invalid="ignore", over="ignore"):
        log_f = -LOG_ROOT_TWO_PI - stirling_remainder(q) - w * w * g_of(q * w)
    return np.where(np.isfinite(w), log_f, -np.inf)


def temme_series(eta, y, coefficients, closed) -> np.ndarray:
    """A Temme coefficient C(eta): its Taylor series near 0, its closed form elsewhere."""
    series = np.zeros_like(eta)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for c in reversed(coefficients):
            series = series * eta + c
        exact = closed(eta, np.expm1(y))
    return np.where(np.abs(eta) < SERIES_BELOW, series, exact)


def temme_log_survival(w: np.ndarray, q: float) -> np.ndarray:
    """log S_w(w) by Temme's expansion, for |Q| < TEMME_BELOW (finite w)."""
    y = q * w
    z = w * np.sqrt(2.0 * g_of(y))
    eta = q * z
    c0 = temme_series(eta, y, C0_SERIES, lambda e, m: 1.0 / m - 1.0 / e)
    c1 = temme_series(eta, y, C1_SERIES,
                      lambda e, m: 1.0 / e ** 3 - 1.0 / m ** 3 - 1.0 / m ** 2 - 1.0 / (12.0 * m))
    base = special.log_ndtr(-z)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        # phi(z) / Phi(-z); far out, where its logs cancel, the asymptotic z + 1/z - 2/z^3
        # of Mills' ratio (Abramowitz & Stegun 1964, 26.2.12)
        ratio = np.where(z < MILLS_FROM, np.exp(-0.5 * z * z - LOG_ROOT_TWO_PI - base),
                         z + 1.0 / z - 2.0 / z ** 3)
        log_s = base + np.log1p(q * (c0 + q * q * c1) * ratio)
    return np.where(base == -np.inf, -np.inf, log_s)


def log_lower_tail(k: float, log_u: np.ndarray) -> np.ndarray:
    """log P(k, u) by its series (for P too small for gammainc)."""
    u = np.exp(log_u)
    total, term = np.ones_like(u), np.ones_like(u)
    for n in range(1, TAIL_TERMS):
        term = term * u / (k + n)
        total = total + term
        if np.all(term <= 1e-17 * total):
            break
    return k * log_u - u - special.gammaln(k + 1.0) + np.log(total)


def log_upper_tail(k: float, log_u: np.ndarray) -> np.ndarray:
    """log Q(k, u) by its continued fraction (for Q too small for gammaincc)."""
    with np.errstate(over="ignore"):
        u = np.exp(log_u)
    finite = np.isfinite(u)
    x = np.where(finite, u, k + 2.0)
    tiny = 1e-300
    b = x + 1.0 - k
    c = np.full_like(x, 1.0 / tiny)
    d = 1.0 / b
    h = d.copy()
    for i in range(1, TAIL_TERMS):
        a = -i * (i - k)
        b = b + 2.0
        d = a * d + b
        d = np.where(np.abs(d) < tiny, tiny, d)
        c = b + a / c
        c = np.where(np.abs(c) < tiny, tiny, c)
        d = 1.0 / d
        delta = d * c
        h = h * delta
        if np.all(np.abs(delta - 1.0) <= 1e-16):
            break
    log_q = -x + k * np.log(x) - special.gammaln(k) + np.log(h)
    return np.where(finite, log_q, -np.inf)


def gamma_log_survival(w: np.ndarray, q: float) -> np.ndarray:
    """log S_w(w) through the incomplete gamma functions, for |Q| >= TEMME_BELOW (finite w)."""
    k = 1.0 / (q * q)
    log_u = q * w + math.log(k)
    with np.errstate(over="ignore"):
        u = np.exp(log_u)
    upper, lower = special.gammaincc(k, u), special.gammainc(k, u)
    survival, failure = (upper, lower) if q > 0 else (lower, upper)
    with np.errstate(divide="ignore"):
        log_s = np.where(failure < 0.5, np.log1p(-failure), np.log(survival))
    deep = survival < TINY
    if deep.any():
        tail = log_upper_tail if q > 0 else log_lower_tail
        log_s[deep] = tail(k, log_u[deep])
    return log_s


def log_survival_w(w, q: float) -> np.ndarray:
    """log S_w(w) of the generalised gamma with parameter Q (0 at w = -inf, -inf at +inf)."""
    w = np.asarray(w, dtype=float)
    out = np.where(w < 0, 0.0, -np.inf)  # the values at -inf and +inf
    finite = np.isfinite(w)
    if finite.any():
        method = temme_log_survival if abs(q) < TEMME_BELOW else gamma_log_survival
        out = np.array(out, dtype=float)
        out[finite] = method(w[finite], q)
    return out


def solve_log_survival(log_s, q: float, start) -> np.ndarray:
    """w with log S_w(w) = log_s, by Newton's method from `start`. log S_w is concave in w
    (the density is log-concave in w: d^2 log f_w / dw^2 = -k Q^2 e^(Q w) < 0, and log-
    concavity passes to the survival: Bagnoli & Bergstrom 2005, "Log-concave probability
    and its applications", Economic Theory), so Newton converges, monotonically after at
    most one step past the root."""
    log_s, w = np.broadcast_arrays(np.asarray(log_s, float), np.asarray(start, float))
    shape = log_s.shape
    log_s, w = log_s.ravel(), np.array(w, dtype=float).ravel()
    out = np.where(log_s == 0.0, -np.inf, np.inf)  # no time, and never
    pending = np.flatnonzero((log_s < 0.0) & (log_s > -np.inf))
    w = np.where(np.isfinite(w), w, 0.0)
    for _ in range(NEWTON_STEPS):
        if not pending.size:
            break
        x, target = w[pending], log_s[pending]
        current = log_survival_w(x, q)
        slope = -np.exp(log_density_w(x, q) - current)  # d log S_w / dw = -(hazard in w)
        step = (current - target) / slope
        w[pending] = x - step
        pending = pending[~(np.abs(step) <= 1e-15 * (1.0 + np.abs(x)))]
    done = (log_s < 0.0) & (log_s > -np.inf)
    out[done] = w[done]
    return out.reshape(shape)


def gamma_quantile(log_s, q: float) -> np.ndarray:
    """w with log S_w(w) = log_s, for |Q| >= TEMME_BELOW: scipy's inverse incomplete gamma
    functions on whichever of S and 1 - S is the smaller, and Newton's method in the tails
    they cannot reach (a survival below TINY)."""
    shape = np.shape(log_s)
    log_s = np.atleast_1d(np.asarray(log_s, dtype=float))
    k = 1.0 / (q * q)
    failure = -np.expm1(log_s)
    survival = np.exp(log_s)
    upper_inverse, lower_inverse = special.gammainccinv, special.gammaincinv
    small_s = log_s < LOG_HALF
    if q > 0:  # S = Q(k, u)
        u = np.where(small_s, upper_inverse(k, survival), lower_inverse(k, failure))
    else:  # S = P(k, u)
        u = np.where(small_s, lower_inverse(k, survival), upper_inverse(k, failure))
    with np.errstate(divide="ignore"):
        w = np.log(u / k) / q
    deep = (log_s < LOG_TINY) & (log_s > -np.inf)
    if deep.any():
        if q > 0:  # Newton from where the inverse still reaches (log S = LOG_TINY)
            start = math.log(upper_inverse(k, TINY) / k) / q
        else:  # from log P(k, u) ~ k log u - log Gamma(k + 1), exact as u -> 0
            start = ((log_s[deep] + special.gammaln(k + 1.0)) / k - math.log(k)) / q
        w[deep] = solve_log_survival(log_s[deep], q, start)
    w = np.where(log_s == 0.0, -np.inf, np.where(log_s == -np.inf, np.inf, w))
    return w.reshape(shape)
