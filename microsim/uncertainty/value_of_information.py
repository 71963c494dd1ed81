"""The value of information a PSA reports: per-patient EVPI for the population the decision
reaches, and EVPPI for the parameter groups of `uncertainty.evppi`.

Population EVPI is the per-patient EVPI times the discounted number of patients the
decision affects over its lifetime, EVPI x sum_{t=1..T} I_t / (1 + r)^t, with I_t the
new patients in year t (economics.incidence), T economics.evpi_years and r
economics.evpi_discount (Claxton 1999, "The irrelevance of inference", J Health Econ
18:341-364; Briggs, Claxton & Sculpher 2006, "Decision Modelling for Health Economic
Evaluation", ch. 7; from memory, as `economics.discounted_population`). It bounds what
further research into the decision could be worth.
"""
from __future__ import annotations

import pandas as pd

from microsim.decision import economics
from microsim.scenario.errors import ScenarioError
from microsim.scenario.spec import Scenario
from microsim.uncertainty.evppi import evppi_table
from microsim.uncertainty.smoothing import minimum_rows


def check_evppi_draws(scenario: Scenario, n_draws: int) -> None:
    """Refuse, before any draw is run, a group too large for the number of draws."""
    for i, group in enumerate(scenario.uncertainty.evppi):
        need = minimum_rows(len(group))
        if n_draws < need:
            raise ScenarioError(f"uncertainty.evppi[{i}]", f"EVPPI of {len(group)} "
                                f"parameter(s) needs at least {need} PSA draws, and the PSA "
                                f"has {n_draws}; raise uncertainty.draws (or --draws)")


def information_values(scenario: Scenario, parameters: pd.DataFrame, results: pd.DataFrame,
                       evpi: pd.DataFrame, thresholds, comparator: str
                       ) -> tuple[pd.DataFrame, pd.DataFrame | None]:
    """The EVPI table (with population_evpi when economics gives the population) and the
    EVPPI table of the named groups (with population_evppi likewise), None without groups."""
    e = scenario.economics
    incidence = None if e.evpi_years is None else e.incidence_by_year(e.evpi_years)
    if incidence is not None:
        evpi = economics.population_evpi(evpi, incidence, e.evpi_discount)
    groups = scenario.uncertainty.evppi
    if not groups:
        return evpi, None
    table = evppi_table(parameters, results, groups, thresholds, comparator,
                        scenario.simulation.seed)
    if incidence is not None:
        people = economics.discounted_population(incidence, e.evpi_discount)
        table = table.assign(population_evppi=table["evppi"] * people)
    return evpi, table
