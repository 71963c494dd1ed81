"""One-way deterministic sensitivity analysis: the numbers behind a tornado diagram.

`one_way` varies each ranged parameter on its own around any model evaluation; `tornado`
applies it to a scenario's decision, for a chosen measure (`microsim.decision.measures`)
and each chosen strategy, through `Settings`, which the two-way and break-even analyses
share. Each setting is evaluated on the same generated patients. Where
the model has an exact counterpart, the patients' analytic expectations are used, so the
tornado carries no Monte-Carlo noise at all; otherwise every strategy is simulated with
common random numbers and each result carries its Monte-Carlo standard error.
"""
from __future__ import annotations

import math
from functools import partial
from typing import Callable, Mapping, NamedTuple

import numpy as np
import pandas as pd

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.decision.strategies import COST, EFFECT, strategy_names
from microsim.patients.treatment import patient_multipliers
from microsim.results.outcomes import outcome_values
from microsim.scenario.errors import ScenarioError
from microsim.scenario.fields import did_you_mean
from microsim.scenario.spec import ParameterSpec, Scenario
from microsim.simulation import simulate
from microsim.decision.measures import MEASURES, incremental, per_patient

COLUMNS = ["parameter", "low", "high", "base", "result_low", "result_high", "result_base", "swing",
           "se_low", "se_high", "se_base"]
AS_WRITTEN = "as written"  # the strategy column of a scenario without strategies
EXACT = "exact: the patients' analytic expectations"
SIMULATED = "simulated with common random numbers, with Monte-Carlo SE"


class Estimate(NamedTuple):
    """A measure's value and its Monte-Carlo standard error (nan where it is exact)."""
    value: float
    se: float = math.nan


def ranged_parameters(parameters: Mapping[str, ParameterSpec]) -> list[ParameterSpec]:
    """The parameters a one-way analysis varies (those with a low..high range), or refuse:
    a sensitivity analysis with none to vary is checked before any run."""
    ranged = [spec for spec in parameters.values() if spec.low is not None and spec.high is not None]
    if not ranged:
        raise ScenarioError("parameters", "no parameter has a low..high range; give low and "
                                          "high to the parameters to vary")
    return ranged


def one_way(evaluate_values: Callable[[dict[str, float]], object],
            parameters: Mapping[str, ParameterSpec],
            measure: Callable[[object], float | Estimate]) -> pd.DataFrame:
    """Each parameter with a low..high range set to low, then high, the others at base.

    `measure` reduces a model result to one number (e.g. incremental NMB), or to an
    `Estimate` with its Monte-Carlo standard error. One row per varied parameter, widest
    swing |result_high - result_low| first (ties keep the parameters' order): parameter,
    low, high, base (the parameter's value), result_low, result_high, result_base (every
    parameter at base), swing, and se_low, se_high, se_base (nan where exact).
    """
    base = {name: float(spec.value) for name, spec in parameters.items()}
    ranged = ranged_parameters(parameters)

    def result(changes: dict[str, float]) -> Estimate:
        value = measure(evaluate_values({**base, **changes}))
        return Estimate(*map(float, value)) if isinstance(value, tuple) else Estimate(float(value))

    at_base = result({})
    rows = []
    for spec in ranged:
        low, high = result({spec.name: float(spec.low)}), result({spec.name: float(spec.high)})
        rows.append({"parameter": spec.name, "low": float(spec.low), "high": float(spec.high),
                     "base": base[spec.name], "result_low": low.value, "result_high": high.value,
                     "result_base": at_base.value, "swing": abs(high.value - low.value),
                     "se_low": low.se, "se_high": high.se, "se_base": at_base.se})
    table = pd.DataFrame(rows, columns=COLUMNS)
    table["parameter"] = table["parameter"].astype("string")
    return table.sort_values("swing", ascending=False, kind="stable").reset_index(drop=True)


class PatientValues(NamedTuple):
    costs: np.ndarray  # discounted, per patient
    qalys: np.ndarray  # discounted, per patient
    exact: bool  # analytic expectations (True) or one simulated history each (False)
    life_years: np.ndarray  # undiscounted, per patient
    reasons: tuple[str, ...] = ()  # why there is no exact counterpart, where there is none


def patient_values(scenario: Scenario, people: pd.DataFrame, seed: int, values: dict,
                   strategy: str | None) -> PatientValues:
    """Each patient's discounted costs and QALYs: expected values where the model has an
    exact counterpart, else simulated (the same seed for every strategy and setting)."""
    model = bind(scenario, values, strategy=strategy)
    mult = patient_multipliers(model, people, seed)
    result = analytic(model, mult=mult)
    outcomes = (outcome_values(model, result.exposure) if result.exact
                else simulate(model, people, seed, mult=mult).values)
    return PatientValues(np.asarray(outcomes[COST], float), np.asarray(outcomes[EFFECT], float),
                         result.exact, np.asarray(outcomes["life_years"], float),
                         tuple(result.reasons))


def tornado_strategies(scenario: Scenario, strategy: str | None,
                       measure: str | None) -> tuple[str, list[str | None], str | None]:
    """The measure (default: incremental NMB, or NMB without strategies), the strategies it
    is reported for (default: every one it applies to) and the comparator, or refuse the
    choice in one line."""
    names = strategy_names(scenario)
    measure = measure or ("incremental_nmb" if names else "nmb")
    if measure not in MEASURES:
        raise ScenarioError("--measure", f"no measure {measure!r}"
                                         f"{did_you_mean(measure, MEASURES)}; choose one of: "
                                         f"{', '.join(MEASURES)}")
    if not names:
        if strategy is not None:
            raise ScenarioError("--strategy", "the scenario defines no strategies; leave "
                                              "--strategy out")
        if incremental(measure):
            raise ScenarioError("--measure", f"{measure} compares strategies and the scenario "
                                             "defines none; choose nmb, qalys or costs")
        return measure, [None], None
    comparator = names[0] if incremental(measure) else None
    allowed = [n for n in names if n != comparator]
    if strategy is None:
        return measure, allowed, comparator
    if strategy not in allowed:
        why = (f"{strategy!r} is the comparator; an increment against itself is 0"
               if strategy == comparator else f"no strategy {strategy!r}"
               f"{did_you_mean(strategy, allowed)}")
        raise ScenarioError("--strategy", f"{why}; choose one of: {', '.join(allowed)}")
    return measure, [strategy], comparator


class Settings:
    """The chosen measure of each chosen strategy (see `tornado_strategies`) at any setting
    of the parameters, on one set of generated patients: exact where the model has an exact
    counterpart, else simulated with common random numbers (the same seed for every
    strategy and setting). Each setting is evaluated once, whichever analysis asks for it,
    so the one-way, two-way and break-even analyses share their evaluations."""

    def __init__(self, scenario: Scenario, patients: int | None = None,
                 seed: int | None = None, strategy: str | None = None,
                 measure: str | None = None, bar=None):
        from microsim.patients.population import patients_for
        self.scenario = scenario
        self.measure, self.chosen, self.comparator = tornado_strategies(scenario, strategy,
                                                                        measure)
        self.seed = scenario.simulation.seed if seed is None else seed
        self.people = patients_for(scenario, patients, self.seed)
        self.base = {name: float(spec.value) for name, spec in scenario.parameters.items()}
        self.needed = list(dict.fromkeys([*([self.comparator] if self.comparator else []),
                                          *self.chosen]))
        self.evaluated: dict[tuple, dict] = {}
        self.bar = bar  # a progress bar counting evaluations, or None

    def evaluate(self, values: dict) -> dict[str | None, PatientValues]:
        key = tuple(sorted(values.items()))
        if key not in self.evaluated:
            self.evaluated[key] = {name: patient_values(self.scenario, self.people, self.seed,
                                                        values, name) for name in self.needed}
            if self.bar is not None:
                self.bar.update()
        return self.evaluated[key]

    def per_patient(self, name: str | None, result: dict) -> tuple[np.ndarray, bool]:
        """Each patient's value of the measure for strategy `name` (against the comparator
        for an incremental measure), and whether it is exact."""
        threshold = self.scenario.economics.threshold
        own = result[name]
        value = per_patient(self.measure, own.costs, own.qalys, threshold)
        if self.comparator is None:
            return value, own.exact
        base = result[self.comparator]
        return (value - per_patient(self.measure, base.costs, base.qalys, threshold),
                own.exact and base.exact)

    def estimate(self, name: str | None, result: dict) -> Estimate:
        value, exact = self.per_patient(name, result)
        se = math.nan if exact else float(np.std(value, ddof=1) / np.sqrt(len(value)))
        return Estimate(float(np.mean(value)), se)

    def at(self, name: str | None, changes: dict[str, float]) -> Estimate:
        """The measure for `name` with `changes` to the base case."""
        return self.estimate(name, self.evaluate({**self.base, **changes}))

    def labelled(self, table: pd.DataFrame, name: str | None) -> pd.DataFrame:
        """A table of one strategy's results with the columns that say whose they are."""
        return table.assign(strategy=AS_WRITTEN if name is None else name,
                            measure=self.measure, compared_with=self.comparator)


def as_text(table: pd.DataFrame, *columns: str) -> pd.DataFrame:
    for column in columns:
        table[column] = table[column].astype("string")
    return table


def tornado(scenario: Scenario, patients: int | None = None, seed: int | None = None,
            strategy: str | None = None, measure: str | None = None,
            settings: Settings | None = None) -> pd.DataFrame:
    """The one-way table of `measure` for each chosen strategy (see `tornado_strategies`):
    strategy, measure, compared_with, the `one_way` columns (widest swing first within each
    strategy), se_swing and basis (exact, or simulated with its standard errors). `settings`
    shares the evaluations with other analyses of the same choices."""
    settings = settings or Settings(scenario, patients, seed, strategy, measure)
    frames = [settings.labelled(one_way(settings.evaluate, scenario.parameters,
                                        partial(settings.estimate, name)), name)
              for name in settings.chosen]
    table = pd.concat(frames, ignore_index=True)
    table["se_swing"] = [swing_se(settings, row.strategy, row.parameter, row.low, row.high)
                         for row in table.itertuples()]
    table["basis"] = np.where(table.se_base.isna(), EXACT, SIMULATED)
    as_text(table, "strategy", "measure", "compared_with", "basis")
    return table[["strategy", "measure", "compared_with", *COLUMNS, "se_swing", "basis"]]


def swing_se(settings: Settings, strategy: str, parameter: str, low: float,
             high: float) -> float:
    """The standard error of result_high - result_low where simulated (nan where exact):
    both settings run on the same patients and draws (common random numbers), so the
    error of their difference is the paired differences' own, far below either setting's
    when the two move together."""
    name = None if strategy == AS_WRITTEN else strategy
    lows, exact = settings.per_patient(name, settings.evaluate({**settings.base, parameter: low}))
    highs, _ = settings.per_patient(name, settings.evaluate({**settings.base, parameter: high}))
    if exact:
        return math.nan
    return float(np.std(highs - lows, ddof=1) / math.sqrt(len(lows)))
