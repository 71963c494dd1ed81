"""Survival: the share of patients not yet absorbed, simulated against its analytic
counterpart, with its own exact Monte-Carlo standard error.

Patient b is not yet absorbed at time t with probability q_b(t), the sum of its analytic
state probabilities over the non-absorbing states, independently of the other patients. The
simulated share is then a mean of independent Bernoulli trials (Poisson-binomial), whose
standard error is sqrt(sum_b q_b (1 - q_b)) / N exactly. The state shares' own standard
errors cannot give it: the states' counts are correlated.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from microsim.cohort.analytic import CohortResult
from microsim.results.comparison import z_scores
from microsim.simulation import Simulation

COLUMNS = ["time", "simulated", "analytic", "se", "z"]


def survival_table(sim: Simulation, result: CohortResult) -> pd.DataFrame:
    """time, simulated, analytic, se, z on the simulation's grid; no rows when the model
    has no absorbing state (nobody can leave the living states)."""
    alive = ~np.asarray(sim.model.absorbing, bool)
    if alive.all():
        return pd.DataFrame(columns=COLUMNS, dtype=float)
    q = np.clip(result.trace[..., alive].sum(axis=-1), 0.0, 1.0)  # (B, T)
    q = np.broadcast_to(q, (sim.size, q.shape[1]))  # a uniform cohort: one row for everyone
    simulated = alive[sim.states].mean(axis=0)
    analytic_share = q.mean(axis=0)
    se = np.sqrt((q * (1.0 - q)).sum(axis=0)) / sim.size
    return pd.DataFrame({"time": sim.grid, "simulated": simulated, "analytic": analytic_share,
                         "se": se, "z": z_scores(simulated - analytic_share, se)})
