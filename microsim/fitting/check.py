"""The scenario written from a fit, simulated: its survival against the fitted model's and
against its analytic counterpart.

The written scenario resamples the data's patients, so a simulated patient's covariates
are a draw from the data's rows and its survival to t is a Bernoulli trial with success
probability S(t) = mean_i S(t | x_i), the fitted curve of `curves.average_curves`: the
simulated share then has the binomial standard error sqrt(S (1 - S) / N). The analytic
counterpart (the comparison's survival table, `microsim.results.comparison`) is the
average over the simulated patients themselves, with its own Poisson-binomial error.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from microsim.binding import bind
from microsim.fitting.curves import average_curves
from microsim.fitting.data import SurvivalData
from microsim.fitting.estimate import Fit
from microsim.patients.population import patients_for
from microsim.results.comparison import compare, z_scores
from microsim.scenario import read_scenario
from microsim.simulation import simulate


def simulated_check(scenario_path: Path, fit: Fit, data: SurvivalData, patients: int,
                    seed: int) -> pd.DataFrame:
    """time, fitted, simulated, se_fitted, z_fitted, analytic, se, z on the report grid."""
    scenario = read_scenario(scenario_path)
    model = bind(scenario)
    people = patients_for(scenario, patients, seed)
    sim = simulate(model, people, seed)
    table = compare(sim).survival
    fitted, _ = average_curves(fit, data, table.time.to_numpy())
    fitted = np.clip(fitted, 0.0, 1.0)  # round-off can put a survival a hair outside
    se_fitted = np.sqrt(fitted * (1.0 - fitted) / sim.size)
    return pd.DataFrame({"time": table.time, "fitted": fitted, "simulated": table.simulated,
                         "se_fitted": se_fitted,
                         "z_fitted": z_scores(table.simulated.to_numpy() - fitted, se_fitted),
                         "analytic": table.analytic, "se": table.se, "z": table.z})
