"""The deterministic sensitivity analyses of a scenario, together: one-way (the tornado),
two-way over `sensitivity.two_way`, and break-even for each of `sensitivity.break_even`.

They share one `Settings`, so they read the same patients, measure and strategies, and a
setting two of them need (the base case, the one-way ends on the two-way grid) is
evaluated once.
"""
from __future__ import annotations

import pandas as pd

from microsim.progress import progress
from microsim.scenario.spec import Scenario
from microsim.uncertainty.break_even import break_even
from microsim.uncertainty.one_way import Settings, tornado
from microsim.uncertainty.two_way import two_way


def sensitivity_tables(scenario: Scenario, patients: int | None = None,
                       seed: int | None = None, strategy: str | None = None,
                       measure: str | None = None) -> dict[str, pd.DataFrame]:
    """one_way always; two_way with a pair; break_even and break_even_curve with
    break-even parameters."""
    spec = scenario.sensitivity
    with progress(None, "Sensitivity settings evaluated", "setting") as bar:
        settings = Settings(scenario, patients, seed, strategy, measure, bar=bar)
        tables = {"one_way": tornado(scenario, settings=settings)}
        if spec.two_way:
            tables["two_way"] = two_way(settings, *spec.two_way, spec.grid)
        if spec.break_even:
            found = [break_even(settings, name, spec.grid) for name in spec.break_even]
            tables["break_even"] = pd.concat([f[0] for f in found], ignore_index=True)
            tables["break_even_curve"] = pd.concat([f[1] for f in found], ignore_index=True)
    return tables
