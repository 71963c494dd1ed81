"""Printing a capacity run for a person, and the same summary as a machine-readable document.

Nothing here computes a result; `microsim.capacity.run` did.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from microsim import CAUTION
from microsim.capacity.run import REFERENCE, ServiceResult
from microsim.present import records, show

SHOWN = {  # queue measure -> column heading
    "needing_per_time": "needing", "mean_wait": "mean_wait", "wait_median": "median",
    "wait_90th": "90th", "waited": "waited", "over_target": "over_target",
    "turned_away": "turned_away", "left_queue": "left_queue", "mean_queue": "queue",
    "utilisation": "utilisation"}
VALIDATION_TABLES = ("queue_validation", "queue_summary", "queue_groups", "warm_up")
OUTCOMES = {"costs_discounted": "costs", "capacity_costs_discounted": "of_which_capacity",
            "qalys_discounted": "qalys", "life_years": "life_years"}


def setting(result: ServiceResult) -> str:
    """What was run, in one paragraph."""
    s = result.scenario
    unit, end = s.time.unit, s.time.end
    runs = next(iter(result.strategies.values())).runs
    count = len(runs)
    arrivals = s.capacity.arrivals
    if arrivals is None:
        who = f"A closed cohort of {len(runs[0].patients)} patients, all there at time 0"
    else:
        how = (f"from {arrivals.file.name}" if arrivals.file is not None else
               f"at the rate {arrivals.rate!r}" if isinstance(arrivals.rate, str) else
               f"at {arrivals.rate:g} per {result.per}")
        mean = sum(len(r.patients) for r in runs) / count
        who = f"An open population arriving {how} ({mean:.0f} patients per replication)"
    groups = (f"{count} replications" if count > 1 else
              f"one run cut into {len(result.windows)} batches (batch means)")
    return (f"{who}, over {end:g} {unit}; {groups}; warm-up {result.warm_up.length:g} {unit} "
            f"({result.warm_up.rule}). Strategies run the same patients with the same draws, "
            "replication by replication (common random numbers).")


def queue_table(result: ServiceResult, resource: str) -> pd.DataFrame:
    rows = result.queues[(result.queues.resource == resource)
                         & result.queues.measure.isin(list(SHOWN))]
    table = rows.pivot(index="strategy", columns="measure", values="mean")
    table = table.loc[list(result.strategies), [m for m in SHOWN if m in table]]
    return table.rename(columns=SHOWN).dropna(axis=1, how="all").reset_index()


def outcome_table(result: ServiceResult) -> pd.DataFrame:
    rows = result.outcomes[result.outcomes.measure.isin(list(OUTCOMES))]
    means = rows.pivot(index="strategy", columns="measure", values="mean")
    errors = rows.pivot(index="strategy", columns="measure", values="se")
    order = [*result.strategies, REFERENCE]
    table = means.loc[order, list(OUTCOMES)].rename(columns=OUTCOMES)
    table = table.join(errors.loc[order, ["costs_discounted", "qalys_discounted"]]
                       .rename(columns={"costs_discounted": "costs_se",
                                        "qalys_discounted": "qalys_se"}))
    return table.reset_index()


def missed(result: ServiceResult) -> str:
    """What a model of independent patients would have got wrong, in words."""
    means = result.outcomes.pivot(index="strategy", columns="measure", values="mean")
    limited, free = means.loc[result.comparator], means.loc[REFERENCE]
    waits = result.queues[(result.queues.strategy == result.comparator)
                          & (result.queues.measure == "mean_wait")]
    wait = " and ".join(f"{r.mean:.3g} {result.scenario.time.unit} for {r.resource}"
                        for r in waits.itertuples() if np.isfinite(r.mean))
    qalys, costs = limited.qalys_discounted, limited.patient_costs_discounted
    return (f"a model of independent patients (a cohort model) has no queue: for the same "
            f"patients under {result.comparator} it gives {free.qalys_discounted:.4g} QALYs at "
            f"patient costs of {free.patient_costs_discounted:,.0f} per {result.per}. With the "
            "capacity limits they "
            + (f"wait {wait} on average and " if wait else "")
            + f"accrue {qalys:.4g} QALYs at {costs:,.0f} "
            f"({qalys - free.qalys_discounted:+.3g} QALYs, "
            f"{costs - free.patient_costs_discounted:+,.0f}), before the cost of the capacity "
            "itself.")


def print_service(result: ServiceResult) -> None:
    s = result.scenario
    print(f"microsim run — {s.title}\n{s.provenance}\n{setting(result)}")
    if result.warm_up.note:
        print(f"Note: {result.warm_up.note}.")
    if any(runs.cut for runs in result.strategies.values()):
        print("Note: arrivals stopped at the limit on patients (--patients or population.patients) "
              "before the end of the run; the service then emptied.")
    for resource in next(iter(result.strategies.values())).cm.resources:
        show(f"Waiting for {resource.label} (mean over {len(result.windows)} groups; waits in "
             f"{s.time.unit}; needing: patients per {s.time.unit.removesuffix('s')}; shares of "
             "patients)", queue_table(result, resource.name))
    cur = s.economics.currency
    show(f"Service outcomes per {result.per}, discounted (costs in {cur}, capacity included; "
         f"'{REFERENCE}': the same patients if nobody ever waited)", outcome_table(result))
    if result.analysis is not None:
        show(f"Increments against {result.comparator}, paired by replication (95% t-interval)",
             result.increments)
        show("Incremental analysis (dominance, ICERs along the frontier)", result.analysis)
        best = result.net_benefit.loc[result.net_benefit.best, "strategy"].iloc[0]
        show(f"Net benefit at {s.economics.threshold:g} {cur} per QALY — best: {best}",
             result.net_benefit)
    print(f"\nWhat a cohort model would have missed: {missed(result)}")
    for name, v in result.validations.items():
        print(f"\nValidation against queueing theory ({name}): {v.verdict}")


def print_validation(result: ServiceResult) -> None:
    s = result.scenario
    print(f"Validation — {s.title}\n{setting(result)}")
    for name, v in result.validations.items():
        if not v.table.empty:
            show(f"Simulated queues against queueing theory ({name})", v.table.drop(columns="source"))
        print(f"\n{v.verdict}")
        for source in dict.fromkeys(v.table.source):
            print(f"  source: {source}")


def service_summary(result: ServiceResult) -> dict:
    s = result.scenario
    out = {"scenario": s.title, "provenance": s.provenance, "seed": result.seed,
           "patients": result.patients, "setting": setting(result),
           "warm_up": {"length": result.warm_up.length, "rule": result.warm_up.rule,
                       "note": result.warm_up.note},
           "per": result.per, "queues": records(result.queues),
           "outcomes": records(result.outcomes), "missed_by_a_cohort_model": missed(result),
           "validation": {n: {"agrees": v.agrees, "verdict": v.verdict}
                          for n, v in result.validations.items()},
           "caution": CAUTION}
    if result.analysis is not None:
        out.update({"comparator": result.comparator, "threshold": s.economics.threshold,
                    "currency": s.economics.currency, "increments": records(result.increments),
                    "incremental_analysis": records(result.analysis),
                    "best_at_threshold": str(result.net_benefit.loc[
                        result.net_benefit.best, "strategy"].iloc[0])})
    return out
