"""A capacity scenario end to end: every strategy's replications on common random numbers,
the warm-up, the statistics of each window, the comparison of strategies and the tables.

Replication r of every strategy runs the same patients (ids r * REPLICATION_STRIDE + k) with
the same draws, so strategies are compared replication by replication (paired). With one
replication of an open population the run is cut into BATCHES batches after the warm-up
(batch means; 10 to 30 batches is the usual advice, Schmeiser 1982, "Batch size effects in
the analysis of simulation output", Operations Research 30:556-568, from memory). The
service's outcomes are per time unit of the window for an open population and per patient
for a closed cohort. The comparator also runs without any capacity limit: what a model of
independent patients (a cohort model) would report for the same patients.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from microsim.capacity.arrivals import arrival_times, first_id
from microsim.capacity.binding import CapacityModel, bind_capacity
from microsim.capacity.engine import ServiceRun, simulate_service
from microsim.capacity.outcomes import window_outcomes
from microsim.capacity.statistics import (interval, interval_means, over_time, summarise,
                                          window_measures)
from microsim.capacity.validation import QueueValidation, compare_queues
from microsim.capacity.warm_up import WarmUp, estimate_warm_up
from microsim.decision.strategies import AS_WRITTEN, frontier, strategy_names
from microsim.patients.population import DEFAULT_PATIENTS, scenario_patients
from microsim.patients.treatment import patient_multipliers
from microsim.scenario.errors import ScenarioError
from microsim.scenario.spec import Scenario
from microsim.simulation import report_grid

BATCHES = 20
REFERENCE = "no capacity limit"
STATED = "stated in the scenario"


@dataclass(frozen=True)
class StrategyRuns:
    name: str
    cm: CapacityModel
    runs: tuple[ServiceRun, ...]

    @property
    def cut(self) -> bool:
        return any(run.cut_at is not None for run in self.runs)


def arrivals_of(cm: CapacityModel, seed: int, r: int, patients: int | None
                ) -> tuple[np.ndarray, float | None]:
    """Replication r's arrival times: an open population's (at most `patients`, and when
    that limit stops them, the last one's time), or a closed cohort of `patients` at 0."""
    if cm.arrivals is None:
        return np.zeros(patients), None
    times = arrival_times(cm.arrivals, seed, r, cm.end, None if patients is None else patients + 1)
    if patients is not None and len(times) > patients:
        return times[:patients], float(times[patients - 1])
    return times, None


def run_replications(scenario: Scenario, models: dict[str, CapacityModel], seed: int, count: int,
                 patients: int | None) -> dict[str, tuple[ServiceRun, ...]]:
    """`count` replications of every strategy. Replication r depends on (seed, r) only, so
    replications can run in any order, alone or together; its patients are drawn once
    (patient k is the same patient in every strategy) and each strategy runs them."""
    runs: dict[str, list[ServiceRun]] = {name: [] for name in models}
    for r in range(count):
        times = {name: arrivals_of(cm, seed, r, patients) for name, cm in models.items()}
        most = max(len(t) for t, _ in times.values())
        people = scenario_patients(scenario, seed, first_id(r) + np.arange(most))
        for name, cm in models.items():
            arrival, cut_at = times[name]
            mine = people.iloc[:len(arrival)]
            mult = patient_multipliers(cm.model, mine, seed)
            runs[name].append(simulate_service(cm, mine, arrival, mult, seed, r, cut_at))
    return {name: tuple(r) for name, r in runs.items()}


def replication(scenario: Scenario, cm: CapacityModel, seed: int, r: int,
                patients: int | None) -> ServiceRun:
    """Replication r of one strategy alone (the same run `run_replications` makes)."""
    arrival, cut_at = arrivals_of(cm, seed, r, patients)
    people = scenario_patients(scenario, seed, first_id(r) + np.arange(len(arrival)))
    mult = patient_multipliers(cm.model, people, seed)
    return simulate_service(cm, people, arrival, mult, seed, r, cut_at)


def patient_limit(scenario: Scenario, patients: int | None) -> int | None:
    """Closed cohort: its size. Open population: the most arrivals per replication."""
    if patients is not None:
        return patients
    size = scenario.population.size if scenario.population is not None else None
    if scenario.capacity.arrivals is None:
        return size or DEFAULT_PATIENTS
    return size


@dataclass(frozen=True)
class Window:
    group: int
    replication: int
    lo: float
    hi: float


def windows(count: int, warm_up: float, end: float) -> list[Window]:
    """Replications after the warm-up; one replication: BATCHES equal batches of it."""
    if count > 1:
        return [Window(r, r, warm_up, end) for r in range(count)]
    edges = np.linspace(warm_up, end, BATCHES + 1)
    return [Window(g, 0, float(edges[g]), float(edges[g + 1])) for g in range(BATCHES)]


def warm_up_of(scenario: Scenario, strategies: list[StrategyRuns]) -> WarmUp:
    stated = scenario.capacity.replications.warm_up
    if stated is not None:
        return WarmUp(stated, STATED)
    grid = report_grid(strategies[0].cm.model, scenario.simulation.grid)
    series = {}
    for s in strategies:
        logs = [[run.logs[k] for run in s.runs] for k in range(len(s.cm.resources))]
        for resource, per_run in zip(s.cm.resources, logs):
            queue, in_use = interval_means(per_run, grid)
            series[f"{s.name}: {resource.name} queue"] = queue
            series[f"{s.name}: {resource.name} in use"] = in_use
    return estimate_warm_up(series, grid)


@dataclass(frozen=True)
class ServiceResult:
    """Everything a capacity run found; `tables` are the tidy tables written to disk."""
    scenario: Scenario
    seed: int
    strategies: dict[str, StrategyRuns]
    comparator: str
    warm_up: WarmUp
    windows: list[Window]
    per: str  # what outcomes are per: "day", "patient", ...
    queues: pd.DataFrame  # strategy, resource, measure, mean, se, lower, upper, groups
    outcomes: pd.DataFrame  # strategy, measure, mean, se, lower, upper, groups
    increments: pd.DataFrame
    analysis: pd.DataFrame | None
    net_benefit: pd.DataFrame | None
    validations: dict[str, QueueValidation]
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)

    @property
    def patients(self) -> int:
        """Patients simulated in all replications of the comparator."""
        return sum(len(run.patients) for run in self.strategies[self.comparator].runs)


def simulate_strategies(scenario: Scenario, names: list[str | None], seed: int,
                        patients: int | None, reference: bool = False
                        ) -> dict[str, StrategyRuns]:
    """Every named strategy's replications (None: the model as written), and with
    `reference` the first one's without any capacity limit too (named REFERENCE)."""
    models = {name or AS_WRITTEN: bind_capacity(scenario, name) for name in names}
    if reference:
        models[REFERENCE] = next(iter(models.values())).without_resources()
    runs = run_replications(scenario, models, seed, scenario.capacity.replications.count,
                            patient_limit(scenario, patients))
    return {name: StrategyRuns(name, models[name], runs[name]) for name in models}


def run_service(scenario: Scenario, seed: int, patients: int | None = None,
                strategies: list[str | None] | None = None) -> ServiceResult:
    """Simulate `strategies` (default: every strategy, comparator first; or the model as
    written) and the comparator without capacity limits, and tabulate what they did."""
    names = strategies if strategies is not None else (strategy_names(scenario) or [None])
    runs = simulate_strategies(scenario, names, seed, patients, reference=True)
    reference = runs.pop(REFERENCE)
    comparator = next(iter(runs))
    warm_up = warm_up_of(scenario, list(runs.values()))
    spans = windows(scenario.capacity.replications.count, warm_up.length, scenario.time.end)
    open_population = scenario.capacity.arrivals is not None
    queue_groups = pd.concat([queue_values(s, spans) for s in runs.values()], ignore_index=True)
    outcome_groups = pd.concat([outcome_values(s, spans, warm_up.length, open_population)
                                for s in [*runs.values(), reference]], ignore_index=True)
    queues_table = summarise(queue_groups, ["strategy", "resource"])
    outcomes_table = summarise(outcome_groups, ["strategy"])
    increments = paired_increments(outcome_groups, comparator, scenario.economics.threshold)
    analysis = benefit = None
    if len(runs) > 1:  # the frontier of the strategies' means over the groups
        by_group = outcome_groups[outcome_groups.strategy != REFERENCE].pivot(
            index=["strategy", "group"], columns="measure", values="value").reset_index()
        analysis, benefit = frontier(by_group, scenario.economics.threshold)
    batches = scenario.capacity.replications.count == 1
    validations = {name: compare_queues(s.cm, queue_groups[queue_groups.strategy == name],
                                        s.cut, open_population, batches)
                   for name, s in runs.items()}
    grid = report_grid(runs[comparator].cm.model, scenario.simulation.grid)
    tables = {"queue_summary": queues_table, "queue_groups": queue_groups,
              "queue_over_time": pd.concat([over_time_table(s, grid) for s in runs.values()],
                                           ignore_index=True),
              "queue_validation": pd.concat([v.table.assign(strategy=n)
                                             for n, v in validations.items()], ignore_index=True),
              "service_outcomes": outcomes_table, "service_groups": outcome_groups,
              "warm_up": pd.DataFrame({"length": [warm_up.length], "rule": [warm_up.rule],
                                       "note": [warm_up.note]})}
    if analysis is not None:
        tables.update({"service_increments": increments, "incremental_analysis": analysis,
                       "net_benefit": benefit})
    per = scenario.time.unit.removesuffix("s") if open_population else "patient"
    return ServiceResult(scenario, seed, runs, comparator, warm_up, spans, per, queues_table,
                         outcomes_table, increments, analysis, benefit, validations, tables)


def queue_values(s: StrategyRuns, spans: list[Window]) -> pd.DataFrame:
    rows = []
    for k, resource in enumerate(s.cm.resources):
        for w in spans:
            run = s.runs[w.replication]
            for measure, value in window_measures(run.logs[k], resource, w.lo, w.hi,
                                                  run.end).items():
                rows.append((s.name, resource.name, w.group, measure, value))
    return pd.DataFrame(rows, columns=["strategy", "resource", "group", "measure", "value"])


def outcome_values(s: StrategyRuns, spans: list[Window], origin: float, open_population: bool
                   ) -> pd.DataFrame:
    rows = []
    for w in spans:
        run = s.runs[w.replication]
        scale = (w.hi - w.lo) if open_population else len(run.patients)
        for measure, value in window_outcomes(run, s.cm, w.lo, w.hi, origin).items():
            rows.append((s.name, w.group, measure, value / scale))
    return pd.DataFrame(rows, columns=["strategy", "group", "measure", "value"])


def paired_increments(groups: pd.DataFrame, comparator: str, threshold: float) -> pd.DataFrame:
    """Each strategy minus the comparator, group by group (common random numbers): costs,
    QALYs and net monetary benefit at the threshold, with Student-t intervals."""
    wide = groups.pivot_table(index="group", columns=["strategy", "measure"], values="value")
    rows = []
    for name in dict.fromkeys(groups.strategy):
        if name in (comparator, REFERENCE):
            continue
        cost = wide[(name, "costs_discounted")] - wide[(comparator, "costs_discounted")]
        effect = wide[(name, "qalys_discounted")] - wide[(comparator, "qalys_discounted")]
        for measure, values in (("incremental_costs", cost), ("incremental_qalys", effect),
                                ("incremental_nmb", threshold * effect - cost)):
            rows.append((name, measure, *interval(values)))
    return pd.DataFrame(rows, columns=["strategy", "measure", "mean", "se", "lower", "upper",
                                       "groups"])


def over_time_table(s: StrategyRuns, grid: np.ndarray) -> pd.DataFrame:
    frames = [over_time([run.logs[k] for run in s.runs], resource, grid)
              .assign(strategy=s.name, resource=resource.name)
              for k, resource in enumerate(s.cm.resources)]
    if not frames:
        return pd.DataFrame(columns=["time", "queue_length", "in_use", "capacity",
                                     "utilisation", "strategy", "resource"])
    return pd.concat(frames, ignore_index=True)


def refuse_options(psa: bool = False, engine: str = "auto", histories: bool = False) -> None:
    """Options of the independent engines that a run with shared capacity cannot take."""
    if psa:
        raise ScenarioError("--psa", "a probabilistic sensitivity analysis of a service with "
                                     "shared capacity ([arrivals], [[resources]]) is not "
                                     "available yet; run without --psa")
    if engine == "vectorised":
        raise ScenarioError("--engine", "patients who share capacity run on the SimPy capacity "
                                        "engine; use auto or simpy")
    if histories:
        raise ScenarioError("--histories", "is not available for a service with shared "
                                           "capacity yet; run without it")
