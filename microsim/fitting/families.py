"""The families a fit compares, each with its parameters on the scale the fit estimates.

Every family is the scenario's own hazard family (`microsim.binding.FAMILIES`), so the model
fitted is exactly the model the engines simulate. Positive parameters are estimated on the
log scale (log rate, log shape, log scale, log sdlog, log sigma), the others as they are
(the Gompertz shape, meanlog, mu, q), so the optimiser works on the whole real line and
the estimates are close to normal (the scale of the multivariate normal of the PSA).

Covariates enter as proportional hazards, h(t | x) = exp(x'b) h0(t) (Cox 1972), where the
family allows it in the usual sense (the exponential, Weibull and Gompertz are closed under
it), or as accelerated failure time, S(t | x) = S0(t exp(-x'b)) (Kalbfleisch & Prentice
2002, 2.3.3), for every family; x is centred (at the data's means, a level's indicator at
0), so the base parameters describe a patient at the centres.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from microsim.binding import FAMILIES
from microsim.hazards import HazardFamily

PH, AFT, NONE = "ph", "aft", "none"  # covariate forms; NONE: a fit without covariates
LOG_TIME, LOG_RATE, RATE = "log time", "log rate", "rate"  # FitFamily.time_roles
FORM_WORDS = {PH: "proportional hazards", AFT: "accelerated failure time", NONE: ""}


@dataclass(frozen=True)
class FitFamily:
    label: str  # as a person says it (exponential, Weibull, ...)
    scenario: str  # the scenario's family name
    parameters: tuple[str, ...]  # the scenario's keys, in the fit's order
    on_log: tuple[bool, ...]  # estimated on the log scale
    proportional: bool  # admits proportional-hazards covariates
    # how each fit-scale parameter changes when time is measured in units c times longer:
    # LOG_TIME gains log c (log scale, meanlog, mu), LOG_RATE loses it (log rate), RATE is
    # divided by c (the Gompertz shape), "" stays
    time_roles: tuple[str, ...]

    @property
    def name(self) -> str:
        return "exponential" if self.scenario == "constant" else self.scenario

    @property
    def fit_names(self) -> tuple[str, ...]:
        """The parameters as the fit estimates them: log_shape, meanlog, ..."""
        return tuple(f"log_{p}" if log else p for p, log in zip(self.parameters, self.on_log))

    def natural(self, theta) -> np.ndarray:
        """The scenario's values of the fit-scale parameters."""
        theta = np.asarray(theta, dtype=float)
        return np.where(self.on_log, np.exp(theta), theta)

    def hazard(self, theta) -> HazardFamily:
        """The family at fit-scale parameters `theta` (ValueError where they make no family)."""
        values = self.natural(theta)
        return FAMILIES[self.scenario](**dict(zip(self.parameters, values.tolist())))

    def in_time_units(self, c: float) -> tuple[np.ndarray, np.ndarray]:
        """(factor, shift) taking fit-scale parameters estimated on time / c to time:
        theta = factor theta' + shift."""
        factor = np.array([1.0 / c if role == RATE else 1.0 for role in self.time_roles])
        shift = np.array([math.log(c) if role == LOG_TIME else -math.log(c) if role == LOG_RATE
                          else 0.0 for role in self.time_roles])
        return factor, shift

    def forms(self, with_covariates: bool) -> tuple[str, ...]:
        if not with_covariates:
            return (NONE,)
        return (PH, AFT) if self.proportional else (AFT,)


EXPONENTIAL = FitFamily("exponential", "constant", ("rate",), (True,), True, (LOG_RATE,))
WEIBULL = FitFamily("Weibull", "weibull", ("shape", "scale"), (True, True), True,
                    ("", LOG_TIME))
GOMPERTZ = FitFamily("Gompertz", "gompertz", ("rate", "shape"), (True, False), True,
                     (LOG_RATE, RATE))
LOG_LOGISTIC = FitFamily("log-logistic", "loglogistic", ("shape", "scale"), (True, True), False,
                         ("", LOG_TIME))
LOG_NORMAL = FitFamily("log-normal", "lognormal", ("meanlog", "sdlog"), (False, True), False,
                       (LOG_TIME, ""))
GENERALISED_GAMMA = FitFamily("generalised gamma", "generalised_gamma", ("mu", "sigma", "q"),
                              (False, True, False), False, (LOG_TIME, "", ""))
FIT_FAMILIES = (EXPONENTIAL, WEIBULL, GOMPERTZ, LOG_NORMAL, LOG_LOGISTIC, GENERALISED_GAMMA)
BY_NAME = {f.name: f for f in FIT_FAMILIES}


def starting_points(family: FitFamily, form: str, crude_rate: float, earlier: dict,
                    covariates: int) -> list[np.ndarray]:
    """Where the optimiser starts for one model, from the fits before it (`earlier`:
    (family name, form) -> fit-scale estimate, of the exponential, Weibull and log-normal):
    the exponential is the Weibull with shape 1 and the Gompertz with shape 0; the
    log-logistic and log-normal take the Weibull's median and spread of log T (sd
    pi / (shape sqrt 6) for the Weibull: its log is a Gumbel); the generalised gamma starts
    at the Weibull (q = 1) and at the log-normal (q = 0), and keeps the better end."""
    log_rate = math.log(crude_rate)
    covariates = covariates if form != NONE else 0

    def coefficients(name: str) -> np.ndarray:
        fit = earlier.get((name, form))
        return np.zeros(covariates) if fit is None else np.asarray(fit[len(
            BY_NAME[name].parameters):])

    exponential = earlier.get(("exponential", form), np.zeros(1 + covariates) + log_rate)
    if family is EXPONENTIAL:
        return [np.concatenate([[log_rate], np.zeros(covariates)])]
    if family in (WEIBULL, GOMPERTZ):
        base = [0.0, -exponential[0]] if family is WEIBULL else [exponential[0], 0.0]
        return [np.concatenate([base, coefficients("exponential")])]
    weibull = earlier[("weibull", form)]
    log_shape, log_scale = weibull[:2]
    shape = math.exp(log_shape)
    log_median = log_scale + math.log(math.log(2.0)) / shape
    spread = math.log(math.pi / (shape * math.sqrt(6.0)))
    aft = coefficients("weibull")
    if family is LOG_LOGISTIC:
        return [np.concatenate([[log_shape, log_median], aft])]
    if family is LOG_NORMAL:
        return [np.concatenate([[log_median, spread], aft])]
    normal = earlier[("lognormal", form)]
    return [np.concatenate([[log_scale, -log_shape, 1.0], aft]),
            np.concatenate([normal[:2], [0.0], normal[2:]])]
