"""The log-likelihood of right-censored, left-truncated data under one model.

With d_i the event indicator, t_i the time and e_i the entry time of patient i,
log L = sum_i d_i log h_i(t_i) - (H_i(t_i) - H_i(e_i)) (Klein & Moeschberger 2003,
"Survival Analysis", 2nd ed., 3.5: right censoring contributes S(t_i), delayed entry
conditions on survival to e_i). Proportional hazards: H_i = exp(eta_i) H0 and
log h_i = eta_i + log h0; accelerated failure time: the family on a clock divided by the
time ratio exp(eta_i) (`microsim.hazards.TimeScaledHazard`, as the engines simulate it).
"""
from __future__ import annotations

import math

import numpy as np

from microsim.fitting.data import SurvivalData
from microsim.fitting.families import AFT, PH, FitFamily
from microsim.hazards import TimeScaledHazard


def log_likelihood(family: FitFamily, form: str, theta, data: SurvivalData) -> float:
    """log L at fit-scale parameters `theta` (the family's, then one coefficient per
    covariate); -inf where they make no family or no finite likelihood."""
    theta = np.asarray(theta, dtype=float)
    p = len(family.parameters)
    try:
        with np.errstate(all="ignore"):
            base = family.hazard(theta[:p])
            eta = data.centred @ theta[p:] if form in (PH, AFT) else np.zeros(data.size)
            if form == AFT:
                hazard = TimeScaledHazard(base, np.exp(eta))
                log_h = hazard.log_hazard_array(data.time)
                gained = hazard.cumulative_hazard_array(data.time)
                if data.truncated:
                    gained = gained - hazard.cumulative_hazard_array(data.entry)
            else:
                log_h = eta + base.log_hazard_array(data.time)
                gained = base.cumulative_hazard_array(data.time)
                if data.truncated:
                    gained = gained - base.cumulative_hazard_array(data.entry)
                gained = np.exp(eta) * gained
            value = float(np.sum(np.where(data.event > 0, log_h, 0.0)) - np.sum(gained))
    except (ValueError, OverflowError, FloatingPointError):
        return -math.inf
    return value if math.isfinite(value) else -math.inf


def step_sizes(x: np.ndarray, power: float) -> np.ndarray:
    """Central-difference steps eps^power * max(1, |x|), exactly representable against x
    (Press et al. 2007, "Numerical Recipes", 3rd ed., 5.7: the power 1/3 for a first
    derivative, 1/4 for a second)."""
    h = np.finfo(float).eps ** power * np.maximum(1.0, np.abs(x))
    return (x + h) - x


def gradient(f, x: np.ndarray) -> np.ndarray:
    """df/dx by central differences (truncation O(h^2), rounding O(eps / h))."""
    h = step_sizes(x, 1 / 3)
    out = np.empty_like(x)
    for i in range(x.size):
        e = np.zeros_like(x)
        e[i] = h[i]
        out[i] = (f(x + e) - f(x - e)) / (2 * h[i])
    return out


def hessian(f, x: np.ndarray) -> np.ndarray:
    """d2f/dx2 by central differences of four points per pair (Abramowitz & Stegun 1964,
    25.3.26 and 25.3.23), symmetric by construction."""
    h = step_sizes(x, 1 / 4)
    k = x.size
    out = np.empty((k, k))
    centre = f(x)
    for i in range(k):
        e_i = np.zeros(k)
        e_i[i] = h[i]
        out[i, i] = (f(x + 2 * e_i) - 2 * centre + f(x - 2 * e_i)) / (4 * h[i] ** 2)
        for j in range(i):
            e_j = np.zeros(k)
            e_j[j] = h[j]
            out[i, j] = out[j, i] = (f(x + e_i + e_j) - f(x + e_i - e_j) - f(x - e_i + e_j)
                                     + f(x - e_i - e_j)) / (4 * h[i] * h[j])
    return out
