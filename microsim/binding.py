"""Binding: specs plus one set of parameter values -> the numbers engines and the cohort read.

A base case, a PSA draw, a one-way sensitivity value and (later) a strategy are all just
different bindings of the same scenario; no engine ever sees a parameter name.
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Mapping

import numpy as np

from microsim.hazards import (ConstantHazard, GeneralisedGammaHazard, GompertzHazard,
                              HazardFamily, LogLogisticHazard, LogNormalHazard,
                              PiecewiseConstantHazard, WeibullHazard)
from microsim.hazards.cycle_probabilities import log_survival
from microsim.scenario.formulas import with_derived
from microsim.scenario.risk_changes import hazard_ratio
from microsim.scenario.spec import (REMAINDER, EffectSpec, EligibilitySpec, MemorySpec, Ref,
                                    Scenario, StrategySpec, TableSpec)

FAMILIES = {"constant": ConstantHazard, "weibull": WeibullHazard, "gompertz": GompertzHazard,
            "loglogistic": LogLogisticHazard, "lognormal": LogNormalHazard,
            "generalised_gamma": GeneralisedGammaHazard}


def table_hazard(table: TableSpec, row=None) -> PiecewiseConstantHazard:
    """A table of rates (or one row of band values of it: a level's) as a hazard on its own
    clock; below the first start the first value holds (the reader warns when that
    happens)."""
    starts, values = list(table.starts), list(table.values if row is None else row)
    if starts[0] > 0:
        starts, values = [0.0] + starts, values[:1] + values
    return PiecewiseConstantHazard(tuple(starts), tuple(values))


@dataclass(frozen=True)
class BoundEffect:
    """Multiply the hazard by exp(log_hr * (x - centre)) (continuous) or exp(log_hr)
    when the attribute equals `level` (categorical; yes/no: when true). With `time_ratio`,
    log_hr is the log of a time ratio, which divides the hazard's clock instead."""
    attribute: str
    log_hr: float
    level: str | None
    centre: float
    time_ratio: bool = False


@dataclass(frozen=True)
class BoundMemory:
    after: str
    multipliers: tuple[float, ...] | None
    within: float | None
    multiplier: float | None


@dataclass(frozen=True)
class BoundRisk:
    """One way out of a state (a transition) or an event in a state (target None)."""
    name: str
    source: int
    target: int | None
    probability: float | TableSpec | None  # per cycle (discrete models)
    logs: tuple[float, ...] | None  # L = -ln(1 - p) of each base value (the competing rule)
    remainder: bool
    family: str | None  # hazard family (continuous models)
    params: Mapping[str, float]
    table: TableSpec | None  # the table of a "table" hazard
    hazard: HazardFamily | None  # the family object engines and the cohort evaluate (None
    # for a table by level: each patient reads its own row, `multipliers.LevelRows`)
    clock: str
    effects: tuple[BoundEffect, ...]
    memory: tuple[BoundMemory, ...]
    cost: float | TableSpec  # a table by level, age or time: each patient reads its own
    disutility: float | TableSpec

    @property
    def is_event(self) -> bool:
        return self.target is None

    @property
    def level_table(self) -> TableSpec | None:
        """The risk's table when it is by an attribute's level (each patient reads its
        level's row), else None."""
        table = self.table if self.table is not None else self.probability
        return table if isinstance(table, TableSpec) and table.attribute is not None else None

    @property
    def markov(self) -> bool:
        """True when the risk's hazard is memoryless given state, age and time: a
        constant rate, or a table by age or by time since start."""
        if self.memory:
            return False
        if self.family == "constant":
            return True
        if self.table is not None:
            return self.table.by in ("age", "time", None)
        if isinstance(self.probability, TableSpec):
            return self.probability.by in ("age", "time", None)
        return self.probability is not None or self.remainder


@dataclass(frozen=True)
class ValueTable:
    """A state's cost or utility (or one a treatment adds) read from a table by level, age
    or time, so that each patient has its own (`microsim.results.outcomes`). The model's
    array of that measure holds 0 in its place, and the two add up."""
    measure: str  # "cost" or "utility"
    state: int
    table: TableSpec


@dataclass(frozen=True)
class Treatment:
    """A strategy's treatment in numbers: who may get it, when, and what it changes."""
    strategy: str
    eligible: EligibilitySpec | None
    uptake: float
    start: float
    stop: float  # inf: until the horizon
    discontinuation: float  # rate per time unit of stopping early
    on_factor: np.ndarray  # (R,) hazard multipliers while on treatment
    off_factor: np.ndarray  # (R,) 1, or 0 for risks that exist only on treatment
    extra_cost: np.ndarray  # (S,) per time unit on treatment, by state
    extra_utility: np.ndarray  # (S,) per time unit on treatment, by state
    tables: tuple[ValueTable, ...] = ()  # extra costs and utilities read from tables


@dataclass(frozen=True)
class BoundModel:
    scenario: Scenario
    states: tuple[str, ...]
    absorbing: np.ndarray  # bool (S,)
    start: np.ndarray  # (S,) initial shares
    start_age: float | None
    state_cost: np.ndarray  # (S,) per time unit
    state_utility: np.ndarray  # (S,) QALY weight per year lived in the state
    risks: tuple[BoundRisk, ...]
    discrete: bool
    cycle: float
    n_cycles: int
    lifetime: bool
    discount_costs: float  # effective rate per time unit (the file's are per year)
    discount_effects: float
    correction: str
    probability_rule: str  # cycle models: how a row's probabilities take the multipliers
    values: Mapping[str, float]
    years_per_unit: float  # life years and QALYs are counted in years
    treatment: Treatment | None = None
    # start effects: (state, effect) multiplying the odds of starting in the state
    start_effects: tuple[tuple[int, BoundEffect], ...] = ()
    # with treatment phases (`treatment_phases`): the model state each state is a copy of
    entered_names: tuple[str, ...] | None = None
    # cycle models with a delay to treatment: the state a patient who stays in its state
    # passes to at a cycle end (the next copy of the countdown; None: the state itself)
    stay_to: np.ndarray | None = None
    # cycle models with an event that starts or stops treatment: phase_on[r, f] is the state
    # a patient ends a cycle in when risk r happened in it and the cycle's move (or stay)
    # ended in f: f's copy in the next phase where r moves the phase on and the move kept
    # the phase (f itself where the move changed it already, f is absorbing, or no cycle
    # from r's state ends in f); the identity for every other risk. None: no such event
    phase_on: np.ndarray | None = None
    # rate models with a delay to treatment: how long after entering the waiting copies a
    # patient passes to `delay_to` of the state it is in (a waiting copy's treated copy;
    # other states their own; None: no delay)
    delay: float = 0.0
    delay_to: np.ndarray | None = None
    # with treatment phases: which states are copies on a treatment (None: no phases)
    treated_states: np.ndarray | None = None
    state_tables: tuple[ValueTable, ...] = ()  # states' costs and utilities read from tables

    @property
    def value_tables(self) -> tuple[TableSpec, ...]:
        """Every distinct table a cost or utility reads (states, risks, treatment)."""
        found = [v.table for v in self.state_tables]
        found += [v.table for v in (() if self.treatment is None else self.treatment.tables)]
        found += [x for r in self.risks for x in (r.cost, r.disutility)
                  if isinstance(x, TableSpec)]
        return tuple({t.name: t for t in found}.values())

    def entered(self, state: int) -> str:
        """The name memory counts an entry into `state` under: its own, or for a copy of
        a state in a treatment phase, the state's."""
        return self.states[state] if self.entered_names is None else self.entered_names[state]

    @property
    def waiting(self) -> np.ndarray:
        """Per state: whether it is a copy waiting for treatment on a fixed delay (rate
        models, `delay_to`)."""
        d = self.delay_to
        return np.zeros(self.n_states, bool) if d is None else d != np.arange(self.n_states)

    @property
    def n_states(self) -> int:
        return len(self.states)

    @property
    def risk_names(self) -> tuple[str, ...]:
        return tuple(dict.fromkeys(r.name for r in self.risks))

    def risks_from(self, state: int) -> tuple[BoundRisk, ...]:
        return tuple(r for r in self.risks if r.source == state)

    @property
    def times(self) -> np.ndarray:
        """The cycle grid 0, cycle, ..., end."""
        return np.arange(self.n_cycles + 1) * self.cycle


def per_unit(yearly: float, years_per_unit: float, discounting: str = "annual") -> float:
    """A yearly discount rate as the effective rate per time unit that every outcome
    integral reads (the factor at t units is (1 + rate)^-t): an effective yearly rate d
    gives (1 + d)^(years per unit) - 1, so the factor is (1 + d)^-(t years); an
    instantaneous ("continuous") yearly rate r gives exp(r years per unit) - 1, so the
    factor is exp(-r t years) (continuous discounting, e.g. Briggs, Claxton & Sculpher 2006,
    "Decision Modelling for Health Economic Evaluation"; from memory)."""
    if discounting == "continuous":
        return float(np.expm1(yearly * years_per_unit))
    if years_per_unit == 1.0:
        return yearly
    return float(np.expm1(years_per_unit * np.log1p(yearly)))


def bind(scenario: Scenario, values: Mapping[str, float] | None = None,
         strategy: str | None = None) -> BoundModel:
    """Resolve every reference of `scenario` with the base-case parameter values,
    overridden by `values` (a PSA draw or a sensitivity setting), for one strategy (None:
    the model as written, which is what the comparator runs)."""
    spec = None if strategy is None else scenario.strategy(strategy)
    if spec is not None:
        scenario = scenario.with_added(spec)
    resolved = {name: p.value for name, p in scenario.parameters.items()}
    unknown = set(values or ()) - set(resolved)
    if unknown:
        raise KeyError(f"values for undefined parameters: {sorted(unknown)}")
    resolved.update(values or {})
    resolved = with_derived(scenario.parameters, resolved)  # always from their inputs
    if any(t.names for t in scenario.tables.values()):  # entries that name parameters
        scenario = replace(scenario, tables={name: t.at(resolved)
                                             for name, t in scenario.tables.items()})
    index = {name: i for i, name in enumerate(scenario.state_names)}

    def number(ref: Ref) -> float:
        return float(resolved[ref]) if isinstance(ref, str) else float(ref)

    def resolve(ref: Ref) -> float | TableSpec:
        """A number, or (for a cost or utility) the table each patient reads its own from."""
        return scenario.tables[ref] if isinstance(ref, str) and ref in scenario.tables \
            else number(ref)

    def probability(ref: Ref | None):
        if ref is None or ref == REMAINDER:
            return None
        if isinstance(ref, str) and ref in scenario.tables:
            return scenario.tables[ref]
        return number(ref)

    def effect(e: EffectSpec) -> BoundEffect:
        value = number(e.hazard_ratio)
        log_hr = value if e.coefficient else float(np.log(value))
        return BoundEffect(e.attribute, log_hr, e.level, e.centre, e.time_ratio)

    def memory(m: MemorySpec) -> BoundMemory:
        return BoundMemory(
            m.after,
            None if m.multipliers is None else tuple(number(x) for x in m.multipliers),
            m.within,
            None if m.multiplier is None else number(m.multiplier))

    def risk(spec, name: str, source: int, target: int | None) -> BoundRisk:
        hazard = spec.hazard
        table = family = None
        params: dict[str, float] = {}
        if hazard is not None:
            if hazard.family == "table":
                table = scenario.tables[hazard.params["table"]]
                family = None if table.attribute is not None else table_hazard(table)
            else:
                params = {k: number(v) for k, v in hazard.params.items()}
                family = FAMILIES[hazard.family](**params)
        base = probability(spec.probability)
        return BoundRisk(
            name=name, source=source, target=target, probability=base,
            logs=None if base is None else tuple(map(log_survival, (
                base.values if isinstance(base, TableSpec) else (base,)))),
            remainder=spec.probability == REMAINDER,
            family=None if hazard is None else hazard.family,
            params=params, table=table, hazard=family, clock=spec.clock,
            effects=tuple(effect(e) for e in spec.effects),
            memory=tuple(memory(m) for m in spec.memory),
            cost=resolve(spec.cost), disutility=resolve(spec.disutility))

    def risks_of(transitions, events) -> list[BoundRisk]:
        found = [risk(t, t.name, index[t.source], index[t.target]) for t in transitions]
        for event in events:
            found += [risk(event.in_state(s), event.name, index[s], None) for s in event.states]
        return found

    risks = risks_of(scenario.transitions, scenario.events)
    later: list[tuple[int, ...]] = []  # the risks each later treatment adds, by index
    for line in () if spec is None else spec.then:
        own = risks_of(line.transitions, line.events)
        later.append(tuple(range(len(risks), len(risks) + len(own))))
        risks += own

    states = scenario.states
    outcomes = scenario.outcomes
    treatment = None if spec is None else bind_treatment(spec, risks, scenario, index, resolve,
                                                         sum(later, ()))
    state_cost, cost_tables = by_state("cost", [resolve(s.cost) for s in states])
    state_utility, utility_tables = by_state("utility", [resolve(s.utility) for s in states])
    model = BoundModel(
        scenario=scenario,
        states=scenario.state_names,
        absorbing=np.array([s.absorbing for s in states]),
        start=np.array([scenario.start.shares.get(s.name, 0.0) for s in states], float),
        start_age=scenario.start.age,
        state_cost=state_cost,
        state_utility=state_utility,
        risks=tuple(risks),
        discrete=scenario.discrete,
        cycle=scenario.time.cycle,
        n_cycles=scenario.time.n_cycles,
        lifetime=scenario.time.horizon is None,
        discount_costs=per_unit(outcomes.discount_costs, scenario.time.years_per_unit,
                                outcomes.discounting),
        discount_effects=per_unit(outcomes.discount_effects, scenario.time.years_per_unit,
                                  outcomes.discounting),
        years_per_unit=scenario.time.years_per_unit,
        correction=outcomes.correction,
        probability_rule=scenario.time.probability_rule,
        values=resolved,
        treatment=treatment,
        start_effects=tuple((index[e.state], effect(e)) for e in scenario.start.effects),
        state_tables=cost_tables + utility_tables,
    )
    if spec is None or not spec.phased:
        return model
    from microsim.treatment_phases import Line, with_phases
    first = tuple(r for r, risk in enumerate(risks) if risk.name in spec.on_treatment_only)
    lines = [Line(spec.name, spec.stop_on, treatment.on_factor, treatment.extra_cost,
                  treatment.extra_utility, first, treatment.tables)]
    for line, adds in zip(spec.then, later):
        on, cost, utility, tables = bind_changes(line.changes, risks, scenario, index, resolve)
        lines.append(Line(line.name, line.stop_on, on, cost, utility, adds, tables))
    return with_phases(model, spec.start_on, lines, spec.start_delay)


def by_state(measure: str, values: list) -> tuple[np.ndarray, tuple[ValueTable, ...]]:
    """One measure of every state: the numbers (0 where a table gives the value) and the
    tables."""
    tables = tuple(ValueTable(measure, i, v) for i, v in enumerate(values)
                   if isinstance(v, TableSpec))
    return np.array([0.0 if isinstance(v, TableSpec) else v for v in values]), tables


def bind_treatment(spec: StrategySpec, risks, scenario: Scenario, index, resolve,
                   later: tuple[int, ...] = ()) -> Treatment | None:
    """The numbers of a strategy's treatment (`resolve` gives a reference's number, or its
    table); None when it changes nothing. Off treatment, the risks added for a time on
    treatment (the first treatment's with while_treated, and every one of the `later`
    treatments') have a hazard of 0."""
    if not (spec.changes or spec.transitions or spec.events or spec.phased):
        return None
    on, cost, utility, tables = bind_changes(spec.changes, risks, scenario, index, resolve)
    gated = spec.on_treatment_only
    off = np.array([0.0 if risk.name in gated or r in later else 1.0
                    for r, risk in enumerate(risks)])
    return Treatment(spec.name, spec.eligible, resolve(spec.uptake), spec.start,
                     np.inf if spec.stop is None else spec.stop, resolve(spec.discontinuation),
                     on, off, cost, utility, tables)


def bind_changes(changes, risks, scenario: Scenario, index, resolve) -> tuple:
    """What a treatment's changes do in numbers: each risk's hazard multiplier (a treated
    rate or probability as the hazard ratio it amounts to on that risk's base value), and
    the cost and utility added in each state (numbers, and the tables that add theirs)."""
    on = np.ones(len(risks))
    added = {"cost": np.zeros(len(scenario.states)), "utility": np.zeros(len(scenario.states))}
    tables: list[ValueTable] = []
    alive = np.array([not s.absorbing for s in scenario.states])
    for change in changes:
        if change.risk is not None:
            hit = [r for r, risk in enumerate(risks)
                   if change.risk in (risk.name, f"{scenario.states[risk.source].name}->"
                                      f"{'' if risk.target is None else scenario.states[risk.target].name}")]
            for r in hit:
                base = risks[r].params.get("rate") if risks[r].family else risks[r].probability
                on[r] *= hazard_ratio(change, resolve, base)
            continue
        where = alive if change.state is None else np.arange(len(alive)) == index[change.state]
        for measure, numbers in added.items():
            amount = resolve(getattr(change, measure))
            if isinstance(amount, TableSpec):
                tables += [ValueTable(measure, int(i), amount) for i in np.flatnonzero(where)]
            else:
                numbers[where] += amount
    return on, added["cost"], added["utility"], tuple(tables)
