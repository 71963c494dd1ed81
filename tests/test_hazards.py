"""Hazard families and times to event, checked against scipy and published formulas.

Kolmogorov-Smirnov checks use fixed seeds and reject when the KS statistic passes its
critical value at level 1e-3 (scipy.stats.kstwo, the exact null distribution of the
two-sided statistic for n draws).  Floating-point checks use tolerances a few hundred ulps
wide, or the accuracy requested from the numerical solver.
"""
import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import integrate, special, stats

from microsim.hazards import (ConstantHazard, GompertzHazard, LogLogisticHazard,
                              PiecewiseConstantHazard, WeibullHazard, solve_growing_numerically)
from microsim.hazards.base import solve_growing_array
from support import KS_LEVEL

DRAWS = 3000


def uniforms(seed, n=DRAWS):
    return 1.0 - np.random.default_rng(seed).random(n)  # in (0, 1]


def scipy_twin(family, multiplier=1.0):
    """The scipy.stats distribution whose cumulative hazard is multiplier * H of `family`."""
    if isinstance(family, ConstantHazard):  # expon: H = t / scale
        return stats.expon(scale=1.0 / (multiplier * family.rate))
    if isinstance(family, WeibullHazard):  # weibull_min: H = (t / scale)^c
        scale = family.scale / multiplier ** (1 / family.shape)
        return stats.weibull_min(c=family.shape, scale=scale)
    if isinstance(family, GompertzHazard):  # gompertz: H = c (e^{t/scale} - 1)
        return stats.gompertz(c=multiplier * family.rate / family.shape, scale=1.0 / family.shape)
    # burr12: S = (1 + (t/scale)^c)^{-d}; with d = 1 it is fisk, the log-logistic
    return stats.burr12(c=family.shape, d=multiplier, scale=family.scale)


PARAMETRIC = [ConstantHazard(0.3), WeibullHazard(1.7, 4.0), WeibullHazard(0.6, 2.0),
              GompertzHazard(0.02, 0.15), LogLogisticHazard(2.5, 3.0), LogLogisticHazard(0.8, 1.5)]

# life table for the piecewise checks: survival written out by hand for starts 0, 1, 3
TABLE = PiecewiseConstantHazard(starts=(0.0, 1.0, 3.0), rates=(0.2, 0.0, 0.5))


def table_cumulative_hazard(t):
    """Hand-computed: 0.2 t before 1; flat at 0.2 on [1, 3); 0.2 + 0.5 (t - 3) after 3."""
    t = np.asarray(t, dtype=float)
    return np.where(t < 1.0, 0.2 * t, np.where(t < 3.0, 0.2, 0.2 + 0.5 * (t - 3.0)))


def assert_ks(sample, cdf):
    statistic = stats.kstest(sample, cdf).statistic
    critical = stats.kstwo.isf(KS_LEVEL, len(sample))
    assert statistic < critical, f"KS statistic {statistic:.4f} >= {critical:.4f}"


# --- closed forms against scipy.stats ------------------------------------------------------

@pytest.mark.parametrize("family", PARAMETRIC, ids=repr)
def test_cumulative_hazard_and_hazard_match_scipy(family):
    twin, t = scipy_twin(family), np.linspace(0.05, 25.0, 60)
    # reference: H = -log S and h = f / S, from scipy.stats logsf and logpdf
    np.testing.assert_allclose(family.cumulative_hazard_array(t), -twin.logsf(t), rtol=1e-12)
    np.testing.assert_allclose(family.hazard_array(t), np.exp(twin.logpdf(t) - twin.logsf(t)),
                               rtol=1e-11)
    np.testing.assert_allclose(family.survival_array(t), twin.sf(t), rtol=1e-12)
    assert family.cumulative_hazard(7.5) == pytest.approx(-twin.logsf(7.5), rel=1e-12)
    assert family.hazard(7.5) == pytest.approx(twin.pdf(7.5) / twin.sf(7.5), rel=1e-11)
    assert family.survival(7.5) == pytest.approx(twin.sf(7.5), rel=1e-12)


@pytest.mark.parametrize("family", PARAMETRIC, ids=repr)
def test_inverse_cumulative_hazard_matches_scipy_isf(family):
    twin, u = scipy_twin(family), np.linspace(0.01, 0.99, 50)
    # reference: the time where S = u is scipy's inverse survival function isf(u)
    np.testing.assert_allclose(family.inverse_cumulative_hazard_array(-np.log(u)), twin.isf(u),
                               rtol=1e-10)
    t = np.linspace(0.0, 20.0, 41)
    np.testing.assert_allclose([family.inverse_cumulative_hazard(family.cumulative_hazard(x))
                                for x in t], t, rtol=1e-12, atol=1e-14)


def test_weibull_and_log_logistic_hazard_at_zero():
    # reference: h(0) is infinite for shape < 1, 1/scale for shape 1, 0 above (from the formula)
    for family_type in (WeibullHazard, LogLogisticHazard):
        assert family_type(0.5, 2.0).hazard(0.0) == math.inf
        assert family_type(1.0, 2.0).hazard(0.0) == 0.5
        assert family_type(3.0, 2.0).hazard(0.0) == 0.0
        np.testing.assert_array_equal(family_type(0.5, 2.0).hazard_array([0.0]), [math.inf])


def test_piecewise_against_hand_computed_table():
    t = np.array([0.0, 0.5, 1.0, 2.0, 2.999, 3.0, 4.0, 10.0])
    np.testing.assert_allclose(TABLE.cumulative_hazard_array(t), table_cumulative_hazard(t),
                               rtol=1e-14)
    np.testing.assert_allclose(TABLE.hazard_array(t), [0.2, 0.2, 0, 0, 0, 0.5, 0.5, 0.5])
    # smallest time with H = 0.2 is the start of the flat piece, t = 1 (hand-computed)
    assert TABLE.inverse_cumulative_hazard(0.2) == pytest.approx(1.0, rel=1e-14)
    assert TABLE.inverse_cumulative_hazard(0.7) == pytest.approx(4.0, rel=1e-14)
    # hand-computed: from now = 2 (flat piece), H grows by 0.25 at 3 + 0.25 / 0.5 = 3.5
    assert TABLE.time_to_reach(0.25, now=2.0) == pytest.approx(1.5, rel=1e-14)
    stopping = PiecewiseConstantHazard(starts=(0.0, 2.0), rates=(0.1, 0.0))
    assert stopping.inverse_cumulative_hazard(0.25) == math.inf  # H never passes 0.2
    assert stopping.mean_time() == math.inf


def test_gompertz_cure_fraction_inverse():
    # reference: with shape < 0, H rises to rate / |shape| and no further (Gompertz formula)
    family = GompertzHazard(0.3, -0.5)
    assert family.inverse_cumulative_hazard(0.6) == math.inf
    assert family.cumulative_hazard(family.inverse_cumulative_hazard(0.59)) == pytest.approx(0.59)
    assert ConstantHazard(0.0).sample_time(0.5) == math.inf
    assert GompertzHazard(0.0, 0.1).sample_time(0.5) == math.inf


# --- sampling: KS against scipy, with a multiplier and left truncation -------------------------

@pytest.mark.parametrize("multiplier, now", [(1.0, 0.0), (2.5, 0.0), (0.4, 3.0)])
@pytest.mark.parametrize("family", PARAMETRIC, ids=repr)
def test_sampled_times_follow_scipy_distribution(family, multiplier, now):
    twin = scipy_twin(family, multiplier)
    sample = [family.sample_time(u, multiplier, now) for u in uniforms(11)]
    # reference: conditional distribution given survival to `now`, 1 - sf(now + s) / sf(now)
    assert_ks(sample, lambda s: -np.expm1(twin.logsf(now + s) - twin.logsf(now)))


@pytest.mark.parametrize("multiplier, now", [(1.0, 0.0), (1.7, 2.0), (0.6, 0.5)])
def test_sampled_piecewise_times_follow_hand_computed_survival(multiplier, now):
    sample = TABLE.sample_times(uniforms(12), multiplier, now)
    # reference: S(t) = exp(-H(t)) with H written out by hand, scaled by the multiplier
    conditional = lambda s: -np.expm1(-multiplier * (table_cumulative_hazard(now + s)
                                                     - table_cumulative_hazard(now)))
    assert_ks(sample, conditional)


def test_gompertz_cure_fraction_sampling():
    family, multiplier, now = GompertzHazard(0.3, -0.5), 1.3, 2.0
    sample = np.array([family.sample_time(u, multiplier, now) for u in uniforms(13)])
    # reference (Gompertz formula): from `now`, m H grows by at most m rate e^{shape now}/|shape|
    reach = multiplier * family.rate * math.exp(family.shape * now) / -family.shape
    cured = math.exp(-reach)
    never = np.isinf(sample)
    z = (never.mean() - cured) / math.sqrt(cured * (1 - cured) / DRAWS)
    assert abs(z) < 4  # binomial standard error
    finite_cdf = lambda s: -np.expm1(-reach * -np.expm1(family.shape * s)) / (1 - cured)
    assert_ks(sample[~never], finite_cdf)


# --- growing multiplier m(s) = m0 exp(growth s) ----------------------------------------------

@pytest.mark.parametrize("now", [0.0, 4.0])
def test_constant_base_with_growth_is_scipy_gompertz(now):
    family, m0, growth, u = ConstantHazard(0.05), 1.8, 0.09, uniforms(14, 200)
    # reference: hazard m0 rate e^{growth s} is gompertz(c = m0 rate / growth, scale = 1/growth)
    twin = stats.gompertz(c=m0 * family.rate / growth, scale=1.0 / growth)
    np.testing.assert_allclose(family.sample_times(u, m0, now, growth), twin.isf(u), rtol=1e-10)
    assert family.sample_time(u[0], m0, now, growth) == pytest.approx(twin.isf(u[0]), rel=1e-10)


def test_gompertz_base_with_growth_is_scipy_gompertz():
    family, m0, now, growth, u = GompertzHazard(0.01, 0.08), 0.7, 5.0, 0.03, uniforms(15, 200)
    # reference: m0 rate e^{shape (now + s)} e^{growth s} is Gompertz with shape + growth
    rate_now = m0 * family.rate * math.exp(family.shape * now)
    twin = stats.gompertz(c=rate_now / (family.shape + growth), scale=1 / (family.shape + growth))
    np.testing.assert_allclose(family.sample_times(u, m0, now, growth), twin.isf(u), rtol=1e-10)


CLOSED_FORM_GROWING = [
    (ConstantHazard(0.2), 0.1), (ConstantHazard(0.2), -0.1),
    (GompertzHazard(0.05, 0.1), 0.05), (GompertzHazard(0.05, 0.1), -0.3),
    (GompertzHazard(0.4, -0.2), 0.1),
]


@pytest.mark.parametrize("family, growth", CLOSED_FORM_GROWING, ids=repr)
def test_numerical_growth_path_agrees_with_closed_form(family, growth):
    for extra in (0.05, 0.4, 1.2, 3.0):
        for now, m0 in ((0.0, 1.0), (1.5, 2.2), (3.5, 0.6)):
            exact = family.time_to_reach_growing(extra, now, m0, growth)
            numeric = solve_growing_numerically(family, extra, now, m0, growth)
            # reference: Gompertz closed form (Austin 2012, from memory) vs quadrature + Brent
            if math.isinf(exact):
                assert math.isinf(numeric)
            else:
                assert numeric == pytest.approx(exact, rel=1e-8, abs=1e-12)


@pytest.mark.parametrize("family, growth", [
    (TABLE, 0.2), (TABLE, -0.15), (PiecewiseConstantHazard((0.0, 2.0, 5.0), (0.1, 0.4, 0.0)), 0.05),
], ids=repr)
def test_piecewise_growth_solves_quadrature_cumulative_hazard(family, growth):
    for now, m0 in ((0.0, 1.0), (1.5, 2.2), (3.5, 0.6)):
        # reference: scipy.integrate.quad of m0 e^{growth v} h(now + v), split at the breakpoints
        breaks = [b - now for b in family.starts if b > now]
        gained = lambda s: m0 * integrate.quad(
            lambda v: math.exp(growth * v) * family.hazard(now + v), 0.0, s,
            points=[b for b in breaks if b < s] or None, epsabs=0, epsrel=1e-12, limit=200)[0]
        last = breaks[-1] if breaks else 0.0  # the last piece, smooth, integrated to inf alone
        tail = m0 * integrate.quad(lambda v: math.exp(growth * v) * family.rates[-1], last,
                                   math.inf)[0] if family.rates[-1] > 0 and growth < 0 else 0.0
        total = gained(last) + tail if growth < 0 or family.rates[-1] == 0.0 else math.inf
        for extra in (0.05, 0.4, 1.2, 3.0):
            s = family.time_to_reach_growing(extra, now, m0, growth)
            if extra >= total:
                assert s == math.inf  # G(inf) falls short: the event never happens
            else:
                assert gained(s) == pytest.approx(extra, rel=1e-10)


def weibull_growing_cumulative_hazard(family, now, m0, growth, s):
    """m0 int_0^s e^{growth v} h(now + v) dv from special functions.

    With phi(t) = int_0^t e^{growth w} h(w) dw = (t/scale)^k M(k, k + 1, growth t) (DLMF 8.5.1,
    gamma(a, z) = z^a M(a, a + 1, -z) / a), the integral is m0 e^{-growth now} (phi(now + s) -
    phi(now)); for growth < 0 phi is also k scale^-k |growth|^-k Gamma(k) P(k, |growth| t).
    """
    k, scale = family.shape, family.scale
    if growth < 0:
        rate = -growth
        whole = k * scale ** -k * rate ** -k * special.gamma(k)
        phi = lambda t: whole * special.gammainc(k, rate * t)
    else:
        phi = lambda t: (t / scale) ** k * special.hyp1f1(k, k + 1, growth * t)
    return m0 * math.exp(-growth * now) * (phi(now + s) - phi(now))


@pytest.mark.parametrize("shape", [0.7, 1.8])
@pytest.mark.parametrize("growth", [0.15, -0.4])
def test_weibull_growth_solves_special_function_cumulative_hazard(shape, growth):
    family = WeibullHazard(shape, 3.0)
    for now, m0 in ((0.0, 1.0), (2.5, 1.6)):
        total = (weibull_growing_cumulative_hazard(family, now, m0, growth, math.inf)
                 if growth < 0 else math.inf)
        for extra in (0.02, 0.3, 1.1, 2.5):
            s = family.time_to_reach_growing(extra, now, m0, growth)
            if growth < 0 and extra >= total:
                assert s == math.inf  # beyond G(inf): the event never happens
            else:
                reached = weibull_growing_cumulative_hazard(family, now, m0, growth, s)
                assert reached == pytest.approx(extra, rel=1e-9)


@pytest.mark.parametrize("growth", [0.2, -0.2])
@pytest.mark.parametrize("now", [0.0, 1.5])
def test_log_logistic_growth_agrees_with_ode_solution(growth, now):
    family, m0 = LogLogisticHazard(2.5, 2.0), 1.4
    extras = (0.1, 0.5, 0.9)
    # reference: scipy.integrate.solve_ivp (DOP853) integrating dG/ds = m0 e^{growth s} h(now + s)
    rhs = lambda s, g: [m0 * math.exp(growth * s) * family.hazard(now + s)]
    events = [lambda s, g, x=x: g[0] - x for x in extras]
    solution = integrate.solve_ivp(rhs, (0.0, 200.0), [0.0], method="DOP853", events=events,
                                   rtol=1e-12, atol=1e-14)
    for extra, crossing in zip(extras, solution.t_events):
        assert family.time_to_reach_growing(extra, now, m0, growth) == pytest.approx(
            crossing[0], rel=1e-8)


def test_growth_solver_brackets_a_root_far_below_the_answer_without_growth():
    # without growth this draw needs H to grow by 28 (t ~ e^35); with growth the root is
    # near 19, and a bracket as wide as e^35 once made Brent's method give up
    family, extra, now, m0, growth = LogLogisticHazard(0.8, 1.5), 1.42, 1.67, 0.05, 0.27
    assert family.time_to_reach(extra / m0, now) > 1e14
    # reference: scipy.integrate.solve_ivp (DOP853) of dG/ds = m0 e^{growth s} h(now + s)
    rhs = lambda s, g: [m0 * math.exp(growth * s) * family.hazard(now + s)]
    solution = integrate.solve_ivp(rhs, (0.0, 100.0), [0.0], method="DOP853",
                                   events=[lambda s, g: g[0] - extra], rtol=1e-12, atol=1e-14)
    crossing = solution.t_events[0][0]
    assert family.time_to_reach_growing(extra, now, m0, growth) == pytest.approx(crossing, rel=1e-8)
    assert family.time_to_reach_growing_array([extra], now, m0, growth)[0] == pytest.approx(
        crossing, rel=1e-8)


# --- the growing multiplier over arrays (solve_growing_array) --------------------------------

def growing_cases(seed, n):
    """Draws, clock values (a third at the clock's origin), multipliers and growth rates."""
    rng = np.random.default_rng(seed)
    extra = -np.log(rng.random(n))
    now = np.where(rng.random(n) < 1 / 3, 0.0, rng.uniform(0.0, 3.0, n))
    return extra, now, np.exp(rng.normal(0.0, 1.0, n)), rng.uniform(-0.3, 0.3, n)


@pytest.mark.parametrize("shape", [0.5, 1.0, 1.8, 4.0])
def test_weibull_growth_over_arrays_solves_special_function_cumulative_hazard(shape):
    family, limit = WeibullHazard(shape, 3.0), 4.0
    extra, now, m0, growth = growing_cases(17, 300)
    s = solve_growing_array(family, extra, now, m0, growth, limit)
    # reference: DLMF 8.5.1 closed form of G (weibull_growing_cumulative_hazard above); the
    # array solver is held to 1e-11, tighter than the scalar solver's own 1e-9
    for x, a, m, g, t in zip(extra, now, m0, growth, s):
        total = weibull_growing_cumulative_hazard(family, a, m, g, limit)
        if x > total * (1 + 1e-9):  # beyond the limit: reported as never
            assert t == math.inf
        elif x < total * (1 - 1e-9):
            assert weibull_growing_cumulative_hazard(family, a, m, g, t) == pytest.approx(
                x, rel=1e-11)
    assert np.isfinite(s).sum() > 100 and np.isinf(s).sum() > 5  # both cases are exercised


@pytest.mark.parametrize("shape", [0.8, 2.5])
def test_log_logistic_growth_over_arrays_agrees_with_ode_solution(shape):
    family, m0, now = LogLogisticHazard(shape, 2.0), 1.4, 1.5
    extras = np.array([0.1, 0.5, 0.9, 1.7])
    for growth in (0.2, -0.2):
        # reference: scipy.integrate.solve_ivp (DOP853) of dG/ds = m0 e^{growth s} h(now + s)
        rhs = lambda s, g: [m0 * math.exp(growth * s) * family.hazard(now + s)]
        events = [lambda s, g, x=x: g[0] - x for x in extras]
        solution = integrate.solve_ivp(rhs, (0.0, 60.0), [0.0], method="DOP853",
                                       events=events, rtol=1e-12, atol=1e-14)
        crossings = [t[0] if len(t) else math.inf for t in solution.t_events]
        got = solve_growing_array(family, extras, now, m0, growth, 60.0)
        np.testing.assert_allclose(got, crossings, rtol=1e-8)


@pytest.mark.parametrize("family", [WeibullHazard(0.7, 3.0), WeibullHazard(1.8, 3.0),
                                    LogLogisticHazard(2.5, 2.0), LogLogisticHazard(0.8, 1.5)],
                         ids=repr)
def test_growth_over_arrays_agrees_with_the_scalar_solver(family):
    extra, now, m0, growth = growing_cases(18, 200)
    scalar = np.array([solve_growing_numerically(family, *args)
                       for args in zip(extra, now, m0, growth)])
    # reference: quadrature + Brent (scalar, rtol 1e-12): with no limit, and with a limit,
    # beyond which the array solver may stop and say inf
    np.testing.assert_allclose(family.time_to_reach_growing_array(extra, now, m0, growth),
                               scalar, rtol=1e-10)
    limited = solve_growing_array(family, extra, now, m0, growth, 4.0)
    inside = scalar < 4.0 * (1 - 1e-9)
    np.testing.assert_allclose(limited[inside], scalar[inside], rtol=1e-10)
    assert np.all((limited[~inside] == math.inf) | (limited[~inside] > 4.0 * (1 - 1e-8)))


def test_growth_over_arrays_edges():
    family = WeibullHazard(1.5, 2.0)
    # no draw left: now; a zero multiplier: never (the definition of the time to reach)
    assert solve_growing_array(family, [0.0, 0.5], 1.0, [1.0, 0.0], 0.1).tolist() == [0.0, math.inf]
    # growth so fast that one piece would span more than e^8: the scalar solver, exactly
    extra, now = np.array([0.3, 2.0]), np.array([0.0, 1.0])
    fast = solve_growing_array(family, extra, now, 1e-6, 3.0, 50.0)
    assert fast.tolist() == [solve_growing_numerically(family, x, a, 1e-6, 3.0)
                             for x, a in zip(extra, now)]
    # falling growth with no limit may never be reached: the scalar solver decides
    slow = solve_growing_array(family, extra, now, 0.2, -0.5)
    assert slow.tolist() == [solve_growing_numerically(family, x, a, 0.2, -0.5)
                             for x, a in zip(extra, now)]


def test_piecewise_growth_over_arrays_walks_like_the_scalar_path():
    family = PiecewiseConstantHazard((0.0, 1.0, 3.0, 6.0), (0.2, 0.0, 0.5, 0.1))
    extra, now, m0, growth = growing_cases(19, 2000)
    growth[:100] = 0.0
    expected = [family.time_to_reach_growing(*args) for args in zip(extra, now, m0, growth)]
    # reference: the scalar walk over the pieces (checked against quadrature above); the
    # same arithmetic, so equal to the last bits numpy's exp and log1p may differ in
    np.testing.assert_allclose(family.time_to_reach_growing_array(extra, now, m0, growth),
                               expected, rtol=1e-14)


# --- vectorised and scalar paths -------------------------------------------------------------

ALL_FAMILIES = PARAMETRIC + [TABLE, GompertzHazard(0.3, -0.5),
                             PiecewiseConstantHazard((0.0, 2.0, 5.0), (0.1, 0.4, 0.0))]


@pytest.mark.parametrize("family", ALL_FAMILIES, ids=repr)
def test_vectorised_and_scalar_paths_agree(family):
    rng = np.random.default_rng(16)
    n = 40
    u, m, now = 1.0 - rng.random(n), rng.uniform(0.3, 3.0, n), rng.uniform(0.0, 6.0, n)
    growth = np.where(np.arange(n) < 34, 0.0, rng.uniform(-0.2, 0.2, n))  # 6 growing draws
    scalar = [family.sample_time(*args) for args in zip(u, m, now, growth)]
    np.testing.assert_allclose(family.sample_times(u, m, now, growth), scalar, rtol=1e-12)
    t = np.linspace(0.1, 12.0, 25)
    for array_method, scalar_method in (
            (family.hazard_array, family.hazard),
            (family.cumulative_hazard_array, family.cumulative_hazard),
            (family.survival_array, family.survival),
            (family.inverse_cumulative_hazard_array, family.inverse_cumulative_hazard)):
        np.testing.assert_allclose(array_method(t), [scalar_method(x) for x in t], rtol=1e-12)


def test_sample_times_broadcasts_scalars():
    family = WeibullHazard(1.3, 2.0)
    times = family.sample_times(np.array([0.2, 0.5, 0.9]), multiplier=2.0, now=1.0)
    assert times.shape == (3,)
    assert float(family.sample_times(0.5)) == family.sample_time(0.5)


def test_log_logistic_large_extra_takes_log_form():
    # reference: (t/scale)^k = (1 + (now/scale)^k) e^x - 1 (log-logistic H, from the formula)
    family, extra, now = LogLogisticHazard(2.0, 1.5), 720.0, 0.5
    expected = family.scale * math.exp((extra + math.log1p((now / family.scale) ** 2)) / 2) - now
    assert family.time_to_reach(extra, now) == pytest.approx(expected, rel=1e-12)
    assert family.time_to_reach_array([extra], now)[0] == pytest.approx(expected, rel=1e-12)


@settings(max_examples=150, deadline=None)
@given(rates=st.lists(st.one_of(st.just(0.0), st.floats(1e-3, 10.0)), min_size=1, max_size=6),
       widths=st.lists(st.floats(0.1, 5.0), min_size=5, max_size=5),
       now=st.floats(0.0, 20.0), extra=st.floats(1e-6, 5.0))
def test_piecewise_time_to_reach_is_the_smallest_root(rates, widths, now, extra):
    starts = np.concatenate([[0.0], np.cumsum(widths[: len(rates) - 1])])
    family = PiecewiseConstantHazard(tuple(starts), tuple(rates))
    s = family.time_to_reach(extra, now)
    gained = lambda t: family.cumulative_hazard(now + t) - family.cumulative_hazard(now)
    # reference: definition of the inverse, smallest s >= 0 with H(now + s) - H(now) = extra
    if rates[-1] == 0.0 and gained(1e9) < extra * (1 - 1e-12):
        assert s == math.inf
        return
    assert gained(s) == pytest.approx(extra, rel=1e-9, abs=1e-12)
    assert gained(max(s - 1e-6 * (1 + s), 0.0)) < extra


# --- expected time to event -----------------------------------------------------------------

@pytest.mark.parametrize("family", PARAMETRIC, ids=repr)
def test_mean_time_matches_scipy(family):
    if isinstance(family, LogLogisticHazard) and family.shape <= 1:
        # reference: the log-logistic mean diverges for shape <= 1 (scipy's fisk gives nan)
        assert family.mean_time() == math.inf
        return
    # reference: scipy.stats mean
    assert family.mean_time() == pytest.approx(scipy_twin(family).mean(), rel=1e-10)


def test_mean_time_of_gompertz_and_piecewise_against_quadrature():
    # reference: E[T] = int_0^inf S(t) dt (common practice), by scipy.integrate.quad
    large_ratio = GompertzHazard(2.0, 1e-3)  # rate / shape = 2000: the asymptotic series
    integral = integrate.quad(large_ratio.survival, 0, math.inf, epsabs=0, epsrel=1e-12)[0]
    assert large_ratio.mean_time() == pytest.approx(integral, rel=1e-10)
    pieces = integrate.quad(lambda t: math.exp(-table_cumulative_hazard(t)), 0, math.inf,
                            points=None, epsabs=0, epsrel=1e-12)[0]
    assert TABLE.mean_time() == pytest.approx(pieces, rel=1e-8)
    assert GompertzHazard(0.1, -0.2).mean_time() == math.inf
    assert GompertzHazard(0.1, 0.0).mean_time() == pytest.approx(10.0, rel=1e-15)


# --- parameters checked at construction -----------------------------------------------------

@pytest.mark.parametrize("build", [
    lambda: ConstantHazard(-0.1), lambda: ConstantHazard(math.nan),
    lambda: WeibullHazard(0.0, 1.0), lambda: WeibullHazard(1.0, -2.0),
    lambda: WeibullHazard(math.inf, 1.0), lambda: GompertzHazard(-0.1, 0.1),
    lambda: GompertzHazard(0.1, math.nan), lambda: LogLogisticHazard(1.0, 0.0),
    lambda: PiecewiseConstantHazard((0.0, 1.0), (0.1,)),
    lambda: PiecewiseConstantHazard((1.0, 2.0), (0.1, 0.1)),
    lambda: PiecewiseConstantHazard((0.0, 2.0, 1.0), (0.1, 0.1, 0.1)),
    lambda: PiecewiseConstantHazard((0.0,), (-1.0,)),
    lambda: PiecewiseConstantHazard((), ()),
])
def test_bad_parameters_raise_value_error(build):
    with pytest.raises(ValueError):
        build()


def test_families_are_frozen_and_comparable():
    family = WeibullHazard(2, 3)
    assert family == WeibullHazard(2.0, 3.0) and hash(family) == hash(WeibullHazard(2.0, 3.0))
    assert TABLE == PiecewiseConstantHazard([0, 1, 3], [0.2, 0, 0.5])
    with pytest.raises(AttributeError):
        family.shape = 1.0
