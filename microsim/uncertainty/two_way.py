"""Two-way sensitivity analysis: two parameters varied together over a grid of their
low..high ranges, the others at base.

Each grid setting is evaluated by the one-way analysis's `Settings` (the same patients and
measure; exact where the model has an exact counterpart, else simulated with common random
numbers and a Monte-Carlo standard error). The grid holds each parameter's base value, so
its two lines through the base case are the one-way analysis of each parameter.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from microsim.scenario.read_sensitivity import grid_values
from microsim.uncertainty.one_way import EXACT, SIMULATED, Settings, as_text

COLUMNS = ["strategy", "measure", "compared_with", "first_parameter", "first_value",
           "second_parameter", "second_value", "result", "se", "at_base", "basis"]


def two_way(settings: Settings, first: str, second: str, points: int) -> pd.DataFrame:
    """One row per strategy and grid setting: the parameters' values, the measure and its
    Monte-Carlo SE (nan where exact); `at_base` marks settings on a line through the base
    case (one parameter at its base value)."""
    parameters = settings.scenario.parameters
    xs, ys = grid_values(parameters[first], points), grid_values(parameters[second], points)
    frames = []
    for name in settings.chosen:
        found = [settings.at(name, {first: float(x), second: float(y)}) for x in xs for y in ys]
        frame = pd.DataFrame({
            "first_parameter": first, "first_value": np.repeat(xs, len(ys)),
            "second_parameter": second, "second_value": np.tile(ys, len(xs)),
            "result": [f.value for f in found], "se": [f.se for f in found]})
        frames.append(settings.labelled(frame, name))
    table = pd.concat(frames, ignore_index=True)
    table["at_base"] = ((table.first_value == settings.base[first])
                        | (table.second_value == settings.base[second]))
    table["basis"] = np.where(table.se.isna(), EXACT, SIMULATED)
    as_text(table, "strategy", "measure", "compared_with", "first_parameter",
            "second_parameter", "basis")
    return table[COLUMNS]
