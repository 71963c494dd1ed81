"""The main job, end to end: read, bind, simulate, compare with the cohort, report, write.

Kept apart from the CLI so that scripts and tests run exactly what `microsim run` runs.
"""
from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from microsim import CAUTION
from microsim.api import cohort_trace, expected_outcomes
from microsim.binding import bind
from microsim.compare import Comparison, compare
from microsim.population import draw_population
from microsim.scenario import read_scenario
from microsim.simulate import Simulation, cohort_patients, report_grid, simulate

DEFAULT_PATIENTS = 2000


@dataclass(frozen=True)
class Validation:
    simulation: Simulation
    comparison: Comparison


def validate(path: Path, patients: int | None = None, seed: int | None = None,
             histories: Path | None = None) -> Validation:
    """Simulate the scenario's population and compare it with the analytic counterpart."""
    scenario = read_scenario(path)
    model = bind(scenario)
    seed = scenario.simulation.seed if seed is None else seed
    population = scenario.population
    size = patients or (population.size if population else DEFAULT_PATIENTS)
    people = (draw_population(population, seed, range(size)) if population and
              (population.attributes or population.file) else cohort_patients(size))
    sim = simulate(model, people, seed, batch_size=scenario.simulation.batch_size,
                   grid=report_grid(model, scenario.simulation.grid), histories=histories)
    return Validation(sim, compare(sim))


def run_scenario(args) -> int:
    from microsim.cli import show, write
    started = time.perf_counter()
    path = Path(args.scenario)
    scenario = read_scenario(path)
    model = bind(scenario)
    trace = cohort_trace(model)
    outcomes = expected_outcomes(model)
    print(f"microsim run — {scenario.title}\n{scenario.provenance}")
    show("Expected outcomes per patient, uniform cohort (analytic)", outcomes)
    check = validate(path, args.patients, args.seed)
    c = check.comparison
    print(f"\nSimulated {check.simulation.size} patients "
          f"({check.simulation.transitions} transitions and events).")
    show("Simulated population against its analytic counterpart", c.outcomes)
    print(f"\nValidation: {c.verdict}")
    show("The 'average patient' cohort against the simulated population", c.average_patient)
    print(f"\n{c.average_verdict}")
    tables = {"cohort_trace": trace, "cohort_outcomes": outcomes,
              "validation_shares": c.shares, "validation_outcomes": c.outcomes,
              "average_patient": c.average_patient}
    write(args, path, tables, started, seed=args.seed or scenario.simulation.seed,
          patients=check.simulation.size, verdict=c.verdict)
    print(f"\n{CAUTION}")
    return 0
