"""One-way deterministic sensitivity analysis: the numbers behind a tornado diagram."""
from __future__ import annotations

from typing import Callable, Mapping

import pandas as pd

from ..scenario.errors import ScenarioError
from ..scenario.spec import ParameterSpec

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
