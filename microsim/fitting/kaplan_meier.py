"""The Kaplan-Meier curve of the data, with Greenwood's variance and a log-log band.

S(t) = prod over event times t_j <= t of (1 - d_j / n_j), with d_j events at t_j and n_j
patients at risk just before it: those seen at t_j, entry_j < t_j <= time_j (delayed entry
leaves the others out of the risk set; Kaplan & Meier 1958, "Nonparametric estimation from
incomplete observations", JASA). Greenwood's (1926) formula gives
Var log S(t) = sum d_j / (n_j (n_j - d_j)); the band is the one for log(-log S), symmetric
there and mapped back, S^exp(+-z sqrt(V)) with V = Var log S / (log S)^2 (Kalbfleisch &
Prentice 2002, 4.3; common practice), which stays inside [0, 1].
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from microsim.fitting.data import SurvivalData

Z95 = 1.959963984540054  # the two-sided 95% normal quantile (scipy.stats.norm.ppf(0.975))
KM_COLUMNS = ("time", "at_risk", "events", "censored", "survival", "lower", "upper")


def kaplan_meier(data: SurvivalData, z: float = Z95) -> pd.DataFrame:
    """One row at time 0 and one at each distinct time of the data (events or censoring):
    patients at risk, events, censored, the survival and its band."""
    times = np.unique(data.time)
    ends = np.searchsorted(np.sort(data.time), times, side="left")  # time_i < t: gone
    entered = np.searchsorted(np.sort(data.entry), times, side="left")  # entry_i < t
    at_risk = entered - ends
    order = np.searchsorted(times, data.time)
    events = np.bincount(order, weights=data.event, minlength=times.size)
    censored = np.bincount(order, weights=1.0 - data.event, minlength=times.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        survival = np.cumprod(np.where(events > 0, 1.0 - events / at_risk, 1.0))
        greenwood = np.cumsum(np.where(events > 0, events / (at_risk * (at_risk - events)), 0.0))
        spread = z * np.sqrt(greenwood) / np.abs(np.log(survival))
        lower, upper = survival ** np.exp(spread), survival ** np.exp(-spread)
    before_any = greenwood == 0.0  # no event yet: no variance, the curve is 1
    lower, upper = np.where(before_any, survival, lower), np.where(before_any, survival, upper)
    ended = survival == 0.0
    lower, upper = np.where(ended, 0.0, lower), np.where(ended, 0.0, upper)
    table = pd.DataFrame({
        "time": np.concatenate([[0.0], times]),
        "at_risk": np.concatenate([[int(np.sum(data.entry == 0))], at_risk]),
        "events": np.concatenate([[0], events]).astype(int),
        "censored": np.concatenate([[0], censored]).astype(int),
        "survival": np.concatenate([[1.0], survival]),
        "lower": np.concatenate([[1.0], lower]), "upper": np.concatenate([[1.0], upper])})
    return table.astype({"at_risk": "int64"})
