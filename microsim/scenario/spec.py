"""Frozen specs: the checked, typed picture of a scenario file.

The reader builds these once and refuses bad input; nothing downstream re-parses or
re-validates. Numbers that may come from a named parameter are kept as a `Ref` (a float
or a parameter/table name) and resolved by binding, so a PSA draw or a strategy is a new
binding of the same specs, not a new code path.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Literal, Mapping

if TYPE_CHECKING:
    from .fields import Reference
    from .formulas import Formula

Ref = float | str
"""A literal number, or the name of a parameter (or, for probabilities, rates, costs and
utilities, a table)."""

REMAINDER = "remainder"
"""Reserved value of a transition probability: one minus the other probabilities of the row."""

Correction = Literal["none", "half-cycle", "trapezoidal", "simpson"]
Clock = Literal["since_start", "since_entry", "age"]
TableAxis = Literal["age", "time", "time_in_state"]  # or None: by level alone
HazardFamily = Literal["constant", "weibull", "gompertz", "loglogistic", "lognormal",
                       "generalised_gamma", "table"]

CLOCK_OF_TABLE_AXIS: Mapping[str, Clock] = {
    "age": "age", "time": "since_start", "time_in_state": "since_entry"}
"""The clock a table's `by` fixes for any transition or event that reads the table."""

ProbabilityRule = Literal["separate", "competing"]
SEPARATE, COMPETING = "separate", "competing"
PROBABILITY_RULES = (SEPARATE, COMPETING)
"""How a row's per-cycle probabilities take the hazard multipliers: each move on its own, or
the moves competing through their rates (`microsim.hazards.cycle_probabilities`)."""

CONTINUOUS_DISTRIBUTIONS = ("normal", "lognormal", "uniform", "beta", "gamma")
"""Attribute distributions that give numbers (the others give levels or yes/no)."""


@dataclass(frozen=True)
class TimeSpec:
    unit: str
    cycle: float
    horizon: float | None  # None: lifetime (until everyone is absorbed, capped)
    lifetime_cap: float  # always set (default 100); only read when horizon is None
    probability_rule: ProbabilityRule = SEPARATE  # cycle models only
    years_per_unit: float = 1.0  # life years and QALYs are in years, discount rates per year

    @property
    def end(self) -> float:
        """The last time point any analysis reaches, in time units."""
        return self.horizon if self.horizon is not None else self.lifetime_cap

    @property
    def n_cycles(self) -> int:
        return int(round(self.end / self.cycle))


@dataclass(frozen=True)
class StateSpec:
    name: str
    label: str
    absorbing: bool = False
    cost: Ref = 0.0  # per time unit spent in the state
    utility: Ref = 0.0  # QALY weight per time unit spent in the state


@dataclass(frozen=True)
class HazardSpec:
    """A hazard family with its parameters; `rate = x` in a file is family "constant".

    Parameters by family (time in the scenario's unit):
      constant: rate; weibull: shape, scale (H = (t/scale)^shape);
      gompertz: rate, shape (h = rate * exp(shape * t));
      loglogistic: shape, scale (H = log(1 + (t/scale)^shape));
      lognormal: meanlog, sdlog (log T ~ Normal(meanlog, sdlog));
      generalised_gamma: mu, sigma, q (Prentice 1974; see microsim.hazards.log_location);
      table: table (a name).
    """
    family: HazardFamily
    params: Mapping[str, Ref]


@dataclass(frozen=True)
class EffectSpec:
    """Effect of one attribute. Proportional hazards: the hazard is multiplied by
    hazard_ratio ** (x - centre) for a continuous attribute, or by hazard_ratio when a
    categorical attribute equals `level` (yes/no attributes: when yes). With `time_ratio`
    (accelerated failure time) the same power of the ratio divides the clock of the hazard
    instead: S(t) = S0(t / ratio)."""
    attribute: str
    hazard_ratio: Ref  # the ratio; a coefficient c in the file is stored as exp(c) when literal
    level: str | None = None
    centre: float = 0.0
    coefficient: bool = False  # True when `hazard_ratio` holds the log of the ratio
    time_ratio: bool = False  # True: the ratio is a time ratio (time_ratio, time_coefficient)
    state: str | None = None  # start effects: the start state whose odds it multiplies


@dataclass(frozen=True)
class MemorySpec:
    """A hazard multiplier that depends on the patient's history of `after`
    (an event name, a transition name, or a state name meaning entries into it).

    Either `multipliers` by the number of earlier occurrences (0, 1, ..., the last value
    holds from then on: the cap), or `multiplier` while less than `within` time units
    have passed since the last occurrence."""
    after: str
    multipliers: tuple[Ref, ...] | None = None
    within: float | None = None
    multiplier: Ref | None = None

    @property
    def cap(self) -> int | None:
        return None if self.multipliers is None else len(self.multipliers) - 1


@dataclass(frozen=True)
class TransitionSpec:
    source: str
    target: str
    name: str  # event name; "source->target" unless the file names it
    probability: Ref | None = None  # per cycle; may be REMAINDER or a table name
    hazard: HazardSpec | None = None  # rates and hazards (continuous time)
    clock: Clock = "since_entry"
    effects: tuple[EffectSpec, ...] = ()
    memory: tuple[MemorySpec, ...] = ()
    cost: Ref = 0.0  # one-off, when the transition happens
    disutility: Ref = 0.0  # one-off QALY loss, when the transition happens
    parallel: bool = False  # another transition joins the same two states (a second cause)

    @property
    def key(self) -> str:
        return f"{self.source}->{self.target}"

    @property
    def where(self) -> str:
        """The transition in field paths: its pair, and its name when the pair is shared."""
        return f"{self.key}[{self.name}]" if self.parallel and self.name != self.key else self.key


@dataclass(frozen=True)
class EventSpec:
    """An event that does not change the state (an acute flare): counted, costed, and
    able to feed memory effects of transitions."""
    name: str
    states: tuple[str, ...]
    probability: Ref | None = None
    hazard: HazardSpec | None = None
    clock: Clock = "since_entry"
    effects: tuple[EffectSpec, ...] = ()
    memory: tuple[MemorySpec, ...] = ()
    cost: Ref = 0.0
    disutility: Ref = 0.0
    by_state: Mapping[str, Ref] | None = None  # a probability or constant rate per state

    def in_state(self, state: str) -> "EventSpec":
        """The event as it happens in `state`: with its own value when it differs by state
        (`probability` and `hazard` then hold the first state's, which fixes the kind)."""
        if self.by_state is None:
            return self
        value = self.by_state[state]
        if self.probability is not None:
            return replace(self, probability=value)
        return replace(self, hazard=HazardSpec("constant", {"rate": value}))


@dataclass(frozen=True)
class TableSpec:
    """A step function: value[i] holds from starts[i] (inclusive) to starts[i+1].

    A table must cover every patient where it is used (`checks.check_table_covers`); below
    starts[0] the first value holds only for an unbounded normal age's tail, with a warning.
    A table by an attribute's level has one row of values per level (`levels`, in the file's order);
    `by` None is a table by level alone (one band from 0, so one value per level). An entry
    may name a parameter, so that PSA and sensitivity analyses vary it: binding reads the
    table `at` its parameter set, and nothing after binding sees a name."""
    name: str
    by: TableAxis | None
    starts: tuple[float, ...]
    values: tuple[Ref, ...]  # every value: a plain table's row, or the rows level after level
    attribute: str | None = None  # the categorical attribute whose levels pick a row
    levels: tuple[str, ...] = ()

    @property
    def clock(self) -> Clock | None:
        """The clock the table's `by` fixes (None: by level alone, constant in time)."""
        return None if self.by is None else CLOCK_OF_TABLE_AXIS[self.by]

    @property
    def rows(self) -> tuple[tuple[float, ...], ...]:
        """The values band by band, one row per level (a plain table: its one row)."""
        k = len(self.starts)
        return tuple(self.values[i:i + k] for i in range(0, len(self.values), k))

    @property
    def axis_words(self) -> str:
        """What the table is by, in words ("age", "age and the level of 'sex'")."""
        level = None if self.attribute is None else f"the level of {self.attribute!r}"
        return " and ".join(w for w in (self.by, level) if w is not None)

    def row_name(self, i: int) -> str:
        """The field path of row i's values."""
        return (f"tables.{self.name}.values" if self.attribute is None
                else f"tables.{self.name}.values.{self.levels[i]}")

    def entry_path(self, k: int, i: int) -> str:
        """The field path of value i of row k (a table by level alone: the level's one)."""
        return self.row_name(k) + ("" if self.by is None else f"[{i}]")

    def entries(self) -> list[tuple[str, Ref]]:
        """Every value with its field path, row after row."""
        return [(self.entry_path(k, i), value) for k, row in enumerate(self.rows)
                for i, value in enumerate(row)]

    @property
    def names(self) -> tuple[str, ...]:
        """The parameters the table's entries name (none: the table holds only numbers)."""
        return tuple(dict.fromkeys(v for v in self.values if isinstance(v, str)))

    def at(self, values: Mapping[str, float]) -> "TableSpec":
        """The table with every entry a number: a named one at its parameter's value."""
        if not self.names:
            return self
        return replace(self, values=tuple(float(values[v]) if isinstance(v, str) else v
                                          for v in self.values))


@dataclass(frozen=True)
class DistributionSpec:
    """A parameter's uncertainty (PSA): family and its parameters, as in the file."""
    family: str
    params: Mapping[str, float | tuple[float, ...]]


@dataclass(frozen=True)
class ParameterSpec:
    name: str
    value: float
    distribution: DistributionSpec | None = None
    low: float | None = None  # one-way sensitivity range
    high: float | None = None
    formula: "Formula | None" = None  # a derived parameter: value is its base-case result


@dataclass(frozen=True)
class StartSpec:
    shares: Mapping[str, float]  # every state name in file order (0 if not given); sums to 1
    age: float | None = None  # cohort age at time 0, in time units
    # odds ratios of starting in a state by attribute (a multinomial logit around `shares`)
    effects: tuple[EffectSpec, ...] = ()


DISCOUNTINGS = ("annual", "continuous")
"""How the discount rates are read: effective rates per year, factor (1 + d)^-t, or
instantaneous rates per year, factor exp(-r t) (t in years)."""


@dataclass(frozen=True)
class OutcomesSpec:
    discount_costs: float = 0.0  # per year, read as `discounting` says
    discount_effects: float = 0.0
    correction: Correction = "trapezoidal"
    discounting: str = "annual"  # one of DISCOUNTINGS


@dataclass(frozen=True)
class AttributeSpec:
    """One patient attribute and the distribution it is drawn from.

    distribution: normal (mean, sd, optional lower/upper truncation), lognormal (meanlog,
    sdlog), uniform (lower, upper), beta (alpha, beta), gamma (shape, scale),
    categorical (levels, shares), yesno (prevalence). Normal attributes always carry
    lower/upper (-inf/inf when the file gives none)."""
    name: str
    distribution: str
    params: Mapping[str, float | tuple]

    @property
    def continuous(self) -> bool:
        return self.distribution in CONTINUOUS_DISTRIBUTIONS


@dataclass(frozen=True)
class DerivedSpec:
    """A banded attribute: labels[i] for source values in [edges[i], edges[i+1]); the last
    label holds from the last edge up (len(labels) == len(edges); edges[0] may be -inf)."""
    name: str
    source: str
    edges: tuple[float, ...]
    labels: tuple[str, ...]


@dataclass(frozen=True)
class PopulationSpec:
    size: int
    attributes: tuple[AttributeSpec, ...] = ()
    correlation_attributes: tuple[str, ...] = ()
    correlation: tuple[tuple[float, ...], ...] = ()
    derived: tuple[DerivedSpec, ...] = ()
    file: Path | None = None  # resample rows of a CSV/Parquet file instead
    weights: str | None = None  # column of sampling weights in `file`


@dataclass(frozen=True)
class SimulationSpec:
    seed: int = 20261201
    batch_size: int = 20000
    grid: float | None = None  # report grid step in time units; default: the cycle
    validation_patients: int | None = None  # the main job compares the first ones with the
    # cohort; None: `workflow.VALIDATED` (fewer where the counterpart is solved numerically)


@dataclass(frozen=True)
class ConditionSpec:
    """One eligibility condition on a patient attribute (at entry). Exactly one test:
    above (x > v), at_least (x >= v), below (x < v), at_most (x <= v), equals, one_of."""
    attribute: str
    test: Literal["above", "at_least", "below", "at_most", "equals", "one_of"]
    value: float | str | bool | tuple


@dataclass(frozen=True)
class EligibilitySpec:
    """Who a strategy can reach: all of `all` and, when given, at least one of `any`."""
    all: tuple[ConditionSpec, ...] = ()
    any: tuple[ConditionSpec, ...] = ()


@dataclass(frozen=True)
class ChangeSpec:
    """What a strategy changes while a patient is on treatment.

    `risk` (a transition or event name, or a from->to key) with one of `hazard_ratio`, the
    treated `rate` or the treated `probability` (the last two are bound as the hazard ratio
    they amount to, `microsim.scenario.risk_changes`); or `state` (None: every non-absorbing
    state) with `cost` added per time unit and/or `utility` added per time unit."""
    risk: str | None = None
    hazard_ratio: Ref | None = None
    rate: Ref | None = None  # the constant rate on treatment
    probability: Ref | None = None  # the per-cycle probability on treatment
    state: str | None = None
    cost: Ref = 0.0
    utility: Ref = 0.0


@dataclass(frozen=True)
class LineSpec:
    """A later treatment of a sequence: it starts when the one before it stops, and acts
    through its own changes, transitions and events until a patient enters one of `stop_on`
    (or has one of its events)."""
    name: str
    stop_on: tuple[str, ...] = ()
    changes: tuple[ChangeSpec, ...] = ()
    transitions: tuple[TransitionSpec, ...] = ()  # added, acting only while it is on
    events: tuple[EventSpec, ...] = ()  # added, happening only while it is on


@dataclass(frozen=True)
class StrategySpec:
    """One decision option: who is treated, when, and what treatment changes; added
    states and transitions extend the model for this strategy only."""
    name: str
    label: str
    comparator: bool = False
    eligible: EligibilitySpec | None = None  # None: everyone
    uptake: Ref = 1.0  # share of eligible patients who take the treatment up
    start: float = 0.0  # time since start at which treatment begins
    stop: float | None = None  # time since start at which it ends (None: never)
    discontinuation: Ref = 0.0  # rate per time unit at which patients stop early
    changes: tuple[ChangeSpec, ...] = ()
    states: tuple[StateSpec, ...] = ()  # added states
    transitions: tuple[TransitionSpec, ...] = ()  # added transitions
    while_treated: tuple[bool, ...] = ()  # per added transition: only while on treatment
    events: tuple[EventSpec, ...] = ()  # added events
    events_while_treated: tuple[bool, ...] = ()  # per added event: only while on treatment
    capacity: "CapacitySpec | None" = None  # its arrivals and resources, when it changes them
    start_on: tuple[str, ...] = ()  # treatment starts on entering one of these states
    stop_on: tuple[str, ...] = ()  # and stops on entering one of these
    then: tuple[LineSpec, ...] = ()  # later treatments, each after the one before stops
    start_delay: float = 0.0  # time units from the start trigger to treatment

    @property
    def phased(self) -> bool:
        """Whether treatment follows the patient's history (states entered), not the
        clock alone."""
        return bool(self.start_on or self.stop_on or self.then)

    @property
    def on_treatment_only(self) -> frozenset[str]:
        """The names of the added transitions and events that act only while the first
        treatment is on."""
        return frozenset(o.name for o, gated in (*zip(self.transitions, self.while_treated),
                                                 *zip(self.events, self.events_while_treated))
                         if gated)

    @property
    def changes_anything(self) -> bool:
        """Whether any treatment of the strategy changes the model."""
        return any((line.changes or line.transitions or line.events)
                   for line in (self, *self.then))


@dataclass(frozen=True)
class EconomicsSpec:
    """Willingness to pay per QALY, the acceptability-curve range and the money label."""
    threshold: float = 20000.0  # willingness to pay per QALY
    thresholds: tuple[float, float, float] = (0.0, 100000.0, 1000.0)  # from, to, step
    currency: str = "money units"
    precision: float | None = None  # target 95% CI half-width of incremental NMB
    # the people a decision reaches: new patients a year (one number, or one per year)
    incidence: tuple[float, ...] = ()
    evpi_years: int | None = None  # years the decision holds, for population EVPI
    evpi_discount: float | None = None  # yearly discount rate of population EVPI
    prevalent_patients: int = 0  # patients already there at the start of budget year 1
    budget_years: int | None = None  # calendar years of the budget impact

    def incidence_by_year(self, years: int) -> tuple[float, ...]:
        """New patients in each of `years` years: one number holds for every year."""
        if len(self.incidence) == 1:
            return self.incidence * years
        return self.incidence[:years]


INVALID_DRAWS = ("refuse", "redraw", "truncate")
"""What a PSA does with a draw some value or row of which is invalid: refuse the run, draw
it again from the next occurrence of its streams, or clip its values to their ranges."""


PSA_BASES = ("simulated", "exact")


@dataclass(frozen=True)
class NormalGroupSpec:
    """Parameters drawn together from one multivariate normal: `means` and `covariance` on
    the drawn scale, which is the log for the members named in `on_log_scale`."""
    parameters: tuple[str, ...]
    means: tuple[float, ...]
    covariance: tuple[tuple[float, ...], ...]
    on_log_scale: tuple[str, ...] = ()

    @property
    def on_log(self) -> tuple[bool, ...]:
        return tuple(name in self.on_log_scale for name in self.parameters)


@dataclass(frozen=True)
class UncertaintySpec:
    """PSA settings: outer draws, inner patients per draw, correlation, Dirichlet rows,
    multivariate normal groups, and what to do with invalid draws."""
    draws: int = 100
    patients: int | None = None  # default: the population size
    correlation_parameters: tuple[str, ...] = ()
    correlation: tuple[tuple[float, ...], ...] = ()
    dirichlets: tuple[tuple[tuple[str, ...], tuple[float, ...]], ...] = ()  # (names, alphas)
    invalid_draws: str = "refuse"  # one of INVALID_DRAWS
    normal_groups: tuple[NormalGroupSpec, ...] = ()
    evppi: tuple[tuple[str, ...], ...] = ()  # parameter groups whose EVPPI is reported
    basis: str = "simulated"  # one of PSA_BASES: each draw simulated, or its exact mixture


@dataclass(frozen=True)
class SensitivitySpec:
    """Deterministic sensitivity beyond one way: a pair of parameters varied together and
    the parameters whose break-even value is sought, on a grid of `grid` values each."""
    two_way: tuple[str, ...] = ()  # two parameter names, or none
    break_even: tuple[str, ...] = ()
    grid: int = 7  # values from low to high (the base value is added when not among them)


@dataclass(frozen=True)
class Scenario:
    title: str
    description: str
    provenance: str
    time: TimeSpec
    states: tuple[StateSpec, ...]
    start: StartSpec
    transitions: tuple[TransitionSpec, ...]
    parameters: Mapping[str, ParameterSpec] = field(default_factory=dict)
    tables: Mapping[str, TableSpec] = field(default_factory=dict)
    events: tuple[EventSpec, ...] = ()
    outcomes: OutcomesSpec = OutcomesSpec()
    population: PopulationSpec | None = None
    simulation: SimulationSpec = SimulationSpec()
    strategies: tuple[StrategySpec, ...] = ()  # the first with comparator = true compares
    economics: EconomicsSpec = EconomicsSpec()
    uncertainty: UncertaintySpec = UncertaintySpec()
    sensitivity: SensitivitySpec = SensitivitySpec()
    capacity: "CapacitySpec | None" = None  # arrivals and shared resources (microsim.capacity)
    source: Path | None = None
    warnings: tuple[str, ...] = ()
    uses: tuple[Reference, ...] = ()  # every parameter or table name in a number slot, with
    # the role the reader gave it: what each PSA draw's values are checked against

    @property
    def state_names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.states)

    def strategy(self, name: str) -> StrategySpec:
        return next(s for s in self.strategies if s.name == name)

    def with_added(self, strategy: StrategySpec, lines: tuple[LineSpec, ...] = ()) -> "Scenario":
        """The model with a strategy's added states, transitions and events, and those of
        the later treatments `lines` of its sequence."""
        return replace(self, states=self.states + strategy.states,
                       transitions=sum((x.transitions for x in (strategy, *lines)),
                                       self.transitions),
                       events=sum((x.events for x in (strategy, *lines)), self.events))

    @property
    def discrete(self) -> bool:
        """True for per-cycle probability models, False for rate/hazard models."""
        return any(t.probability is not None for t in self.transitions)


# -- capacity: arrivals, shared resources and replications (run by microsim.capacity) --------

@dataclass(frozen=True)
class ArrivalsSpec:
    """An open population: patients enter over calendar time, each a new patient drawn from
    the population section and started by [start]. Either `rate` (patients per time unit: a
    number, a parameter, or a table by time for a rate by period) or `times` (the arrival
    times read from `file`, sorted)."""
    rate: Ref | None = None
    file: Path | None = None
    times: tuple[float, ...] = ()


@dataclass(frozen=True)
class PrioritySpec:
    """Who is served first: patients at earlier `levels` of `attribute`, or in earlier
    waiting `states`; ties (and everyone without a rule) first come, first served. With
    `preemptive`, a patient of a higher class takes the unit of the lowest class in service."""
    attribute: str | None = None
    levels: tuple[str, ...] = ()
    states: tuple[str, ...] = ()
    preemptive: bool = False


@dataclass(frozen=True)
class ResourceSpec:
    """A shared resource (beds, slots, chairs): each patient in `state` holds one unit; a
    patient who would enter it while none is free waits in `waiting[0]` (the other waiting
    states are where waiting patients can move on to)."""
    name: str
    label: str
    capacity: Ref  # units: a whole number, a parameter, or a table by time
    state: str
    waiting: tuple[str, ...]
    cost: Ref = 0.0  # money per unit of capacity per time unit, used or not
    priority: PrioritySpec | None = None  # None: first come, first served
    queue_limit: int | None = None  # at most this many waiting; later patients are turned away
    turned_away: str | None = None  # where they go instead
    patience: float | None = None  # a patient waiting this long leaves the queue ...
    leave_to: str | None = None  # ... for this state
    wait_target: float | None = None  # report the share waiting longer than this


@dataclass(frozen=True)
class ReplicationsSpec:
    """Independent runs of the service, and the time at their start left out of statistics
    (None: estimated from the run by MSER-5)."""
    count: int = 10
    warm_up: float | None = 0.0


@dataclass(frozen=True)
class CapacitySpec:
    resources: tuple[ResourceSpec, ...] = ()
    arrivals: ArrivalsSpec | None = None  # None: a closed cohort, everyone at time 0
    replications: ReplicationsSpec = ReplicationsSpec()

    def resource(self, name: str) -> ResourceSpec:
        return next(r for r in self.resources if r.name == name)
