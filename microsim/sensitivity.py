"""One-way sensitivity of a scenario's decision: tornado data for incremental net benefit.

Each setting is evaluated on the same generated patients. Where the model has an exact
counterpart, the patients' analytic expectations are used, so the tornado carries no
Monte-Carlo noise at all; otherwise every strategy is simulated with common random numbers.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.decision import COST, EFFECT, strategy_names
from microsim.outcomes import outcome_values
from microsim.scenario.spec import Scenario
from microsim.simulate import simulate
from microsim.strategies import patient_multipliers
from microsim.uncertainty import one_way


def expected_outcomes(scenario: Scenario, people: pd.DataFrame, seed: int, values: dict,
                      strategy: str | None) -> dict[str, float]:
    """Mean discounted cost and effect over the patients, exactly when possible."""
    model = bind(scenario, values, strategy=strategy)
    mult = patient_multipliers(model, people, seed)
    result = analytic(model, mult=mult)
    exposure = (result.exposure if result.exact
                else simulate(model, people, seed, mult=mult).exposure)
    means = outcome_values(model, exposure)
    return {"cost": float(np.mean(means[COST])), "effect": float(np.mean(means[EFFECT]))}


def tornado(scenario: Scenario, patients: int | None = None, seed: int | None = None):
    """The one-way table and the name of the measure it varies."""
    from microsim.workflow import patients_for
    seed = scenario.simulation.seed if seed is None else seed
    people = patients_for(scenario, patients, seed)
    names = strategy_names(scenario) or [None]
    threshold = scenario.economics.threshold

    def evaluate(values: dict) -> pd.DataFrame:
        rows = [{"strategy": str(name), **expected_outcomes(scenario, people, seed, values, name)}
                for name in names]
        return pd.DataFrame(rows)

    def net_benefit(table: pd.DataFrame) -> float:
        nmb = threshold * table["effect"] - table["cost"]
        return float(nmb.iloc[1] - nmb.iloc[0]) if len(nmb) > 1 else float(nmb.iloc[0])

    measure = (f"incremental NMB of {names[1]} against {names[0]} at {threshold:g}"
               if len(names) > 1 else f"NMB at {threshold:g}")
    return one_way(evaluate, scenario.parameters, net_benefit), measure
