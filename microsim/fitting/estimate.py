"""Maximum-likelihood fits of every family, with standard errors from the observed
information, ranked by AIC.

Each model is fitted by scipy.optimize.minimize (BFGS with central-difference gradients)
from the starting points of `families.starting_points`, then polished by Newton's method on
the central-difference Hessian (with step halving), which takes the estimate to where the
Newton decrement g' H^-1 g, the log-likelihood still to gain, is below 1e-8. The covariance
is the inverse of that Hessian of -log L at the optimum, the observed information (Efron &
Hinkley 1978, "Assessing the accuracy of the maximum likelihood estimator: observed versus
expected Fisher information", Biometrika). AIC = 2k - 2 log L (Akaike 1974) and
BIC = k log n - 2 log L with n the number of patients (Schwarz 1978).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import optimize

from microsim.fitting.data import SurvivalData
from microsim.fitting.families import (AFT, FIT_FAMILIES, FORM_WORDS, NONE, PH, FitFamily,
                                       starting_points)
from microsim.fitting.likelihood import gradient, hessian, log_likelihood
from microsim.hazards import HazardFamily, TimeScaledHazard

DECREMENT = 1e-8  # converged when the Newton decrement (log-likelihood left to gain) is below
POLISH_STEPS = 30
ITERATIONS = 200  # BFGS steps from a start: fits of real data take under 30; more is a runaway
NO_MAXIMUM = ("no maximum found: the estimates ran off towards the edge of the parameter "
              "space, where the likelihood cannot be differentiated (often too few events for "
              "the family)")
NOT_DEFINITE = ("the observed information is not positive definite at the optimum (a flat "
                "likelihood or an estimate at a boundary): no standard errors")


@dataclass(frozen=True)
class Fit:
    """One fitted model: estimates on the fit's scale, their covariance, log L."""
    family: FitFamily
    form: str
    covariates: tuple[str, ...]
    centres: np.ndarray
    estimate: np.ndarray
    covariance: np.ndarray | None  # None when the information is not positive definite
    log_likelihood: float
    converged: bool
    note: str
    patients: int
    events: int

    @property
    def key(self) -> tuple[str, str]:
        return self.family.name, self.form

    @property
    def label(self) -> str:
        words = FORM_WORDS[self.form]
        return f"{self.family.label}, {words}" if words else self.family.label

    @property
    def names(self) -> tuple[str, ...]:
        return self.family.fit_names + self.covariates

    @property
    def size(self) -> int:
        return len(self.estimate)

    @property
    def aic(self) -> float:
        return 2 * self.size - 2 * self.log_likelihood

    @property
    def bic(self) -> float:
        return self.size * math.log(self.patients) - 2 * self.log_likelihood

    @property
    def se(self) -> np.ndarray:
        if self.covariance is None:
            return np.full(self.size, np.nan)
        return np.sqrt(np.diag(self.covariance))

    @property
    def coefficients(self) -> np.ndarray:
        return self.estimate[len(self.family.parameters):]

    def base_hazard(self) -> HazardFamily:
        return self.family.hazard(self.estimate[:len(self.family.parameters)])

    def survival(self, times, values: np.ndarray) -> np.ndarray:
        """S(t | x) (patients, times) for covariate rows `values` (patients, k)."""
        log_s, _ = self.log_survival_and_hazard(times, values)
        return np.exp(log_s)

    def log_survival_and_hazard(self, times, values: np.ndarray):
        """log S(t | x) and h(t | x), each (patients, times)."""
        times = np.asarray(times, dtype=float)[None, :]
        eta = ((np.asarray(values, float) - self.centres) @ self.coefficients)[:, None] \
            if self.covariates else np.zeros((len(values), 1))
        base = self.base_hazard()
        with np.errstate(all="ignore"):
            if self.form == AFT:
                hazard = TimeScaledHazard(base, np.exp(eta))
                return -hazard.cumulative_hazard_array(times), hazard.hazard_array(times)
            return -np.exp(eta) * base.cumulative_hazard_array(times), \
                np.exp(eta) * base.hazard_array(times)


def crude_rate(data: SurvivalData) -> float:
    """Events per unit of follow-up: the exponential's estimate without covariates."""
    return data.events / float(np.sum(data.time - data.entry))


def fit_model(family: FitFamily, form: str, data: SurvivalData, starts) -> Fit:
    """The maximum-likelihood fit of one model from each starting point; the best of them."""
    def negative(theta):
        return -log_likelihood(family, form, theta, data)

    best = None
    for start in starts:
        with np.errstate(all="ignore"):
            found = optimize.minimize(negative, start, jac=lambda x: gradient(negative, x),
                                      method="BFGS", options={"gtol": 1e-7, "maxiter": ITERATIONS})
        x = polished(negative, found.x)
        if best is None or negative(x) < negative(best):
            best = x
    value = -negative(best)
    information = hessian(negative, best)
    covariates = data.covariates if form != NONE else ()
    try:
        np.linalg.cholesky(information)
        covariance = np.linalg.inv(information)
        covariance = (covariance + covariance.T) / 2
        g = gradient(negative, best)
        decrement = float(g @ covariance @ g)
        converged = math.isfinite(value) and decrement < DECREMENT
        note = ("" if converged else NO_MAXIMUM if not math.isfinite(decrement) else
                f"the optimiser stopped {decrement:.3g} short in log-likelihood of the optimum")
    except np.linalg.LinAlgError:
        covariance, converged, note = None, False, NOT_DEFINITE
    return Fit(family, form, covariates, data.centres if covariates else np.zeros(0), best,
               covariance, value, converged, note, data.size, data.events)


def in_data_units(fit: Fit, unit: float) -> Fit:
    """A fit made on time / unit, in the data's own time: the family's parameters move by
    `FitFamily.in_time_units` (coefficients stay: hazard and time ratios have no unit), the
    covariance by the same linear map, and log L by -events log(unit) (each event's density
    is per unit of time; survival probabilities do not change)."""
    factor, shift = fit.family.in_time_units(unit)
    k = len(fit.covariates)
    factor, shift = np.concatenate([factor, np.ones(k)]), np.concatenate([shift, np.zeros(k)])
    covariance = None if fit.covariance is None else fit.covariance * np.outer(factor, factor)
    return replace(fit, estimate=factor * fit.estimate + shift, covariance=covariance,
                   log_likelihood=fit.log_likelihood - fit.events * math.log(unit))


def polished(negative, x: np.ndarray) -> np.ndarray:
    """Newton's method on central-difference derivatives, with step halving, from x."""
    current = negative(x)
    for _ in range(POLISH_STEPS):
        g, h = gradient(negative, x), hessian(negative, x)
        try:
            np.linalg.cholesky(h)
            step = np.linalg.solve(h, g)
        except np.linalg.LinAlgError:
            return x
        if g @ step < DECREMENT / 10:
            return x
        for t in 0.5 ** np.arange(20):
            trial = negative(x - t * step)
            if trial <= current:
                x, current = x - t * step, trial
                break
        else:
            return x
    return x


def fit_all(data: SurvivalData, families=FIT_FAMILIES) -> list[Fit]:
    """Every family, in every form its covariates allow, ranked: converged fits first, by
    AIC; ties (the exponential and Weibull are the same model in either form) in the order
    of `families`, proportional hazards first.

    The fits are made with time in units of the longest follow-up, where every parameter
    is of order one (a Gompertz shape per day is not), and taken back to the data's unit
    exactly (`in_data_units`)."""
    unit = float(data.time.max())
    scaled = replace(data, time=data.time / unit, entry=data.entry / unit)
    rate = crude_rate(scaled)
    earlier: dict[tuple[str, str], np.ndarray] = {}
    fits = []
    for family in families:
        for form in family.forms(bool(data.covariates)):
            starts = starting_points(family, form, rate, earlier, len(data.covariates))
            fit = fit_model(family, form, scaled, starts)
            earlier[fit.key] = fit.estimate
            fits.append(in_data_units(fit, unit))
    order = {f.name: i for i, f in enumerate(families)}
    return sorted(fits, key=lambda f: (not f.converged, round(f.aic, 6), order[f.family.name],
                                       f.form != PH))
