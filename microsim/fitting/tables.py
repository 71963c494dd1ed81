"""The fits as tidy tables: the models ranked, their parameters, their covariances."""
from __future__ import annotations

import numpy as np
import pandas as pd

from microsim.fitting.estimate import Fit
from microsim.fitting.families import AFT
from microsim.fitting.kaplan_meier import Z95


def models_table(fits: list[Fit], chosen: Fit) -> pd.DataFrame:
    """One row per model, best first: parameters, log L, AIC, BIC, AIC above the best."""
    best = min(f.aic for f in fits if f.converged) if any(f.converged for f in fits) else np.nan
    return pd.DataFrame({
        "rank": np.arange(1, len(fits) + 1), "family": [f.family.name for f in fits],
        "form": [f.form for f in fits], "label": [f.label for f in fits],
        "parameters": [f.size for f in fits],
        "log_likelihood": [f.log_likelihood for f in fits], "aic": [f.aic for f in fits],
        "bic": [f.bic for f in fits], "delta_aic": [f.aic - best for f in fits],
        "converged": [f.converged for f in fits], "note": [f.note for f in fits],
        "chosen": [f is chosen for f in fits]})


def natural_name(fit: Fit, k: int) -> str:
    p = len(fit.family.parameters)
    if k < p:
        return fit.family.parameters[k]
    return "time ratio" if fit.form == AFT else "hazard ratio"


def parameters_table(fits: list[Fit]) -> pd.DataFrame:
    """Each estimate on the fit's scale with its standard error and 95% interval (Wald:
    estimate +- 1.96 SE), and the same on the scenario's scale: exp for the log-scale
    parameters, and a coefficient as its hazard ratio or time ratio."""
    rows = []
    for fit in fits:
        p = len(fit.family.parameters)
        logged = list(fit.family.on_log) + [True] * len(fit.covariates)
        for k, (name, estimate, se) in enumerate(zip(fit.names, fit.estimate, fit.se)):
            lower, upper = estimate - Z95 * se, estimate + Z95 * se
            back = np.exp if logged[k] else (lambda x: x)
            rows.append((fit.family.name, fit.form, name, "covariate" if k >= p else "family",
                         estimate, se, lower, upper, natural_name(fit, k), back(estimate),
                         back(lower), back(upper)))
    return pd.DataFrame(rows, columns=["family", "form", "parameter", "kind", "estimate", "se",
                                       "lower", "upper", "natural", "natural_value",
                                       "natural_lower", "natural_upper"])


def covariance_table(fits: list[Fit]) -> pd.DataFrame:
    """family, form, row, column, covariance: the inverse observed information, long."""
    rows = []
    for fit in fits:
        if fit.covariance is None:
            continue
        for i, a in enumerate(fit.names):
            for j, b in enumerate(fit.names):
                rows.append((fit.family.name, fit.form, a, b, float(fit.covariance[i, j])))
    return pd.DataFrame(rows, columns=["family", "form", "row", "column", "covariance"])
