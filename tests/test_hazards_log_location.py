"""The log-normal and generalised gamma families and the accelerated-failure-time wrapper,
checked against scipy.stats, special cases of the generalised gamma (Cox, Chu, Schneider &
Munoz 2007: Q = 1 is the Weibull, Q = 0 the log-normal) and quadrature of the density.

Tolerances: a few hundred ulps where both sides are closed forms; 1e-10 relative where
Temme's expansion or scipy's incomplete gamma functions for large shapes are involved (their
measured accuracy); Kolmogorov-Smirnov at level 1e-3 with fixed seeds.
"""
import math

import numpy as np
import pytest
from scipy import integrate, special, stats

from microsim.hazards import (GeneralisedGammaHazard, LogNormalHazard, TimeScaledHazard,
                              WeibullHazard, GompertzHazard, LogLogisticHazard,
                              solve_growing_numerically)
from microsim.hazards import incomplete_gamma as ig
from support import KS_LEVEL

TIMES = np.geomspace(0.01, 60.0, 40)


def scipy_generalised_gamma(family):
    """scipy.stats.gengamma(a, c, scale) has density |c| x^(ca-1) e^(-x^c) / Gamma(a)
    (scipy's documentation); T = e^mu (Q^2 Y)^(sigma/Q), Y ~ Gamma(1/Q^2), is it with
    a = 1/Q^2, c = Q/sigma and scale = e^mu (Q^2)^(sigma/Q)."""
    q, sigma = family.q, family.sigma
    return stats.gengamma(a=1 / q ** 2, c=q / sigma,
                          scale=math.exp(family.mu) * (q * q) ** (sigma / q))


GAMMAS = [GeneralisedGammaHazard(1.0, 0.7, 0.5), GeneralisedGammaHazard(1.0, 0.7, -0.5),
          GeneralisedGammaHazard(0.3, 1.2, 2.5), GeneralisedGammaHazard(0.0, 0.5, -1.5),
          GeneralisedGammaHazard(2.0, 0.3, 0.02), GeneralisedGammaHazard(2.0, 0.3, -0.02),
          GeneralisedGammaHazard(2.0, 0.3, 0.005), GeneralisedGammaHazard(2.0, 0.3, -0.005)]
NEW = [LogNormalHazard(1.0, 0.7), LogNormalHazard(-0.5, 1.6)] + GAMMAS


def reference(family):
    if isinstance(family, LogNormalHazard):  # lognorm: log T ~ N(log scale, s)
        return stats.lognorm(s=family.sdlog, scale=math.exp(family.meanlog))
    return scipy_generalised_gamma(family)


def reference_log_density(family, t):
    """log f(t) from scipy.stats.gamma for u = k e^(Q w) with |du/dt| = u |Q| / (sigma t):
    scipy's gengamma.pdf forms x^(ca - 1) with shapes of 10^4 and more, and loses digits."""
    if isinstance(family, LogNormalHazard):
        return reference(family).logpdf(t)
    q, sigma = family.q, family.sigma
    k = 1 / q ** 2
    u = k * np.exp(q * (np.log(t) - family.mu) / sigma)
    return stats.gamma.logpdf(u, a=k) + np.log(u * abs(q) / (sigma * t))


def reference_cdf(family):
    """The distribution function through scipy.stats.gamma of u = k e^(Q w) (gengamma's own
    cdf returns nan for shapes of 10^4 and more)."""
    if isinstance(family, LogNormalHazard):
        return reference(family).cdf
    q, k = family.q, 1 / family.q ** 2

    def cdf(t):
        u = k * np.exp(q * (np.log(t) - family.mu) / family.sigma)
        return stats.gamma.cdf(u, a=k) if q > 0 else stats.gamma.sf(u, a=k)
    return cdf


@pytest.mark.parametrize("family", NEW, ids=repr)
def test_cumulative_hazard_and_hazard_match_scipy(family):
    log_sf = reference(family).logsf(TIMES)
    usable = log_sf > math.log(1e-300)  # scipy's own tails underflow
    np.testing.assert_allclose(family.cumulative_hazard_array(TIMES)[usable], -log_sf[usable],
                               rtol=1e-10)
    np.testing.assert_allclose(family.log_hazard_array(TIMES)[usable],
                               reference_log_density(family, TIMES)[usable] - log_sf[usable],
                               rtol=1e-11, atol=1e-9)


@pytest.mark.parametrize("family", NEW, ids=repr)
def test_inverse_cumulative_hazard_matches_scipy_quantiles(family):
    totals = np.array([1e-8, 1e-3, 0.3, 1.0, 4.0, 20.0])
    ref = reference(family)  # ppf of 1 - S where S is near 1, isf of S elsewhere: no 1 - S
    expected = np.where(totals < 0.5, ref.ppf(-np.expm1(-totals)), ref.isf(np.exp(-totals)))
    np.testing.assert_allclose(family.inverse_cumulative_hazard_array(totals), expected,
                               rtol=1e-9)


@pytest.mark.parametrize("family", NEW, ids=repr)
def test_mean_time_matches_scipy(family):
    assert family.mean_time() == pytest.approx(reference(family).mean(), rel=1e-9)


def test_generalised_gamma_with_q_one_is_the_weibull_into_the_far_tail():
    # reference: Q = 1 is the Weibull with shape 1/sigma, scale e^mu (Cox et al. 2007); the
    # far tail (H up to 2e4) is where the continued fraction takes over from gammaincc
    family, weibull = GeneralisedGammaHazard(0.4, 0.8, 1.0), WeibullHazard(1 / 0.8, math.exp(0.4))
    t = np.geomspace(1e-3, 2e3, 60)
    np.testing.assert_allclose(family.cumulative_hazard_array(t),
                               weibull.cumulative_hazard_array(t), rtol=1e-12)
    np.testing.assert_allclose(family.hazard_array(t), weibull.hazard_array(t), rtol=1e-11)
    totals = np.array([1e-6, 0.5, 30.0, 700.0, 900.0, 1e4])
    np.testing.assert_allclose(family.inverse_cumulative_hazard_array(totals),
                               weibull.inverse_cumulative_hazard_array(totals), rtol=1e-12)


def test_generalised_gamma_with_q_zero_is_the_log_normal():
    # reference: Q = 0 is the log-normal (Cox et al. 2007), here scipy.stats.lognorm
    family = GeneralisedGammaHazard(1.1, 0.6, 0.0)
    ref = stats.lognorm(s=0.6, scale=math.exp(1.1))
    np.testing.assert_allclose(family.cumulative_hazard_array(TIMES), -ref.logsf(TIMES),
                               rtol=1e-13)
    assert family.mean_time() == pytest.approx(ref.mean(), rel=1e-10)


@pytest.mark.parametrize("q", [1e-4, -1e-4, 3e-3, -3e-3, 9.9e-3, -9.9e-3])
def test_temme_expansion_against_quadrature_of_the_exact_density(q):
    # reference: S_w(w) = int_w^inf f_w(v) dv by scipy.integrate.quad, where f_w is the
    # density of w written out, |Q| k^k / Gamma(k) exp(k (Q v - e^(Q v))) with k = 1/Q^2,
    # whose constant log|Q| + k log k - log Gamma(k) - k is -log sqrt(2 pi) - Q^2 / 12 up to
    # O(Q^6) by Stirling's series (Abramowitz & Stegun 1964, 6.1.40); scipy's gammainc
    # for shapes above 10^6 would be off by up to a third here
    k = 1 / q ** 2

    def density(v):
        return math.exp(-0.5 * math.log(2 * math.pi) - q * q / 12
                        + k * (q * v - math.expm1(q * v)))

    for w in (-6.0, -2.0, -0.3, 0.0, 0.7, 2.5, 5.0, 8.0):
        got = float(np.exp(ig.log_survival_w(np.array([w]), q))[0])
        if w > 0:
            upper = integrate.quad(density, w, w + 40, epsabs=0, epsrel=1e-13, limit=200)[0]
            assert got == pytest.approx(upper, rel=1e-10)
        else:
            lower = integrate.quad(density, w - 40, w, epsabs=0, epsrel=1e-13, limit=200)[0]
            assert 1 - got == pytest.approx(lower, rel=1e-10)


def test_temme_taylor_series_meet_their_closed_forms():
    # reference: C0 = 1/(lambda - 1) - 1/eta and C1 = 1/eta^3 - 1/(lambda - 1)^3
    # - 1/(lambda - 1)^2 - 1/(12 (lambda - 1)) (DiDonato & Morris 1986), with
    # eta^2 / 2 = lambda - 1 - log lambda; where the series hands over, both agree
    for y in (-0.4, -0.1, 0.1, 0.4):
        eta = y * math.sqrt(2 * float(ig.g_of(y)))
        m = math.expm1(y)
        c0 = sum(c * eta ** j for j, c in enumerate(ig.C0_SERIES))
        c1 = sum(c * eta ** j for j, c in enumerate(ig.C1_SERIES))
        assert c0 == pytest.approx(1 / m - 1 / eta, rel=1e-9, abs=1e-13)
        assert c1 == pytest.approx(1 / eta ** 3 - 1 / m ** 3 - 1 / m ** 2 - 1 / (12 * m),
                                   rel=1e-6, abs=1e-11)


@pytest.mark.parametrize("q", [0.01, -0.01])
def test_the_two_forms_agree_where_they_meet(q):
    # reference: scipy.special.gammainc/gammaincc (accurate at shape 10^4) against Temme
    w = np.linspace(-8, 8, 33)
    np.testing.assert_allclose(ig.temme_log_survival(w, q), ig.gamma_log_survival(w, q),
                               rtol=1e-10, atol=1e-14)


def test_log_tails_continue_scipy_where_it_still_has_digits():
    # reference: log(scipy.special.gammaincc) and log(gammainc) near 1e-250, inside their range
    k = 4.0
    x = np.array([560.0, 580.0])
    np.testing.assert_allclose(ig.log_upper_tail(k, np.log(x)), np.log(special.gammaincc(k, x)),
                               rtol=1e-13)
    x = np.array([1e-63, 1e-62])
    np.testing.assert_allclose(ig.log_lower_tail(k, np.log(x)), np.log(special.gammainc(k, x)),
                               rtol=1e-13)


@pytest.mark.parametrize("family", NEW + [GeneralisedGammaHazard(0.5, 0.9, -1.2),
                                          GeneralisedGammaHazard(0.5, 0.9, 0.0)], ids=repr)
def test_time_to_reach_inverts_the_cumulative_hazard(family):
    # reference: the definition, H(now + s) - H(now) = extra, into the far tails
    extra = np.array([1e-10, 1e-4, 0.2, 1.0, 5.0, 40.0, 300.0, 800.0])
    for now in (0.0, 1.5):
        s = family.time_to_reach_array(extra, now)
        # a heavy tail may put the time beyond the largest float: inf, and only then
        beyond = np.isinf(s)
        assert np.all(family.cumulative_hazard(np.finfo(float).max) < extra[beyond])
        gained = family.cumulative_hazard_array(now + s) - family.cumulative_hazard(now)
        # atol: H(now) itself carries round-off of its last bit into the difference
        np.testing.assert_allclose(gained[~beyond], extra[~beyond], rtol=1e-9, atol=1e-15)


@pytest.mark.parametrize("family", [LogNormalHazard(0.8, 0.9), GeneralisedGammaHazard(0.8, 0.6, -0.8),
                                    GeneralisedGammaHazard(0.8, 0.6, 0.004)], ids=repr)
def test_sampled_times_follow_scipy(family):
    u = 1.0 - np.random.default_rng(7).random(3000)
    sample = family.sample_times(u)
    statistic = stats.kstest(sample, reference_cdf(family)).statistic
    assert statistic < stats.kstwo.isf(KS_LEVEL, len(sample))


@pytest.mark.parametrize("family", NEW, ids=repr)
def test_scalar_and_array_paths_agree(family):
    t = np.linspace(0.0, 12.0, 13)
    for array_method, scalar_method in (
            (family.hazard_array, family.hazard),
            (family.cumulative_hazard_array, family.cumulative_hazard),
            (family.inverse_cumulative_hazard_array, family.inverse_cumulative_hazard)):
        assert np.array_equal(array_method(t), [scalar_method(x) for x in t])
    assert family.cumulative_hazard(0.0) == 0.0 and family.hazard(0.0) == 0.0
    assert family.time_to_reach(math.inf, 1.0) == math.inf


@pytest.mark.parametrize("build", [
    lambda: LogNormalHazard(0.0, 0.0), lambda: LogNormalHazard(math.nan, 1.0),
    lambda: GeneralisedGammaHazard(0.0, -1.0, 0.5), lambda: GeneralisedGammaHazard(0.0, 1.0, math.inf),
    lambda: TimeScaledHazard(WeibullHazard(1, 1), 0.0),
    lambda: TimeScaledHazard(WeibullHazard(1, 1), np.array([1.0, -2.0])),
])
def test_bad_parameters_raise_value_error(build):
    with pytest.raises(ValueError):
        build()


# --- accelerated failure time --------------------------------------------------------------

def test_time_ratio_on_closed_forms_is_the_family_with_a_longer_scale():
    # reference: S0(t / a) for the Weibull and log-logistic is the same family with scale
    # times a; for the log-normal and generalised gamma, log T moves by log a (scipy.stats)
    a = 2.7
    pairs = [(WeibullHazard(1.4, 3.0), WeibullHazard(1.4, 3.0 * a)),
             (LogLogisticHazard(2.2, 1.5), LogLogisticHazard(2.2, 1.5 * a)),
             (LogNormalHazard(0.5, 0.8), LogNormalHazard(0.5 + math.log(a), 0.8)),
             (GeneralisedGammaHazard(0.5, 0.8, -0.7), GeneralisedGammaHazard(0.5 + math.log(a), 0.8, -0.7))]
    for base, stretched in pairs:
        scaled = TimeScaledHazard(base, a)
        np.testing.assert_allclose(scaled.cumulative_hazard_array(TIMES),
                                   stretched.cumulative_hazard_array(TIMES), rtol=1e-12)
        np.testing.assert_allclose(scaled.hazard_array(TIMES), stretched.hazard_array(TIMES),
                                   rtol=1e-11)
        np.testing.assert_allclose(scaled.time_to_reach_array([0.1, 2.0], 1.0),
                                   stretched.time_to_reach_array([0.1, 2.0], 1.0), rtol=1e-12)
        assert scaled.mean_time() == pytest.approx(stretched.mean_time(), rel=1e-12)


@pytest.mark.parametrize("base", [GompertzHazard(0.05, 0.12), WeibullHazard(0.8, 4.0),
                                  LogNormalHazard(1.0, 0.7)], ids=repr)
@pytest.mark.parametrize("growth", [0.06, -0.05])
def test_time_ratio_under_a_growing_multiplier_solves_the_quadrature(base, growth):
    # reference: solve_growing_numerically applied to the scaled family as it stands
    # (QUADPACK of exp(g v) h0((c + v) / a) / a, and Brent's method): the substitution in
    # the module docstring must give the same root
    scaled = TimeScaledHazard(base, 1.8)
    for extra, now, multiplier in ((0.4, 0.0, 1.0), (1.5, 2.0, 0.7)):
        got = scaled.time_to_reach_growing(extra, now, multiplier, growth)
        expected = solve_growing_numerically(scaled, extra, now, multiplier, growth)
        assert got == pytest.approx(expected, rel=1e-9)
        array = scaled.time_to_reach_growing_array(np.array([extra]), now, multiplier, growth)
        assert array[0] == pytest.approx(expected, rel=1e-9)


def test_time_ratios_over_arrays_are_one_per_patient():
    base = WeibullHazard(1.3, 2.0)
    ratios = np.array([0.5, 1.0, 3.0])
    scaled = TimeScaledHazard(base, ratios)
    got = scaled.time_to_reach_array(np.array([0.7, 0.7, 0.7]), np.array([0.0, 1.0, 2.0]))
    expected = [TimeScaledHazard(base, float(a)).time_to_reach(0.7, now)
                for a, now in zip(ratios, [0.0, 1.0, 2.0])]
    np.testing.assert_allclose(got, expected, rtol=1e-14)
