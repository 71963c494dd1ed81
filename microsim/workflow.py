"""The main job, end to end: read, simulate every strategy on the same patients, compare
with the cohort, evaluate, report, write.

Kept apart from the CLI so that scripts and tests run exactly what `microsim run` runs.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from microsim.capacity.run import refuse_options, run_service
from microsim.cohort.summaries import cohort_trace
from microsim.binding import bind
from microsim.results.comparison import Comparison, compare, analytic_counterpart
from microsim.results.survival import survival_table
from microsim.decision.strategies import Decision, decide, run_strategies
from microsim.patients.population import patients_for
from microsim.uncertainty.psa import PsaResult, parameter_uncertainty
from microsim.scenario import Scenario, ScenarioError, read_scenario
from microsim.scenario.fields import did_you_mean
from microsim.simulation import Simulation, choose_engine, report_grid, simulate

@dataclass(frozen=True)
class Validation:
    simulation: Simulation
    comparison: Comparison


def validate(path: Path, patients: int | None = None, seed: int | None = None,
             strategy: str | None = None, histories: Path | None = None,
             engine: str = "auto") -> Validation:
    """Simulate the scenario (or one strategy) and compare it with its analytic counterpart
    (a service with shared capacity: its queues with queueing theory, a `ServiceResult`)."""
    scenario = read_scenario(path)
    if strategy is not None and strategy not in {s.name for s in scenario.strategies}:
        names = ", ".join(s.name for s in scenario.strategies) or "none"
        raise ScenarioError("--strategy", f"no strategy {strategy!r}"
                            f"{did_you_mean(strategy, [s.name for s in scenario.strategies])}; "
                            f"the scenario has: {names}")
    seed = scenario.simulation.seed if seed is None else seed
    if scenario.capacity is not None:  # patients share capacity: microsim.capacity runs it
        refuse_options(engine=engine, histories=histories is not None)
        return run_service(scenario, seed, patients, [strategy])
    model = bind(scenario, strategy=strategy)
    sim = simulate(model, patients_for(scenario, patients, seed), seed,
                   batch_size=scenario.simulation.batch_size,
                   grid=report_grid(model, scenario.simulation.grid), histories=histories,
                   engine=engine)
    return Validation(sim, compare(sim))


@dataclass(frozen=True)
class MainResult:
    scenario: Scenario
    seed: int
    simulations: dict[str, Simulation]
    validations: dict[str, Comparison]
    decision: Decision | None
    psa: PsaResult | None = None
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)


def run_main(path: Path, patients: int | None = None, seed: int | None = None,
             psa: dict | None = None, engine: str = "auto",
             invalid_draws: str | None = None, options: dict | None = None) -> MainResult:
    """Every strategy (or the model as written) on the same patients, validated against
    the analytic counterpart, evaluated, and with PSA when `psa` settings are given
    (`invalid_draws` overrides the scenario's uncertainty.invalid_draws, `options` the keys
    of `microsim.scenario.options`; a service with
    shared capacity: `microsim.capacity.run.run_service`, a `ServiceResult`).

    What can be refused is refused before any work: the engine, the patients, and the PSA
    (its folder of another run, its backend) by running it first; its finished draws stay
    on disk however the rest ends."""
    scenario = read_scenario(path, invalid_draws, options)
    seed = scenario.simulation.seed if seed is None else seed
    if scenario.capacity is not None:  # patients share capacity: microsim.capacity runs it
        refuse_options(psa=psa is not None, engine=engine)
        return run_service(scenario, seed, patients)
    choose_engine(bind(scenario), engine)
    people = patients_for(scenario, patients, seed)
    psa_result = None if psa is None else parameter_uncertainty(scenario, seed=seed, **psa)
    sims = run_strategies(scenario, people, seed, engine=engine)
    decision = decide(scenario, sims) if scenario.strategies else None
    counterparts = {name: analytic_counterpart(sim) for name, sim in sims.items()}
    validations = {name: compare(sim, counterparts[name]) for name, sim in sims.items()}
    survival = {name: survival_table(sim, counterparts[name]) for name, sim in sims.items()}
    return MainResult(scenario, seed, sims, validations, decision, psa_result,
                      result_tables(scenario, validations, survival, decision, psa_result))


def result_tables(scenario, validations, survival, decision, psa) -> dict[str, pd.DataFrame]:
    tables = {"cohort_trace": cohort_trace(bind(scenario))}
    tables["validation_shares"] = pd.concat(
        [v.shares.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
    tables["validation_survival"] = pd.concat(
        [table.assign(strategy=n) for n, table in survival.items()], ignore_index=True)
    tables["validation_subgroups"] = pd.concat(
        [v.subgroups.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
    tables["validation_outcomes"] = pd.concat(
        [v.outcomes.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
    tables["average_patient"] = pd.concat(
        [v.average_patient.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
    if decision is not None:
        tables.update({"patient_outcomes": decision.outcomes, "strategies": decision.strategies,
                       "increments": decision.increments,
                       "incremental_analysis": decision.analysis,
                       "net_benefit": decision.net_benefit, "subgroups": decision.subgroups,
                       "precision": decision.precision})
    if psa is not None:
        tables.update({"psa_draws": psa.results, "psa_parameters": psa.draws,
                       "psa_outcomes": psa.outcomes, "psa_changed_draws": psa.changed})
        if psa.note is None:
            tables.update({"acceptability": psa.acceptability, "evpi": psa.evpi,
                           "ce_plane": psa.plane, "psa_variance": psa.variance})
            if psa.evppi is not None:
                tables["evppi"] = psa.evppi
    return tables
