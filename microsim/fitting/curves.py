"""Each fitted model's survival and hazard over a horizon, averaged over the data's patients.

The curve of a group of patients is the mean of their survivals, S(t) = mean_i S(t | x_i),
and its hazard is that of the mean, h(t) = mean_i f(t | x_i) / mean_i S(t | x_i) with
f = h S (the hazard of a mixture; e.g. Aalen, Borgan & Gjessing 2008, "Survival and Event
History Analysis", 6.1): what a Kaplan-Meier curve of the same patients estimates, and what
a simulation of them reproduces. Patients with the same covariates are computed once.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd

from microsim.fitting.data import SurvivalData
from microsim.fitting.estimate import Fit

POINTS = 201  # grid points from 0 to the horizon


def horizon_for(data: SurvivalData) -> float:
    """Twice the longest follow-up, rounded up to 1, 2, 2.5 or 5 times a power of ten: far
    enough beyond the data for families that agree within it to part."""
    longest = 2.0 * float(data.time.max())
    power = 10.0 ** math.floor(math.log10(longest))
    return next(step * power for step in (1.0, 2.0, 2.5, 5.0, 10.0) if step * power >= longest)


def grid(horizon: float) -> np.ndarray:
    return np.linspace(0.0, horizon, POINTS)


def average_curves(fit: Fit, data: SurvivalData, times: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean survival and the hazard of the mean over the data's patients, at `times`."""
    rows, counts = (np.unique(data.values, axis=0, return_counts=True) if data.covariates
                    else (np.zeros((1, 0)), np.array([data.size])))
    weights = counts / counts.sum()
    log_s, hazard = fit.log_survival_and_hazard(times, rows)
    survival = np.exp(log_s)
    mean = weights @ survival
    with np.errstate(divide="ignore", invalid="ignore"):
        density = weights @ np.where(survival > 0, hazard * survival, 0.0)
        return mean, np.where(mean > 0, density / mean, np.nan)


def curves_table(fits: list[Fit], data: SurvivalData, times: np.ndarray) -> pd.DataFrame:
    """family, form, label, time, survival, hazard: one row per model and time."""
    parts = []
    for fit in fits:
        survival, hazard = average_curves(fit, data, times)
        parts.append(pd.DataFrame({"family": fit.family.name, "form": fit.form,
                                   "label": fit.label, "time": times, "survival": survival,
                                   "hazard": hazard}))
    return pd.concat(parts, ignore_index=True)
