"""Fits against lifelines (Davidson-Pilon 2019, "lifelines: survival analysis in Python",
JOSS), a general-purpose survival library, on the Rossi recidivism data it ships
(`lifelines.datasets.load_rossi`: 432 released prisoners, weeks to re-arrest, 114 events)
and the Walton data (`load_waltons`, for Kaplan-Meier).

lifelines' parametrisations, converted: ExponentialFitter lambda_ = 1 / rate; WeibullFitter
lambda_ = scale, rho_ = shape; LogNormalFitter mu_ = meanlog, sigma_ = sdlog;
LogLogisticFitter alpha_ = scale, beta_ = shape; GeneralizedGammaFitter mu_, ln_sigma_ and
lambda_ = q, as here; its AFT regressions put the covariates, uncentred and with an
Intercept, on log lambda_ (Weibull), mu_ (log-normal) or log alpha_ (log-logistic), and the
shape on log rho_, log sigma_ or log beta_. The Gompertz, which lifelines has no fitter for,
and the exponential with proportional hazards are lifelines' own custom models
(ParametricUnivariateFitter, ParametricRegressionFitter: its documented way to fit any
cumulative hazard, with autograd derivatives).

Tolerances: lifelines stops its optimiser a little earlier than we do, so its log-likelihood
may lie below ours by up to GAP (measured: 7e-5 at worst); near the optimum the likelihood is
quadratic, so the estimates then differ by at most sqrt(2 GAP) = 0.02 standard errors; the
standard errors, second derivatives at two such points, within 0.2%. Kaplan-Meier is exact
arithmetic on both sides: 1e-12.
"""
from __future__ import annotations

import math
import warnings
from functools import lru_cache

import autograd.numpy as anp
import numpy as np
import pandas as pd
import pytest
from lifelines import (ExponentialFitter, GeneralizedGammaFitter,
                       GeneralizedGammaRegressionFitter, KaplanMeierFitter, LogLogisticAFTFitter,
                       LogLogisticFitter, LogNormalAFTFitter, LogNormalFitter, WeibullAFTFitter,
                       WeibullFitter)
from lifelines.datasets import load_gbsg2, load_rossi, load_waltons
from lifelines.fitters import ParametricRegressionFitter, ParametricUnivariateFitter

from microsim.fitting.data import read_survival_data
from microsim.fitting.estimate import fit_all
from microsim.fitting.families import BY_NAME
from microsim.fitting.kaplan_meier import kaplan_meier
from microsim.fitting.likelihood import log_likelihood

GAP = 2e-4
ESTIMATE_SE = math.sqrt(2 * GAP)
SE_RELATIVE = 2e-3
COVARIATES = ("fin", "prio", "mar")


@lru_cache(maxsize=None)
def rossi_file(tmp: str, entry: bool = False) -> str:
    frame = load_rossi()
    if entry:  # delayed entry: seen from a time drawn in [0, 0.6 x the time)
        frame["entry"] = np.round(np.random.default_rng(1).uniform(0, 0.6, len(frame))
                                  * frame.week, 3)
    path = f"{tmp}/rossi{'_entry' if entry else ''}.csv"
    frame.to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return str(tmp_path_factory.mktemp("rossi"))


@lru_cache(maxsize=None)
def our_fits(path: str, covariates: tuple[str, ...] = (), entry: str | None = None):
    data = read_survival_data(path, "week", "arrest", covariates, entry)
    return data, {fit.key: fit for fit in fit_all(data)}


def quiet(fitter, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fitter.fit(*args, **kwargs)


def assert_same_fit(reference, fit, pairs):
    """log L within GAP (ours the higher); each (lifelines row, our value, our SE) within
    ESTIMATE_SE standard errors and SE_RELATIVE."""
    assert fit.converged, fit.note
    assert -1e-6 <= fit.log_likelihood - reference.log_likelihood_ <= GAP
    summary = reference.summary
    for row, value, se in pairs:
        theirs, their_se = summary.loc[row, "coef"], summary.loc[row, "se(coef)"]
        assert abs(value - theirs) <= ESTIMATE_SE * se, (row, value, theirs, se)
        assert se == pytest.approx(their_se, rel=SE_RELATIVE), (row, se, their_se)


# --- without covariates ----------------------------------------------------------------------

class GompertzFitter(ParametricUnivariateFitter):
    """H(t) = exp(log rate) (e^(shape t) - 1) / shape, as the scenario's Gompertz."""
    _fitted_parameter_names = ["log_rate_", "shape_"]
    _bounds = [(None, None), (None, None)]

    def _cumulative_hazard(self, params, times):
        log_rate, shape = params
        return anp.exp(log_rate) * anp.expm1(shape * times) / shape


def natural(fit, k, power=1.0):
    """exp(power * estimate) and its delta-method SE: what lifelines reports for a
    parameter that it estimates on its own scale and we on the log scale."""
    value = math.exp(power * fit.estimate[k])
    return value, abs(power) * value * fit.se[k]


@pytest.mark.parametrize("name", ["exponential", "weibull", "lognormal", "loglogistic",
                                  "generalised_gamma", "gompertz"])
def test_families_without_covariates_equal_lifelines(folder, name):
    rossi = load_rossi()
    _, fits = our_fits(rossi_file(folder))
    fit = fits[(name, "none")]
    if name == "exponential":
        reference = quiet(ExponentialFitter(), rossi.week, rossi.arrest)
        pairs = [("lambda_", *natural(fit, 0, -1.0))]
    elif name == "weibull":
        reference = quiet(WeibullFitter(), rossi.week, rossi.arrest)
        pairs = [("lambda_", *natural(fit, 1)), ("rho_", *natural(fit, 0))]
    elif name == "lognormal":
        reference = quiet(LogNormalFitter(), rossi.week, rossi.arrest)
        pairs = [("mu_", fit.estimate[0], fit.se[0]), ("sigma_", *natural(fit, 1))]
    elif name == "loglogistic":
        reference = quiet(LogLogisticFitter(), rossi.week, rossi.arrest)
        pairs = [("alpha_", *natural(fit, 1)), ("beta_", *natural(fit, 0))]
    elif name == "generalised_gamma":
        reference = quiet(GeneralizedGammaFitter(), rossi.week, rossi.arrest)
        pairs = [(p, fit.estimate[k], fit.se[k])
                 for k, p in enumerate(["mu_", "ln_sigma_", "lambda_"])]
    else:
        reference = quiet(GompertzFitter(), rossi.week, rossi.arrest,
                          initial_point=np.array([-5.0, 0.01]))
        pairs = [(p, fit.estimate[k], fit.se[k]) for k, p in enumerate(["log_rate_", "shape_"])]
    assert_same_fit(reference, fit, pairs)


# --- with covariates -------------------------------------------------------------------------

def intercept(fit, base: int):
    """lifelines' Intercept (covariates uncentred) from ours (at the centres): b0 - c'beta,
    with its SE from our covariance, sqrt(a' V a)."""
    p = len(fit.family.parameters)
    a = np.zeros(fit.size)
    a[base], a[p:] = 1.0, -fit.centres
    return float(a @ fit.estimate), float(math.sqrt(a @ fit.covariance @ a))


def regression_pairs(fit, group: str, base: int, shape_group: str | None = None,
                     shape: int | None = None):
    p = len(fit.family.parameters)
    pairs = [((group, "Intercept"), *intercept(fit, base))]
    pairs += [((group, name), fit.estimate[p + k], fit.se[p + k])
              for k, name in enumerate(fit.covariates)]
    if shape_group is not None:
        pairs.append(((shape_group, "Intercept"), fit.estimate[shape], fit.se[shape]))
    return pairs


@pytest.mark.parametrize("name, fitter, group, base, shape_group, shape", [
    ("weibull", WeibullAFTFitter, "lambda_", 1, "rho_", 0),
    ("lognormal", LogNormalAFTFitter, "mu_", 0, "sigma_", 1),
    ("loglogistic", LogLogisticAFTFitter, "alpha_", 1, "beta_", 0),
])
@pytest.mark.parametrize("entry", [False, True], ids=["", "delayed-entry"])
def test_accelerated_failure_time_regressions_equal_lifelines(folder, name, fitter, group, base,
                                                              shape_group, shape, entry):
    frame = load_rossi()
    path = rossi_file(folder, entry)
    columns = ["week", "arrest", *COVARIATES] + (["entry"] if entry else [])
    if entry:
        frame["entry"] = read_survival_data(path, "week", "arrest", entry="entry").entry
    reference = quiet(fitter(), frame[columns], "week", "arrest",
                      entry_col="entry" if entry else None)
    _, fits = our_fits(path, COVARIATES, "entry" if entry else None)
    fit = fits[(name, "aft")]
    assert_same_fit(reference, fit, regression_pairs(fit, group, base, shape_group, shape))


class ExponentialPH(ParametricRegressionFitter):
    """H(t | x) = exp(b0 + x'b) t."""
    _fitted_parameter_names = ["log_rate_"]

    def _cumulative_hazard(self, params, T, Xs):
        return anp.exp(anp.dot(Xs["log_rate_"], params["log_rate_"])) * T


class GompertzPH(ParametricRegressionFitter):
    """H(t | x) = exp(b0 + x'b) (e^(shape t) - 1) / shape."""
    _fitted_parameter_names = ["log_rate_", "shape_"]

    def _cumulative_hazard(self, params, T, Xs):
        rate = anp.exp(anp.dot(Xs["log_rate_"], params["log_rate_"]))
        shape = anp.dot(Xs["shape_"], params["shape_"])
        return rate * anp.expm1(shape * T) / shape


class GompertzAFT(ParametricRegressionFitter):
    """H(t | x) = H0(t exp(-x'b)) with H0 the Gompertz; the Intercept of `log_time_` is 0
    (the base scale is the Gompertz's own), so the covariates carry no intercept there.
    Names and regressors are given in sorted order: lifelines orders the parameters by
    name in some places and by the regressors' order in others, and its standard errors
    come out scaled by the wrong covariates' spreads when the two differ."""
    _fitted_parameter_names = ["log_rate_", "log_time_", "shape_"]

    def _cumulative_hazard(self, params, T, Xs):
        rate = anp.exp(anp.dot(Xs["log_rate_"], params["log_rate_"]))
        shape = anp.dot(Xs["shape_"], params["shape_"])
        scaled = T * anp.exp(-anp.dot(Xs["log_time_"], params["log_time_"]))
        return rate * anp.expm1(shape * scaled) / shape


def test_gompertz_aft_equals_a_lifelines_custom_model(folder):
    # the time ratio of the base cannot be told from its rate and shape, so the reference
    # has no intercept on it and is given the covariates centred, as we centre them
    frame = load_rossi()[["week", "arrest", *COVARIATES]]
    frame[list(COVARIATES)] -= frame[list(COVARIATES)].mean()
    _, fits = our_fits(rossi_file(folder), COVARIATES)
    fit = fits[("gompertz", "aft")]
    reference = quiet(GompertzAFT(), frame, "week", "arrest",
                      regressors={"log_rate_": "1",
                                  "log_time_": " + ".join(COVARIATES) + " - 1", "shape_": "1"},
                      initial_point=np.array([-5.6, 0.0, 0.0, 0.0, 0.016]))  # names sorted
    pairs = [(("log_rate_", "Intercept"), fit.estimate[0], fit.se[0]),
             (("shape_", "Intercept"), fit.estimate[1], fit.se[1])]
    pairs += [(("log_time_", name), fit.estimate[2 + k], fit.se[2 + k])
              for k, name in enumerate(COVARIATES)]
    assert_same_fit(reference, fit, pairs)


def test_proportional_hazards_equal_lifelines_custom_models(folder):
    frame = load_rossi()[["week", "arrest", *COVARIATES]]
    _, fits = our_fits(rossi_file(folder), COVARIATES)
    formula = " + ".join(COVARIATES)
    reference = quiet(ExponentialPH(), frame, "week", "arrest", regressors={"log_rate_": formula})
    fit = fits[("exponential", "ph")]
    assert_same_fit(reference, fit, regression_pairs(fit, "log_rate_", 0))
    reference = quiet(GompertzPH(), frame, "week", "arrest",
                      regressors={"log_rate_": formula, "shape_": "1"},
                      initial_point=np.array([0.1, 0.1, 0.1, -5.6, 0.02]))
    fit = fits[("gompertz", "ph")]
    assert_same_fit(reference, fit, regression_pairs(fit, "log_rate_", 0, "shape_", 1))


def test_weibull_proportional_hazards_is_the_weibull_aft_reparametrised(folder):
    # reference: lifelines' WeibullAFTFitter; the Weibull PH coefficient is -shape times the
    # AFT coefficient, the same model (Kalbfleisch & Prentice 2002, 2.3.4), so the same log L
    frame = load_rossi()[["week", "arrest", *COVARIATES]]
    reference = quiet(WeibullAFTFitter(), frame, "week", "arrest")
    _, fits = our_fits(rossi_file(folder), COVARIATES)
    fit = fits[("weibull", "ph")]
    assert -1e-6 <= fit.log_likelihood - reference.log_likelihood_ <= GAP
    shape = math.exp(reference.summary.loc[("rho_", "Intercept"), "coef"])
    for k, name in enumerate(COVARIATES):
        theirs = -shape * reference.summary.loc[("lambda_", name), "coef"]
        assert abs(fit.coefficients[k] - theirs) <= ESTIMATE_SE * fit.se[2 + k]


def test_generalised_gamma_regression_equals_lifelines_and_scipy_curvature(folder):
    # reference: lifelines' GeneralizedGammaRegressionFitter for log L and the estimates;
    # its standard errors for this model (which its documentation calls experimental) come
    # from approximate derivatives of the incomplete gamma in its shape and disagree with
    # the curvature, so ours are checked against scipy.differentiate.hessian (Richardson
    # extrapolation of finite differences) of the same log-likelihood instead
    differentiate = pytest.importorskip("scipy.differentiate")
    frame = load_rossi()[["week", "arrest", *COVARIATES]]
    reference = quiet(GeneralizedGammaRegressionFitter(), frame, "week", "arrest",
                      regressors={"mu_": " + ".join(COVARIATES), "sigma_": "1", "lambda_": "1"})
    data, fits = our_fits(rossi_file(folder), COVARIATES)
    fit = fits[("generalised_gamma", "aft")]
    assert -1e-6 <= fit.log_likelihood - reference.log_likelihood_ <= GAP
    summary = reference.summary
    for row, value, se in regression_pairs(fit, "mu_", 0, "sigma_", 1) + [
            (("lambda_", "Intercept"), fit.estimate[2], fit.se[2])]:
        assert abs(value - summary.loc[row, "coef"]) <= ESTIMATE_SE * se, row

    def negative(x):
        flat = np.asarray(x).reshape(len(x), -1)
        return np.array([-log_likelihood(fit.family, fit.form, flat[:, j], data)
                         for j in range(flat.shape[1])]).reshape(np.shape(x)[1:])

    curvature = differentiate.hessian(negative, fit.estimate, initial_step=0.05, order=4,
                                      maxiter=3).ddf
    np.testing.assert_allclose(fit.se, np.sqrt(np.diag(np.linalg.inv(curvature))), rtol=1e-4)


# --- text covariates ------------------------------------------------------------------------

GBSG2 = ("age", "tgrade", "menostat")  # numbers, text of levels I, II, III, text Post, Pre


@lru_cache(maxsize=None)
def gbsg2_fits(tmp: str, references: tuple[tuple[str, str], ...] = ()):
    """The German breast cancer data of lifelines.datasets (load_gbsg2: 686 patients, days
    to recurrence, 299 events) and our exponential and Weibull fits of it."""
    path = f"{tmp}/gbsg2.csv"
    load_gbsg2().to_csv(path, index=False)
    data = read_survival_data(path, "time", "cens", GBSG2, references=dict(references))
    return data, {f.key: f for f in fit_all(data, (BY_NAME["exponential"], BY_NAME["weibull"]))}


def by_hand(references: dict[str, str]):
    """The same data with indicators made by hand (pandas.get_dummies, the reference level's
    column dropped) and `age` renamed as the written scenario names it."""
    frame = load_gbsg2()
    columns = [frame[["time", "cens", "age"]].rename(columns={"age": "age_at_entry"})]
    for name in ("tgrade", "menostat"):
        dummies = pd.get_dummies(frame[name], prefix=name, dtype=float)
        reference = references.get(name, sorted(frame[name].unique())[0])
        columns.append(dummies.drop(columns=f"{name}_{reference}"))
    return pd.concat(columns, axis=1).rename(columns=str.lower)


@pytest.mark.parametrize("references", [(), (("tgrade", "III"), ("menostat", "Pre"))],
                         ids=["first-levels", "given-levels"])
def test_text_covariates_equal_lifelines_with_indicators_made_by_hand(folder, references):
    data, fits = gbsg2_fits(folder, references)
    manual = by_hand(dict(references))
    assert sorted(data.covariates) == sorted(c for c in manual if c not in ("time", "cens"))
    np.testing.assert_array_equal(data.values, manual[list(data.covariates)].to_numpy())
    fit = fits[("weibull", "aft")]
    reference = quiet(WeibullAFTFitter(), manual, "time", "cens")
    assert_same_fit(reference, fit, regression_pairs(fit, "lambda_", 1, "rho_", 0))
    fit = fits[("exponential", "ph")]
    reference = quiet(ExponentialPH(), manual, "time", "cens",
                      regressors={"log_rate_": " + ".join(data.covariates)})
    assert_same_fit(reference, fit, regression_pairs(fit, "log_rate_", 0))


# --- Kaplan-Meier -------------------------------------------------------------------------

def test_kaplan_meier_and_its_log_log_band_equal_lifelines(tmp_path):
    waltons = load_waltons()
    path = tmp_path / "waltons.csv"
    waltons.rename(columns={"T": "t", "E": "e"}).to_csv(path, index=False)
    ours = kaplan_meier(read_survival_data(path, "t", "e"))
    reference = KaplanMeierFitter().fit(waltons["T"], waltons["E"])
    np.testing.assert_array_equal(ours.time, reference.survival_function_.index)
    np.testing.assert_allclose(ours.survival, reference.survival_function_.iloc[:, 0], atol=1e-12)
    band = reference.confidence_interval_  # lifelines: the log(-log) band by default
    np.testing.assert_allclose(ours.lower, band.iloc[:, 0], atol=1e-12)
    np.testing.assert_allclose(ours.upper, band.iloc[:, 1], atol=1e-12)
    assert ours.events.sum() == waltons["E"].sum()


def test_kaplan_meier_with_delayed_entry_equals_lifelines(folder):
    path = rossi_file(folder, True)
    data = read_survival_data(path, "week", "arrest", entry="entry")
    ours = kaplan_meier(data).set_index("time")
    reference = KaplanMeierFitter().fit(data.time, data.event, entry=data.entry)
    theirs = reference.survival_function_.iloc[:, 0]
    common = np.intersect1d(ours.index, theirs.index)
    assert len(common) >= 40
    np.testing.assert_allclose(ours.loc[common, "survival"], theirs.loc[common], atol=1e-12)
    np.testing.assert_allclose(ours.loc[common, "lower"],
                               reference.confidence_interval_.loc[common].iloc[:, 0], atol=1e-12)
