"""One-way deterministic sensitivity analysis: the numbers behind a tornado diagram.

`one_way` varies each ranged parameter on its own around any model evaluation; `tornado`
applies it to a scenario's decision. Each setting is evaluated on the same generated
patients. Where the model has an exact counterpart, the patients' analytic expectations are
used, so the tornado carries no Monte-Carlo noise at all; otherwise every strategy is
simulated with common random numbers.
"""
from __future__ import annotations

from typing import Callable, Mapping

import numpy as np
import pandas as pd

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.decision.strategies import COST, EFFECT, strategy_names
from microsim.patients.treatment import patient_multipliers
from microsim.results.outcomes import outcome_values
from microsim.scenario.errors import ScenarioError
from microsim.scenario.spec import ParameterSpec, Scenario
from microsim.simulation import simulate

COLUMNS = ["parameter", "low", "high", "base", "result_low", "result_high", "result_base", "swing"]


def one_way(evaluate_values: Callable[[dict[str, float]], pd.DataFrame],
            parameters: Mapping[str, ParameterSpec],
            measure: Callable[[pd.DataFrame], float]) -> pd.DataFrame:
    """Each parameter with a low..high range set to low, then high, the others at base.

    `measure` reduces a model result to one number (e.g. incremental NMB). One row per
    varied parameter, widest swing |result_high - result_low| first (ties keep the
    parameters' order): parameter, low, high, base (the parameter's value),
    result_low, result_high, result_base (every parameter at base), swing.
    """
    base = {name: float(spec.value) for name, spec in parameters.items()}
    ranged = [spec for spec in parameters.values() if spec.low is not None and spec.high is not None]
    if not ranged:
        raise ScenarioError("parameters", "no parameter has a low..high range; give low and "
                                          "high to the parameters to vary")

    def result(changes: dict[str, float]) -> float:
        return float(measure(evaluate_values({**base, **changes})))

    at_base = result({})
    rows = []
    for spec in ranged:
        low, high = result({spec.name: float(spec.low)}), result({spec.name: float(spec.high)})
        rows.append({"parameter": spec.name, "low": float(spec.low), "high": float(spec.high),
                     "base": base[spec.name], "result_low": low, "result_high": high,
                     "result_base": at_base, "swing": abs(high - low)})
    table = pd.DataFrame(rows, columns=COLUMNS)
    table["parameter"] = table["parameter"].astype("string")
    return table.sort_values("swing", ascending=False, kind="stable").reset_index(drop=True)


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
    from microsim.patients.population import patients_for
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
