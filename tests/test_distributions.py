"""PSA parameter distributions checked against scipy.stats and published closed forms.

Monte-Carlo checks use fixed seeds and |z| < 4 with standard errors estimated from the
sample itself: mean SE = sd/sqrt(n); variance SE = sqrt((m4 - s^4)/n) (common practice).
"""
import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import stats

from microsim.uncertainty.distributions import (
    Beta, Dirichlet, Fixed, Gamma, LogNormal, Normal, Uniform, correlation_root,
    draw_parameters, draws_table, make_distribution,
)
from support import assert_moments_match

N_DRAWS = 200_000


def uniforms(seed, *shape):
    return np.random.default_rng(seed).random(shape)


@pytest.mark.parametrize("ours, reference", [
    (Beta(2.5, 7.0), stats.beta(2.5, 7.0)),
    (Gamma(3.0, 150.0), stats.gamma(3.0, scale=150.0)),
    (LogNormal(-0.4, 0.3), stats.lognorm(s=0.3, scale=math.exp(-0.4))),
    (Normal(1.5, 0.2), stats.norm(1.5, 0.2)),
    (Uniform(10.0, 14.0), stats.uniform(10.0, 4.0)),
])
def test_scalar_draws_match_scipy_moments(ours, reference):
    # Reference: scipy.stats frozen distributions (mean, var), and for the closed-form
    # properties the textbook moments of each family.
    assert ours.mean == pytest.approx(reference.mean(), rel=1e-12)
    assert ours.variance == pytest.approx(reference.var(), rel=1e-12)
    assert_moments_match(ours.ppf(uniforms(1, N_DRAWS)), reference.mean(), reference.var())


@pytest.mark.parametrize("ours, reference", [
    (Beta(0.7, 3.0), stats.beta(0.7, 3.0)),
    (Gamma(0.5, 2.0), stats.gamma(0.5, scale=2.0)),
    (LogNormal(1.0, 0.8), stats.lognorm(s=0.8, scale=math.e)),
])
def test_ppf_agrees_with_scipy_quantiles(ours, reference):
    # Reference: scipy.stats ppf at fixed probabilities, including the support ends.
    u = np.array([0.0, 1e-9, 0.025, 0.5, 0.975, 1 - 1e-9, 1.0])
    np.testing.assert_allclose(ours.ppf(u), reference.ppf(u), rtol=1e-9)


def test_dirichlet_draws_match_scipy_moments():
    # Reference: scipy.stats.dirichlet.mean/var, i.e. mean alpha_i/alpha_0 and variance
    # alpha_i (alpha_0 - alpha_i) / (alpha_0^2 (alpha_0 + 1)).
    alphas = (2.0, 5.0, 0.8, 12.0)
    ours = Dirichlet(alphas)
    np.testing.assert_allclose(ours.mean, stats.dirichlet.mean(alphas), rtol=1e-12)
    np.testing.assert_allclose(ours.variance, stats.dirichlet.var(alphas), rtol=1e-12)
    rows = ours.ppf(uniforms(2, N_DRAWS, len(alphas)))
    np.testing.assert_allclose(rows.sum(axis=1), 1.0, rtol=1e-12)  # probabilities by definition
    for i in range(len(alphas)):
        assert_moments_match(rows[:, i], stats.dirichlet.mean(alphas)[i], stats.dirichlet.var(alphas)[i])


@settings(max_examples=40, deadline=None)
@given(mean=st.floats(0.02, 0.98), relative_sd=st.floats(0.01, 0.95))
def test_beta_method_of_moments_round_trip(mean, relative_sd):
    # Reference: scipy.stats.beta mean/std of the fitted parameters (Briggs et al. 2006 ch. 4).
    sd = relative_sd * math.sqrt(mean * (1 - mean))
    fitted = Beta.from_mean_sd(mean, sd)
    reference = stats.beta(fitted.alpha, fitted.beta)
    assert reference.mean() == pytest.approx(mean, rel=1e-9)
    assert reference.std() == pytest.approx(sd, rel=1e-9)


@settings(max_examples=40, deadline=None)
@given(mean=st.floats(1e-3, 1e5), cv=st.floats(0.01, 5.0))
def test_gamma_and_lognormal_method_of_moments_round_trip(mean, cv):
    # Reference: scipy.stats.gamma and scipy.stats.lognorm mean/std (Briggs et al. 2006 ch. 4).
    sd = cv * mean
    gamma = Gamma.from_mean_sd(mean, sd)
    lognormal = LogNormal.from_mean_sd(mean, sd)
    for reference in (stats.gamma(gamma.shape, scale=gamma.scale),
                      stats.lognorm(s=lognormal.sdlog, scale=math.exp(lognormal.meanlog))):
        assert reference.mean() == pytest.approx(mean, rel=1e-9)
        assert reference.std() == pytest.approx(sd, rel=1e-9)


def test_beta_moments_by_hand():
    # Hand-derived from alpha = m(m(1-m)/s^2 - 1): m = 0.3, s = 0.1 gives 0.21/0.01 - 1 = 20,
    # so alpha = 6, beta = 14 (Briggs et al. 2006 ch. 4 formula).
    fitted = Beta.from_mean_sd(0.3, 0.1)
    assert (fitted.alpha, fitted.beta) == (pytest.approx(6.0), pytest.approx(14.0))


@pytest.mark.parametrize("build", [
    lambda: Beta(0, 1), lambda: Beta(1, -2), lambda: Gamma(1, 0), lambda: LogNormal(0, 0),
    lambda: Normal(0, -1), lambda: Uniform(2, 2), lambda: Fixed(float("nan")),
    lambda: Dirichlet((1.0,)), lambda: Dirichlet((1.0, 0.0)), lambda: Beta("a", 1),
    lambda: Beta.from_mean_sd(0.5, 0.5), lambda: Beta.from_mean_sd(1.2, 0.1),
    lambda: Gamma.from_mean_sd(-1, 1), lambda: LogNormal.from_mean_sd(1, 0),
])
def test_bad_parameters_are_refused_at_construction(build):
    # Parameter spaces of each family (common practice): refusal is a ValueError.
    with pytest.raises(ValueError):
        build()


def test_make_distribution_reads_family_names_and_mean_sd():
    # Same fitted values as Beta.from_mean_sd (hand-derived alpha = 6, beta = 14 above).
    assert make_distribution("beta", {"mean": 0.3, "sd": 0.1}) == Beta.from_mean_sd(0.3, 0.1)
    assert make_distribution("dirichlet", {"alphas": [1, 2, 3]}) == Dirichlet((1.0, 2.0, 3.0))
    for family, params in (("weibull", {"shape": 1}), ("gamma", {"shape": 1}), ("normal", {"mean": 0, "sd": 1, "x": 2})):
        with pytest.raises(ValueError):
            make_distribution(family, params)


def test_uniforms_outside_unit_interval_are_refused():
    for bad in (np.array([0.5, 1.5]), np.array([np.nan])):
        with pytest.raises(ValueError):
            Normal(0, 1).ppf(bad)


def test_draws_without_correlation_read_each_parameter_from_its_own_columns():
    # Column layout contract: Fixed takes one column, Dirichlet k, all in mapping order;
    # values agree with scipy.stats quantiles of the same uniforms.
    parameters = {"p": Beta(2, 3), "row": Dirichlet((1.0, 2.0, 3.0)), "hold": Fixed(7.0), "c": Gamma(2.0, 10.0)}
    u = uniforms(3, 50, 6)
    draws = draw_parameters(parameters, u)
    np.testing.assert_allclose(draws["p"], stats.beta(2, 3).ppf(u[:, 0]), rtol=1e-10)
    gammas = stats.gamma(np.array([1.0, 2.0, 3.0])).ppf(u[:, 1:4])
    np.testing.assert_allclose(draws["row"], gammas / gammas.sum(axis=1, keepdims=True), rtol=1e-10)
    np.testing.assert_array_equal(draws["hold"], 7.0)
    np.testing.assert_allclose(draws["c"], stats.gamma(2.0, scale=10.0).ppf(u[:, 5]), rtol=1e-10)
    # An identity correlation leaves the draws as they were.
    with_identity = draw_parameters(parameters, u, np.eye(3))
    for name in draws:
        np.testing.assert_allclose(with_identity[name], draws[name], rtol=1e-10, atol=1e-14)
    with pytest.raises(ValueError):
        draw_parameters(parameters, u[:, :5])


@pytest.mark.parametrize("rho", [0.7, -0.4])
def test_gaussian_copula_gives_the_target_rank_correlation(rho):
    # Reference: for a Gaussian copula with correlation rho, Spearman's rank correlation is
    # (6/pi) arcsin(rho/2) (Pearson 1907 / Kruskal 1958, from memory). Spearman's rho equals
    # 12 E[F1(X) F2(Y)] - 3, estimated with grades from scipy.stats cdfs, so its SE is
    # 12 sd(F1 F2)/sqrt(n). The marginals must stay as specified.
    parameters = {"p": Beta(3.0, 9.0), "row": Dirichlet((2.0, 2.0)), "c": Gamma(2.0, 500.0)}
    correlation = np.array([[1.0, rho], [rho, 1.0]])
    draws = draw_parameters(parameters, uniforms(4, N_DRAWS, 4), correlation)
    grades = stats.beta(3.0, 9.0).cdf(draws["p"]) * stats.gamma(2.0, scale=500.0).cdf(draws["c"])
    estimate = 12 * grades.mean() - 3
    z = (estimate - 6 / math.pi * math.asin(rho / 2)) / (12 * grades.std(ddof=1) / math.sqrt(N_DRAWS))
    assert abs(z) < 4, z
    assert_moments_match(draws["c"], 1000.0, 2.0 * 500.0**2)
    # Dirichlet components stay independent of the copula: rank correlation near 0.
    rank_corr = stats.spearmanr(draws["row"][:, 0], draws["p"]).statistic
    assert abs(rank_corr) * math.sqrt(N_DRAWS - 1) < 4  # null SE 1/sqrt(n-1) (common practice)


def test_bad_correlation_matrices_are_refused_naming_the_smallest_eigenvalue():
    # Eigenvalues of [[1, .9, .9], [.9, 1, -.9], [.9, -.9, 1]]: 1.9, 1.9, -0.8 (numpy.linalg).
    not_psd = np.array([[1, 0.9, 0.9], [0.9, 1, -0.9], [0.9, -0.9, 1]])
    smallest = np.linalg.eigvalsh(not_psd).min()
    with pytest.raises(ValueError, match=f"{smallest:.6g}"):
        correlation_root(not_psd)
    for bad in ([[1, 0.5], [0.4, 1]], [[2, 0], [0, 1]], [[1, 0, 0]]):
        with pytest.raises(ValueError):
            correlation_root(bad)
    # A singular but valid matrix (perfect correlation) is accepted: root @ root.T recovers it.
    singular = np.ones((2, 2))
    root = correlation_root(singular)
    np.testing.assert_allclose(root @ root.T, singular, atol=1e-12)


def test_draws_table_is_long_and_typed():
    # Tidy-table contract (DESIGN.md): one row per draw, parameter, component.
    table = draws_table({"p": np.array([0.1, 0.2]), "row": np.array([[0.3, 0.7], [0.6, 0.4]])})
    assert list(table.columns) == ["draw", "parameter", "component", "value"]
    assert len(table) == 2 + 4
    assert table.loc[(table.parameter == "row") & (table.draw == 1) & (table.component == 0), "value"].item() == 0.6
    assert str(table["draw"].dtype) == "int64" and str(table["value"].dtype) == "float64"
