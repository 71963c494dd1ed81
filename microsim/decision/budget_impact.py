"""Budget impact: what each strategy would cost a payer in each calendar year, for the
population the scenario's [economics] states, and the difference from the comparator.

As budget impact analysis asks (Sullivan et al. 2014, "Budget impact analysis - principles
of good practice: report of the ISPOR 2012 Budget Impact Analysis Good Practice II Task
Force", Value in Health 17:5-14; Mauskopf et al. 2007, the Task Force I report, Value in
Health 10:336-347; both from memory): the payer's costs, year by year over a short horizon,
undiscounted, for the eligible population, here the patients already there at the start
(economics.prevalent_patients) and the new patients of each year (economics.incidence).

Each patient costs what the model says a patient costs in each year since entry, c_k: the
model's own mean undiscounted cost per patient (state, transition and treatment costs) of
the scenario's patients, exact where the model has an exact counterpart, else simulated.
c_k = C(k) - C(k - 1), C(k) the cost accrued by k years with the horizon cut there, and a
patient simulated to k years has the same history as to k - 1 years and beyond (every draw
is a function of patient, purpose and occurrence). In cycle models the within-cycle rule is
additive over whole cycles, so a year is costed by the model's rule over its own cycle
points, with one exception: the half-cycle correction leaves out the last point of every
cut (it assumes the cohort is gone by the horizon), which would move half a cycle of each
year into the next, so its years are costed by the trapezoidal rule, the same integral
over each year (the two differ only by that last point; Elbasha & Chhatwal 2016, "Theoretical
foundations and practical applications of within-cycle correction methods", Med Decis
Making 36:115-131).

Cohorts enter at the start of each calendar year, the prevalent patients with the first
(a simplification: they are costed as if they started the model then). The cost in
calendar year t is then P c_t + sum_{j=1..t} I_j c_{t-j+1}: a convolution of the cohorts
with the cost by year since entry.

An impact (and its SE) within round-off of the year's cost is shown as 0
(`without_roundoff`), so a year in which a strategy costs what the comparator costs reads
0, not 1e-10.
"""
from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pandas as pd

from microsim.decision.strategies import AS_WRITTEN, strategy_names
from microsim.results.comparison import ROUNDOFF, within_roundoff
from microsim.scenario.errors import ScenarioError
from microsim.scenario.fields import TOLERANCE
from microsim.scenario.read_economics import check_incidence_covers
from microsim.scenario.spec import Scenario

EXACT = "exact: the patients' analytic expectations"
ROUNDOFF_IMPACT = (f"an impact of 0 is one within round-off of the year's cost ({ROUNDOFF:g} "
                   "relative): the strategy costs what the comparator costs that year")
SIMULATED = "simulated with common random numbers, with Monte-Carlo SE"


def cohort_weights(prevalent: float, incidence) -> np.ndarray:
    """W (Y, Y) with W[t, k] the patients in calendar year t + 1 who are in their year
    k + 1 since entry: the prevalent patients in year t + 1 itself, and the new patients of
    year t - k + 1 (0-based: P [k = t] + I[t - k] for k <= t)."""
    incidence = np.asarray(incidence, dtype=float)
    years = len(incidence)
    t, k = np.indices((years, years))
    return np.where(k <= t, incidence[np.clip(t - k, 0, None)], 0.0) + prevalent * (t == k)


def units_per_year(scenario: Scenario) -> float:
    """A budget year in the scenario's time unit (time.years_per_unit is a unit in years)."""
    return 1.0 / scenario.time.years_per_unit


def cut_at(scenario: Scenario, years: int) -> Scenario:
    """The scenario with its horizon at `years` budget years, costs undiscounted, and the
    half-cycle correction costed as the trapezoidal rule (see above)."""
    correction = scenario.outcomes.correction
    return replace(scenario, time=replace(scenario.time, horizon=years * units_per_year(scenario)),
                   outcomes=replace(scenario.outcomes, discount_costs=0.0, correction=(
                       "trapezoidal" if correction == "half-cycle" else correction)))


def check_budget(scenario: Scenario) -> None:
    """Refuse a budget the model cannot cost, before any run: no years given, years past
    its horizon, or years in parts of a cycle."""
    years = scenario.economics.budget_years
    if years is None:
        raise ScenarioError("economics.budget_years", "is needed for a budget impact: the "
                            "calendar years to cost; give it (or --budget-years) with "
                            "economics.incidence and/or economics.prevalent_patients")
    check_incidence_covers(scenario.economics, "budget_years")
    time, length = scenario.time, units_per_year(scenario)
    if years * length > time.end * (1 + TOLERANCE):
        raise ScenarioError("economics.budget_years", f"{years} years reach past the model's "
                            f"horizon ({time.end:g} {time.unit}): the model says nothing of "
                            "costs after it; give fewer years or a longer horizon")
    cycles = length / time.cycle
    if abs(cycles - round(cycles)) > TOLERANCE * max(1.0, cycles) or round(cycles) < 1:
        raise ScenarioError("economics.budget_years", f"a budget year is {cycles:g} cycles of "
                            f"{time.cycle:g} {time.unit}; costs by year need whole cycles")
    if scenario.outcomes.correction == "simpson" and round(cycles) % 2:
        raise ScenarioError("economics.budget_years", "Simpson's rule needs an even number "
                            "of cycles in each budget year; use the trapezoidal correction")


def costs_by_year(scenario: Scenario, people: pd.DataFrame, seed: int, strategy: str | None,
                  years: int) -> tuple[np.ndarray, bool]:
    """(patients, years) undiscounted cost of each patient in each year since entry, and
    whether it is exact."""
    from microsim.uncertainty.one_way import patient_values
    cumulative, exact = [np.zeros(len(people))], True
    for k in range(1, years + 1):
        found = patient_values(cut_at(scenario, k), people, seed, {}, strategy)
        cumulative.append(found.costs)
        exact = exact and found.exact
    return np.diff(np.array(cumulative), axis=0).T, exact


def mean_se(values: np.ndarray, exact: bool) -> tuple[np.ndarray, np.ndarray]:
    """Column means and their Monte-Carlo SE (nan where exact)."""
    se = (np.full(values.shape[1], math.nan) if exact or len(values) < 2
          else values.std(axis=0, ddof=1) / math.sqrt(len(values)))
    return values.mean(axis=0), se


def without_roundoff(impact: np.ndarray, se: np.ndarray,
                     cost: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The impact and its SE with what round-off alone explains set to 0, by the
    comparison's rule (`comparison.within_roundoff` relative to the year's cost): a strategy
    that costs what the comparator costs in a year, but through another chain (the copies
    of a treatment that has not started yet), differs from it by 1e-13 a patient."""
    return (np.where(within_roundoff(impact, cost), 0.0, impact),
            np.where(within_roundoff(se, cost), 0.0, se))


def budget_tables(scenario: Scenario, patients: int | None = None,
                  seed: int | None = None) -> dict[str, pd.DataFrame]:
    """budget_costs_by_year (per patient and year since entry) and budget_impact (per
    calendar year: the payer's cost of each strategy and its difference from the
    comparator, with Monte-Carlo SEs where simulated)."""
    from microsim.patients.population import patients_for
    e = scenario.economics
    check_budget(scenario)
    years = e.budget_years
    seed = scenario.simulation.seed if seed is None else seed
    people = patients_for(scenario, patients, seed)
    incidence = e.incidence_by_year(years) if e.incidence else (0.0,) * years
    weights = cohort_weights(e.prevalent_patients, incidence)
    names = strategy_names(scenario) or [None]
    found = {name: costs_by_year(scenario, people, seed, name, years) for name in names}
    per_year, calendar = [], []
    comparator = names[0] if names[0] is not None else None
    for name, (costs, exact) in found.items():
        label = AS_WRITTEN if name is None else name
        basis = EXACT if exact else SIMULATED
        mean, se = mean_se(costs, exact)
        per_year.append(pd.DataFrame({"strategy": label, "year_since_entry": np.arange(1, years + 1),
                                      "cost_per_patient": mean, "se": se, "basis": basis}))
        total, total_se = mean_se(costs @ weights.T, exact)
        base, both_exact = found[comparator] if comparator is not None else (None, exact)
        if base is not None:
            impact, impact_se = without_roundoff(
                *mean_se((costs - base) @ weights.T, exact and both_exact), total)
        else:
            impact, impact_se = np.full(years, math.nan), np.full(years, math.nan)
        calendar.append(pd.DataFrame({
            "year": np.arange(1, years + 1), "strategy": label,
            "new_patients": np.asarray(incidence, float),
            "patients_entered": e.prevalent_patients + np.cumsum(incidence),
            "cost": total, "se": total_se, "impact": impact, "impact_se": impact_se,
            "compared_with": comparator, "basis": basis}))
    tables = {"budget_costs_by_year": pd.concat(per_year, ignore_index=True),
              "budget_impact": pd.concat(calendar, ignore_index=True)}
    for table in tables.values():
        for column in ("strategy", "basis", "compared_with"):
            if column in table:
                table[column] = table[column].astype("string")
    return tables
