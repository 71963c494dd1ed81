"""The main job, end to end: read, simulate every strategy on the same patients, compare
with the cohort, evaluate, report, write.

Kept apart from the CLI so that scripts and tests run exactly what `microsim run` runs.
"""
from __future__ import annotations

from collections import Counter
from contextlib import nullcontext
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from microsim.binding import bind
from microsim.capacity.run import refuse_options, run_service
from microsim.cohort.analytic import solved_numerically
from microsim.cohort.summaries import cohort_trace
from microsim.decision.strategies import (AS_WRITTEN, Decision, OutcomeRows, decide,
                                          strategy_names, treated_count, treatment_counts)
from microsim.progress import progress
from microsim.patients.population import (DEFAULT_PATIENTS, PATIENT, scenario_patients,
                                          subgroup_attributes)
from microsim.results.comparison import Comparison, ComparisonSums, comparison_grid
from microsim.scenario import Scenario, ScenarioError, read_scenario
from microsim.scenario.fields import did_you_mean
from microsim.simulation import HistoryFile, choose_engine, simulate
from microsim.uncertainty.psa import PsaResult, parameter_uncertainty


@dataclass(frozen=True)
class PopulationRun:
    """What a run keeps of its patients. Patients are drawn, simulated and compared batch
    by batch (`simulation.batch_size`), so a run holds per patient only what paired
    statistics need: each strategy's outcomes and the patient's subgroups; the comparisons
    with the analytic counterpart are sums."""
    size: int
    outcomes: pd.DataFrame  # patient, strategy, measures
    patients: pd.DataFrame  # patient and its subgroup attributes
    treated: dict[str, int]  # patients each strategy puts on treatment
    validations: dict[str, Comparison]
    # a sequence's patients on each of its treatments, by strategy (`treatment_counts`)
    treated_by: dict[str, dict[str, int]] = field(default_factory=dict)
    validated: int = 0  # the first patients compared with the analytic counterpart


def run_population(scenario: Scenario, size: int | None, seed: int, engine: str = "auto",
                   strategies: list[str | None] | None = None,
                   histories: Path | None = None, compare_all: bool = False) -> PopulationRun:
    """Every strategy (default: all, or the model as written) on the scenario's patients
    0..size-1, batch by batch, each batch's strategies on the same patients and draws. The
    first `simulation.validation_patients` are compared with the analytic counterpart (all
    of them with `compare_all`): an exact per-patient counterpart costs about as many times
    a simulation as the model has expanded states, so a very large run is validated on a
    large sample of its own patients."""
    spec = scenario.population
    n = size if size is not None else (spec.size if spec else DEFAULT_PATIENTS)
    chosen = strategies if strategies is not None else (strategy_names(scenario) or [None])
    models = {name or AS_WRITTEN: bind(scenario, strategy=name) for name in chosen}
    limit = None if compare_all else validation_limit(scenario, models.values())
    sums = {label: ComparisonSums(model, comparison_grid(model, scenario.simulation.grid), limit)
            for label, model in models.items()}
    people, treated = [], Counter()
    treated_by: dict[str, Counter] = {}
    batch = scenario.simulation.batch_size
    outcomes = OutcomeRows(n * len(models), list(models))
    with (HistoryFile(histories) if histories is not None else nullcontext()) as file, \
            progress(n * len(models), "Patients simulated", "patient") as bar:
        for lo in range(0, n, batch):
            patients = scenario_patients(scenario, seed, np.arange(lo, min(n, lo + batch)))
            for label, model in models.items():
                sim = simulate(model, patients, seed, batch_size=batch, grid=sums[label].grid,
                               histories=file, engine=engine)
                sums[label].add(sim)
                outcomes.add(label, sim)
                treated[label] += treated_count(sim)
                counts = treatment_counts(sim)
                if counts:
                    treated_by.setdefault(label, Counter()).update(counts)
                bar.update(len(patients))
            people.append(patients[[PATIENT, *subgroup_attributes(patients)]])
    return PopulationRun(n, outcomes.frame(),
                         pd.concat(people, ignore_index=True), dict(treated),
                         {label: s.finish() for label, s in sums.items()},
                         {label: dict(c) for label, c in treated_by.items()},
                         n if limit is None else min(n, limit))


VALIDATED = 100_000, 5_000  # patients `run` compares by default: where the counterpart is
# closed form, and where it is the forward equations (about 0.2 s per 64 distinct patients
# and strategy for a small Weibull model with covariates, so 5,000 take some 15 s a strategy)


def validation_limit(scenario: Scenario, models) -> int:
    """How many of a run's first patients are compared with the analytic counterpart:
    `simulation.validation_patients`, else VALIDATED by how the counterpart is computed."""
    given = scenario.simulation.validation_patients
    if given is not None:
        return given
    closed, numerical = VALIDATED
    return numerical if any(solved_numerically(m) for m in models) else closed


def scenario_of(source: Path | Scenario, options: dict | None = None) -> Scenario:
    """A scenario as given, or read from its file (a command reads it once and passes it on)."""
    return source if isinstance(source, Scenario) else read_scenario(source, options)


def refuse_unknown_strategy(scenario: Scenario, strategy: str | None) -> None:
    """A `--strategy` the scenario does not have is refused before any work, naming the
    ones it has (None, the model as written, always exists)."""
    if strategy is not None and strategy not in {s.name for s in scenario.strategies}:
        names = ", ".join(s.name for s in scenario.strategies) or "none"
        raise ScenarioError("--strategy", f"no strategy {strategy!r}"
                            f"{did_you_mean(strategy, [s.name for s in scenario.strategies])}; "
                            f"the scenario has: {names}")


def validate(source: Path | Scenario, patients: int | None = None, seed: int | None = None,
             strategy: str | None = None, histories: Path | None = None,
             engine: str = "auto") -> PopulationRun:
    """Simulate the scenario (or one strategy) and compare it with its analytic counterpart
    (a service with shared capacity: its queues with queueing theory, a `ServiceResult`)."""
    scenario = scenario_of(source)
    refuse_unknown_strategy(scenario, strategy)
    seed = scenario.simulation.seed if seed is None else seed
    if scenario.capacity is not None:  # patients share capacity: microsim.capacity runs it
        refuse_options(engine=engine, histories=histories is not None)
        return run_service(scenario, seed, patients, [strategy])
    choose_engine(bind(scenario), engine)
    return run_population(scenario, patients, seed, engine, [strategy], histories,
                          compare_all=True)


@dataclass(frozen=True)
class MainResult:
    scenario: Scenario
    seed: int
    population: PopulationRun
    validations: dict[str, Comparison]
    decision: Decision | None
    psa: PsaResult | None = None
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)


def refuse_too_few(scenario: Scenario, patients: int | None) -> None:
    """Strategies are compared on paired per-patient differences, whose standard errors
    need two patients at least."""
    spec = scenario.population
    n = patients if patients is not None else (spec.size if spec else DEFAULT_PATIENTS)
    if scenario.strategies and n < 2:
        where = "--patients" if patients is not None else "population.patients"
        raise ScenarioError(where, f"is {n}; comparing strategies needs at least 2 patients "
                                   "(their paired differences have a standard error)")


def run_main(source: Path | Scenario, patients: int | None = None, seed: int | None = None,
             psa: dict | None = None, engine: str = "auto",
             options: dict | None = None) -> MainResult:
    """Every strategy (or the model as written) on the same patients, validated against
    the analytic counterpart, evaluated, and with PSA when `psa` settings are given
    (`options` override the keys of `microsim.scenario.options`; a service with
    shared capacity: `microsim.capacity.run.run_service`, a `ServiceResult`).

    What can be refused is refused before any work: the engine, the patients, and the PSA
    (its folder of another run, its backend) by running it first; its finished draws stay
    on disk however the rest ends."""
    scenario = scenario_of(source, options)
    seed = scenario.simulation.seed if seed is None else seed
    if scenario.capacity is not None:  # patients share capacity: microsim.capacity runs it
        refuse_options(psa=psa is not None, engine=engine)
        return run_service(scenario, seed, patients)
    choose_engine(bind(scenario), engine)
    scenario_patients(scenario, seed, np.arange(1))  # a population file is checked first
    if patients is not None and scenario.population is not None:  # --patients is the key
        scenario = replace(scenario, population=replace(scenario.population, size=patients))
    refuse_too_few(scenario, patients)
    psa_result = None if psa is None else parameter_uncertainty(scenario, seed=seed, **psa)
    run = run_population(scenario, patients, seed, engine)
    decision = (decide(scenario, run.outcomes, run.patients, run.treated)
                if scenario.strategies else None)
    return MainResult(scenario, seed, run, run.validations, decision, psa_result,
                      result_tables(scenario, run.validations, decision, psa_result))


def result_tables(scenario, validations, decision, psa) -> dict[str, pd.DataFrame]:
    tables = {"cohort_trace": cohort_trace(bind(scenario))}
    tables["validation_shares"] = pd.concat(
        [v.shares.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
    tables["validation_survival"] = pd.concat(
        [v.survival.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
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
                           "ce_plane": psa.plane})
            if psa.variance is not None:
                tables["psa_variance"] = psa.variance
            if psa.evppi is not None:
                tables["evppi"] = psa.evppi
    return tables
