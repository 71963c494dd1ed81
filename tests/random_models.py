"""Random valid scenarios for the calibration test (tests/test_calibration.py).

Each model is drawn from one numpy Generator, so a seed gives the same models on every
machine. The generator knows what it means each model to be: its kind, the features it
covers, whether it has an exact analytic counterpart, the strategy to validate it under,
and which of its numbers can be perturbed. Every probability and rate is a named
parameter, so a perturbation is one value given to `bind` (a perturbed binding of the
same scenario, as a PSA draw would be).

Per-cycle rows stay valid under every multiplier the model can apply: each row's worst
case (the largest hazard ratio of its effects over the attribute ranges and the horizon,
its memory and its strategy) is computed and the row's probabilities lowered until it fits.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from support import (Nested, after, attribute, effect, event, move, nested, outcomes,
                     parameters, population, scenario_text, section, start, state, strategy,
                     table, transition)

ALIVE = ("well", "sick", "worse")
DEAD = "dead"
EVENT = "flare"
SCALE = 1.1  # a perturbation scales one hazard (or one per-cycle probability) by this

# the attributes a population may carry; rate models take only the few-valued ones,
# because their exact counterpart costs one solve per distinct patient
AGE = dict(mean=60.0, sd=8.0, lower=40.0, upper=80.0)
MARKER = dict(lower=0.0, upper=2.0)
GROUPS = ("a", "b", "c")
LOG_LOCATION = ("lognormal", "generalised_gamma")  # families with a location on log time
SLOW_UNDER_AGE = ("weibull", *LOG_LOCATION)  # latent times under attained age need roots


@dataclass(frozen=True)
class Perturbation:
    parameter: str
    value: float
    what: str


@dataclass(frozen=True)
class RandomModel:
    name: str
    kind: str  # "cycle" or "rate"
    features: frozenset[str]
    text: str
    strategy: str | None  # the strategy to bind (None: the model as written)
    size: int  # patients of the calibration run
    exact: bool  # the generator means the model to have an exact counterpart
    perturbations: tuple[Perturbation, ...]
    heterogeneous: bool  # patients differ in continuous ways (attributes or windows)


@dataclass
class Way:
    """A transition (target: a state) or the event (target None) while it is drawn."""
    source: str | None  # None for the event
    target: str | None
    parameter: str | None = None  # its probability or rate (None: a remainder or a table)
    table: tuple | None = None  # (name, by, starts, values)
    hazard: dict | None = None  # a rate model's parametric hazard
    clock: str | None = None
    remainder: bool = False
    effects: list = field(default_factory=list)
    memory: list = field(default_factory=list)
    worst: float = 1.0  # the largest multiplier effects, memory and treatment can give it
    states: tuple = ()  # the event's states
    added: bool = False  # a strategy's added transition (or a later treatment's own)
    called: str | None = None  # its name, when not the default

    @property
    def name(self) -> str:
        return self.called or (EVENT if self.target is None else f"{self.source}->{self.target}")


class Draft:
    """One model being drawn: states, ways out, population, strategy, and what it covers."""

    def __init__(self, rng: np.random.Generator, kind: str, log_location: bool = False,
                 sequence: bool = False, trigger: str | None = None, delayed: bool = False):
        self.rng = rng
        self.delayed = delayed  # a treated rate model: treatment a fixed time after an entry
        self.log_location = log_location  # rate models of log-location families
        self.sequence = sequence  # a treated model whose strategy is a sequence of two
        self.trigger = trigger  # cycle models: the event starts ("start", "delay") or
        # stops ("stop") the treatment
        self.kind = kind
        self.cycles = kind == "cycle"
        self.features: set[str] = {kind}
        self.ways: list[Way] = []
        self.values: dict[str, float] = {}
        self.derived: dict[str, dict] = {}  # derived parameters: {"formula": ...}
        self.exact = True
        self.heterogeneous = False
        self.attributes: list[str] = []
        self.start_age: float | None = None
        self.strategy: str | None = None
        self.strategy_fields: dict = {}
        self.by_level: set[str] = set()  # tables by the levels of "group"
        self.value_tables: dict[str, dict] = {}  # utilities read from tables: name -> keys

    # -- random numbers ------------------------------------------------------------------
    def chance(self, p: float) -> bool:
        return bool(self.rng.random() < p)

    def uniform(self, lo: float, hi: float, digits: int = 4) -> float:
        return round(float(self.rng.uniform(lo, hi)), digits)

    def pick(self, options):
        options = list(options)
        return options[int(self.rng.integers(len(options)))]

    def ratio(self, lo: float = 0.5, hi: float = 2.0) -> float:
        """A hazard ratio, log-uniform between lo and hi."""
        return round(math.exp(self.rng.uniform(math.log(lo), math.log(hi))), 4)

    def whole(self, lo: int, hi: int) -> int:
        """A whole number from lo to hi inclusive."""
        return int(self.rng.integers(lo, hi + 1))

    def parameter(self, name: str, value: float) -> str:
        self.values[name] = float(value)
        return name

    def state_cost(self, s: str) -> float | str:
        """A state's cost per time unit: a number, or (in the last living state) a derived
        parameter, a unit cost times a count of visits; one draw either way, so the rest of
        the model is drawn as before."""
        if s == self.alive[-1]:
            self.features.add("derived parameter")
            self.derived[f"cost_{s}"] = {"formula": f"{self.uniform(0, 250, 2)} * visits"}
            self.values.setdefault("visits", 4.0)
            return f"cost_{s}"
        return self.uniform(0, 1000, 1)

    def state_utility(self, s: str) -> float | str:
        """A state's utility: a number, or in the first living state a table made from it
        (one draw either way, so the rest of the model is drawn as before): by group where
        the population has groups (the first group's entry a parameter), else by attained
        age where the age is known."""
        u = self.uniform(0.3, 1.0, 3)
        if s != self.alive[0]:
            return u
        if "group" in self.attributes:
            self.features.add("utility by level")
            self.value_tables["utility_by_group"] = dict(attribute="group", values={
                GROUPS[0]: self.parameter("utility_first_group", u),
                **{g: round(u * f, 3) for g, f in zip(GROUPS[1:], (0.9, 0.75))}})
            return "utility_by_group"
        if self.knows_age():
            self.features.add("utility by age")
            values = [u, round(u * 0.9, 3), round(u * 0.75, 3)]
            self.value_tables["utility_by_age"] = dict(by="age", starts=[0.0, 65.0, 75.0],
                                                       values=values)
            return "utility_by_age"
        return u

    def hazard_level(self) -> float:
        """A rate such that a few occurrences happen over the horizon."""
        return self.uniform(0.5, 3.0) / self.end

    # -- states, time, population --------------------------------------------------------
    def draw_frame(self, alive: int | None = None, absorbing: bool | None = None):
        self.alive = list(ALIVE[:alive or self.whole(1, 3)])
        if absorbing is None:  # a single state needs death to have a way out
            absorbing = len(self.alive) == 1 or self.chance(0.75)
        self.absorbing = [DEAD] if absorbing else []
        if not self.absorbing:
            self.features.add("no absorbing state")
        self.unit = "years" if self.cycles else self.pick(("years", "years", "days"))
        self.cycle = self.pick((1.0, 1.0, 0.5)) if self.unit == "years" else self.pick((1.0, 2.0))
        self.n_cycles = self.whole(3, 20)
        self.end = self.n_cycles * self.cycle
        self.lifetime = bool(self.absorbing) and self.chance(0.25)
        if self.lifetime:
            self.features.add("lifetime")
        self.shares = {self.alive[0]: 1.0}
        if len(self.alive) > 1 and self.chance(0.3):
            first = self.uniform(0.5, 0.9, 3)
            self.shares = {self.alive[0]: first, self.alive[1]: round(1.0 - first, 3)}

    @property
    def states(self) -> list[str]:
        return self.alive + self.absorbing

    def draw_population(self, continuous: bool):
        """Attributes for some models (continuous ones only where allowed), and a start
        age for some others (attained-age effects, age clocks and age tables)."""
        if self.chance(0.5):
            names = ["group", "smoker"] + (["age", "marker"] if continuous else [])
            self.attributes = [n for n in names if self.chance(0.5)] or [self.pick(names)]
            self.features.add("population")
            kinds = {"age": "continuous attribute", "marker": "continuous attribute",
                     "group": "categorical attribute", "smoker": "yes/no attribute"}
            self.features.update(kinds[n] for n in self.attributes)
            self.heterogeneous = any(n in ("age", "marker") for n in self.attributes)
            shares = self.rng.dirichlet([2.0, 2.0, 2.0])
            self.group_shares = [round(float(shares[0]), 3), round(float(shares[1]), 3)]
            self.group_shares.append(round(1.0 - sum(self.group_shares), 3))
            self.prevalence = self.uniform(0.1, 0.6, 3)
        if "age" not in self.attributes and self.unit == "years" and self.chance(0.45):
            self.start_age = self.uniform(45, 75, 1)

    def knows_age(self) -> bool:
        return "age" in self.attributes or self.start_age is not None

    def age_range(self) -> tuple[float, float]:
        """The lowest and highest attained age over the horizon."""
        low, high = ((AGE["lower"], AGE["upper"]) if "age" in self.attributes
                     else (self.start_age, self.start_age))
        return low, high + self.end

    def add_effects(self, way: Way):
        """Proportional-hazards effects of some attributes and of attained age (not on a
        Weibull, log-normal or generalised gamma hazard, whose latent times under a growing
        multiplier take a numerical root search per draw: correct, but too slow for a test
        of this size); on a log-normal or generalised gamma hazard, time ratios of the
        attributes instead (accelerated failure time)."""
        family = way.hazard["family"] if way.hazard is not None else None
        if family in LOG_LOCATION:
            self.add_time_ratios(way)
            return
        choices = list(self.attributes)
        if self.start_age is not None and family not in SLOW_UNDER_AGE:
            choices.append("age")
        for name in choices:
            if not self.chance(0.35):
                continue
            if name == "age":
                hr = self.ratio(0.97, 1.06)
                low, high = self.age_range()
                way.effects.append(effect("age", hr, centre=60.0))
                way.worst *= max(hr ** (low - 60.0), hr ** (high - 60.0))
                self.features.add("attained-age effect")
            elif name == "marker":
                hr = self.ratio()
                way.effects.append(effect("marker", hr, centre=1.0))
                way.worst *= max(hr, 1 / hr)
            elif name == "group":
                hr = self.ratio()
                way.effects.append(effect("group", hr, level=self.pick(GROUPS)))
                way.worst *= max(hr, 1.0)
            else:
                hr = self.ratio()
                way.effects.append(effect("smoker", hr))
                way.worst *= max(hr, 1.0)
            self.features.add("effects")

    def add_time_ratios(self, way: Way):
        """Time ratios of some attributes: the hazard's clock divided per patient."""
        for name in self.attributes:
            if not self.chance(0.5):
                continue
            tr = self.ratio(0.6, 1.7)
            level = self.pick(GROUPS) if name == "group" else None
            way.effects.append(nested(attribute=name, time_ratio=tr,
                                      **({"level": level} if level else {})))
            self.features.add("time ratio")

    # -- ways out ------------------------------------------------------------------------
    def way(self, source, target, **fields) -> Way:
        way = Way(source, target, **fields)
        self.ways.append(way)
        return way

    def targets(self, source: str) -> list[str]:
        """Where a state leads: up to three other states, among them the next state of the
        chain (so that every state can be reached) and death for a lifetime horizon."""
        others = [t for t in self.states if t != source]
        chosen = [str(t) for t in self.rng.choice(others, self.whole(0, min(3, len(others))),
                                                 replace=False)]
        for needed in self.needed(source):
            if needed not in chosen:
                chosen.append(needed)
        return chosen

    def needed(self, source: str) -> list[str]:
        """The targets a state must keep (not at probability or rate 0): the next state
        of the chain and, for a lifetime horizon, death."""
        position = self.states.index(source)
        following = self.states[position + 1:position + 2]
        return following + ([DEAD] if self.lifetime and DEAD not in following else [])

    def draw_event(self, value: float):
        if not (self.trigger or self.chance(0.4)):  # a model whose treatment it triggers has it
            return
        states = tuple(s for s in self.alive if self.chance(0.7)) or (self.alive[0],)
        self.way(None, None, parameter=self.parameter(f"{self.letter}_{EVENT}", value),
                 states=states)
        self.features.add("event")

    @property
    def letter(self) -> str:
        return "p" if self.cycles else "r"

    def memory_sources(self) -> list[str]:
        """Names whose occurrences memory can follow: the event, transitions, states."""
        return [w.name for w in self.ways if w.target is None or w.target != w.source] + list(
            self.alive)

    def add_memory(self, candidates: list[Way], windows: bool):
        """Count memory on one way, and window memory on one when `windows`."""
        if not candidates:
            return
        if self.chance(0.3):
            way = self.pick(candidates)
            factors = [1.0] + [self.ratio(0.5, 2.5) for _ in range(self.whole(1, 2))]
            way.memory.append(after(self.pick(self.memory_sources()), multipliers=factors))
            way.worst *= max(factors)
            self.features.add("count memory")
        if windows and self.chance(0.2):
            self.add_window_memory(self.pick(candidates))

    def add_window_memory(self, way: Way):
        """A multiplier while less than a few cycles have passed since the last occurrence
        of something."""
        factor = self.ratio(0.5, 2.5)
        way.memory.append(after(self.pick(self.memory_sources()),
                                within=self.cycle * self.whole(1, 3), multiplier=factor))
        way.worst *= max(factor, 1.0)
        self.features.add("window memory")

    # -- strategies ----------------------------------------------------------------------
    def draw_strategy(self, changeable: list[Way], addable: list[tuple[str, str]], value):
        """A comparator and a treatment: who is eligible, uptake, when, and what it
        changes (a hazard ratio, costs and utility on treatment, an added transition)."""
        fields: dict = {}
        if self.attributes and self.chance(0.6):
            fields["eligible"] = nested(all=[self.condition(self.pick(self.attributes))])
            self.features.add("eligibility")
        if self.chance(0.5):
            fields["uptake"] = self.uniform(0.4, 1.0, 3)
            self.features.add("uptake")
        if self.chance(0.4):
            fields["start"] = self.cycle * self.whole(0, self.n_cycles - 1)
        if self.chance(0.3):
            fields["stop"] = self.cycle * self.whole(int(fields.get("start", 0) / self.cycle) + 1,
                                                     self.n_cycles)
        if self.trigger:
            fields.update(self.draw_trigger())
        elif self.cycles and self.chance(0.4):
            fields["discontinuation"] = self.uniform(0.05, 0.3, 3) / self.cycle
            self.features.add("discontinuation")
            self.heterogeneous = True
        elif len(self.alive) > 1 and (self.delayed or self.chance(0.3)):
            fields["start_on"] = self.pick(self.alive[1:])
            self.features.add("treatment on entering a state")
            if self.delayed:  # a fixed delay has no finite Markov form
                fields["start_delay"] = round(self.uniform(0.05, 0.5) * self.end, 3)
                self.features.add("delay to treatment")
                self.exact = False
        changes = []
        if changeable and (self.chance(0.8) or not addable):
            way = self.pick(changeable)
            hr = self.ratio(0.4, 1.6)
            changes.append(self.risk_change(way, hr, "first"))
            way.worst *= max(hr, 1.0)
            self.features.add("hazard ratio")
        if self.chance(0.5) or not (changes or addable):
            changes.append(nested(cost=self.uniform(0, 500, 1), utility=self.uniform(-0.1, 0.1, 3)))
        added = []
        if addable and (self.chance(0.5) or not changes):
            source, target = self.pick(addable)
            way = Way(source, target, parameter=self.parameter(
                f"{self.letter}_{source}_{target}", value()), added=True)
            self.ways.append(way)
            added.append(move(source, target, **{("probability" if self.cycles else "rate"):
                                                 way.parameter}))
            self.features.add("added transition")
        if self.sequence:
            fields.update(self.draw_second(changeable, addable, fields.get("start_on"), value,
                                           fields.get("stop_on")))
        self.strategy = "treat"
        self.strategy_fields = dict(fields, changes=changes or None, transitions=added or None)
        self.features.add("strategy")

    def risk_change(self, way: Way, hr: float, treatment: str) -> Nested:
        """A change of `way` by the hazard ratio `hr`. In the sequences and the delayed
        treatments, where the way has one constant base value above 0, it is given as the
        risk on treatment instead: a derived parameter of the base (hr x rate, or
        1 - (1 - p)^hr), so that the same ratio holds when a row is lowered or a perturbation
        scales the base. No draw is spent, so every model is drawn as before."""
        base = way.parameter
        given = self.sequence or self.delayed
        if not (given and base and way.hazard is None and self.values[base] > 0):
            return nested(transition=way.name, hazard_ratio=hr)
        kind = "probability" if self.cycles else "rate"
        name = f"{base}_on_{treatment}"
        self.derived[name] = {"formula": f"1 - (1 - {base}) ^ {hr}" if self.cycles
                              else f"{hr} * {base}"}
        self.features.add(f"{kind} on treatment")
        return nested(transition=way.name, **{kind: name})

    def draw_trigger(self) -> dict:
        """The event starts the treatment (after a delay of one or two cycles for "delay")
        or stops it."""
        if self.trigger == "stop":
            self.features.add("treatment stopped by an event")
            return {"stop_on": EVENT}
        self.features.add("treatment started by an event")
        if self.trigger == "delay":
            self.features.add("delay to treatment")
            return {"start_on": EVENT, "start_delay": self.cycle * self.whole(1, 2)}
        return {"start_on": EVENT}

    def draw_second(self, changeable: list[Way], addable: list[tuple[str, str]],
                    start_on: str | None, value, stop_on: str | None = None) -> dict:
        """A second treatment after the first stops (on `stop_on`, else on entering a state
        drawn here): a hazard ratio of its own, an event of its own and, where a row has
        room, a transition of its own (on a pair the first treatment has not added)."""
        stops = [s for s in self.alive if s != start_on and (start_on or s not in self.shares)]
        if not (stops or stop_on):
            return {}
        kind = "probability" if self.cycles else "rate"
        line: dict = {"name": "second"}
        if changeable and self.chance(0.5):
            way = self.pick(changeable)
            hr = self.ratio(0.4, 1.6)
            line["changes"] = [self.risk_change(way, hr, "second")]
            way.worst *= max(hr, 1.0)
        states = tuple(s for s in self.alive if self.chance(0.7)) or (self.pick(self.alive),)
        rash = Way(None, None, parameter=self.parameter(f"{self.letter}_rash", value()),
                   states=states, added=True, called="rash")
        self.ways.append(rash)
        line["events"] = [nested(name="rash", states=list(states), **{kind: rash.parameter})]
        self.features.add("later treatment's event")
        addable = [a for a in addable if a not in {(w.source, w.target) for w in self.ways}]
        if addable:
            source, target = self.pick(addable)
            way = Way(source, target, parameter=self.parameter(
                f"{self.letter}_second_{source}_{target}", value()), added=True,
                called="second_move")
            self.ways.append(way)
            line["transitions"] = [move(source, target, name="second_move",
                                        **{kind: way.parameter})]
            self.features.add("later treatment's transition")
        self.features.add("sequence")
        return dict(stop_on=stop_on or self.pick(stops), then=[nested(**line)])

    def condition(self, name: str) -> dict:
        if name == "age":
            return dict(attribute="age", below=self.uniform(50, 75, 1))
        if name == "marker":
            return dict(attribute="marker", above=self.uniform(0.3, 1.7, 3))
        if name == "group":
            return dict(attribute="group", one_of=[self.pick(GROUPS)])
        return dict(attribute="smoker", equals=self.chance(0.5))

    # -- text ----------------------------------------------------------------------------
    def way_fields(self, way: Way) -> dict:
        fields: dict = {}
        if way.hazard is not None:
            fields["hazard"] = way.hazard
        else:
            value = way.table[0] if way.table else ("remainder" if way.remainder else way.parameter)
            fields["probability" if self.cycles else "rate"] = value
        if way.clock is not None:
            fields["clock"] = way.clock
        fields["effects"] = way.effects or None
        fields["memory"] = way.memory or None
        return fields

    def population_block(self, size: int) -> str:
        entries = {"age": lambda: attribute("age", "normal", **AGE),
                   "marker": lambda: attribute("marker", "uniform", **MARKER),
                   "group": lambda: attribute("group", "categorical", levels=list(GROUPS),
                                              shares=self.group_shares),
                   "smoker": lambda: attribute("smoker", "yesno", prevalence=self.prevalence)}
        return population(size, *(entries[n]() for n in self.attributes))

    def text(self, size: int) -> str:
        if self.lifetime:
            time = section("time", unit=self.unit, cycle=self.cycle, horizon="lifetime",
                           lifetime_cap=self.end)
        else:
            time = section("time", unit=self.unit, cycle=self.cycle, horizon=self.end)
        blocks = [time, self.start_block()]
        blocks += [state(s, utility=self.state_utility(s), cost=self.state_cost(s))
                   for s in self.alive]
        blocks += [state(s, absorbing=True) for s in self.absorbing]
        for way in self.ways:
            if way.added:
                continue
            if way.target is None:
                fields = self.way_fields(way)
                states = list(way.states)
                if len(states) > 1 and self.chance(0.5):
                    kind = "probability" if self.cycles else "rate"
                    value = self.values[way.parameter]
                    fields[kind] = {states[0]: way.parameter, **{
                        s: round(value * self.uniform(0.3, 1.0), 6) for s in states[1:]}}
                    states = None
                    self.features.add("event by state")
                blocks.append(event(EVENT, states, cost=self.uniform(0, 300, 1),
                                    disutility=self.uniform(0, 0.05, 3), **fields))
            else:
                blocks.append(transition(way.source, way.target, cost=self.uniform(0, 300, 1),
                                         **self.way_fields(way)))
        blocks.append(parameters(**self.values, **self.derived))
        tables = {w.table[0]: w.table for w in self.ways if w.table}
        blocks += [table(name, by=by, starts=starts, values=values) if name not in self.by_level
                   else table(name, by=by, starts=starts, attribute="group",
                              values=level_rows(values))
                   for name, by, starts, values in tables.values()]
        blocks += [table(name, **keys) for name, keys in self.value_tables.items()]
        corrections = ("half-cycle", "none", "trapezoidal") + (
            ("simpson",) if self.n_cycles % 2 == 0 else ())
        costs, effects = self.pick((0.0, 0.035)), self.pick((0.0, 0.015))
        discounting = "continuous" if costs and effects else None  # no extra draw
        if discounting:
            self.features.add("continuous discounting")
        blocks.append(outcomes(discount_costs=costs, discount_effects=effects,
                               correction=self.pick(corrections), discounting=discounting))
        if self.attributes:
            blocks.append(self.population_block(size))
        if self.strategy is not None:
            blocks += [strategy("usual", comparator=True),
                       strategy(self.strategy, **self.strategy_fields)]
        return scenario_text(*blocks, title="random calibration model",
                             provenance="invented at random for the calibration test")

    def start_block(self) -> str:
        """[start], with the odds of starting in the second state depending on an attribute
        in some models."""
        effects = []
        if len(self.shares) == 2 and self.attributes and self.chance(0.4):
            name, second = self.pick(self.attributes), list(self.shares)[1]
            fields = dict(centre=60.0) if name == "age" else dict(centre=1.0) \
                if name == "marker" else dict(level=self.pick(GROUPS)) if name == "group" else {}
            effects.append(nested(state=second, attribute=name, odds_ratio=self.ratio(0.3, 3.0),
                                  **fields))
            self.features.add("start shares by attribute")
        return section("start", age=self.start_age, shares=self.shares, effects=effects or None)

    def finish(self, name: str, size: int, perturbations) -> RandomModel:
        # where the population has groups, drawn tables are by group too (no extra draws,
        # so the other models are unchanged)
        if "group" in self.attributes:
            self.by_level = {w.table[0] for w in self.ways
                             if w.table and w.table[0].startswith("table_")}
            if self.by_level:
                self.features.add("table by level")
        text = self.text(size)  # first: writing the text adds features of its own
        return RandomModel(name, self.kind, frozenset(self.features), text,
                           self.strategy, size, self.exact, tuple(perturbations),
                           self.heterogeneous)


# ------------------------------------------------------------------------- cycle models

def cycle_model(rng: np.random.Generator, name: str, sequence: bool = False,
                trigger: str | None = None) -> RandomModel:
    d = Draft(rng, "cycle", sequence=sequence, trigger=trigger)
    recipe = d.pick(["everyone dies"] + ["closed start"] * 2 + ["plain"] * 17)
    if recipe == "everyone dies":
        d.draw_frame(alive=1, absorbing=True)
    else:
        d.draw_frame()
        if (recipe == "closed start" or sequence) and len(d.alive) < 2:
            d.alive.append(ALIVE[1])
    d.draw_population(continuous=trigger is None)  # few distinct patients: a fast exact side
    rows: dict[str, bool] = {}  # state -> whether its row has a remainder
    if recipe == "everyone dies":
        d.way(ALIVE[0], DEAD, parameter=d.parameter(f"p_{ALIVE[0]}_{DEAD}", 1.0))
        rows[ALIVE[0]] = False
        d.features.add("everyone dies in cycle 1")
    for s in d.alive:
        if s in rows:
            continue
        if recipe == "closed start" and s == d.alive[0]:
            d.shares = {s: 1.0}
            target = d.states[1]
            k = d.whole(1, d.n_cycles - 1)
            d.way(s, target, table=(f"opening_{s}", "time", [0.0, k * d.cycle],
                                    [0.0, d.uniform(0.05, 0.4)]))
            d.way(s, s, remainder=True)
            rows[s] = True
            d.features.add("no way out of the start state for a while")
            continue
        rows[s] = draw_cycle_row(d, s, d.targets(s))
    with_remainder = [w for w in d.ways if rows.get(w.source) and not w.remainder]
    d.draw_event(d.uniform(0.05, 0.4))
    event = [w for w in d.ways if w.target is None]
    for way in with_remainder + event:
        d.add_effects(way)
    d.add_memory([w for w in with_remainder + event if w.parameter], windows=True)
    if sequence or trigger or d.chance(0.3):
        taken = {(w.source, w.target) for w in d.ways}
        addable = [(s, t) for s in d.alive if rows.get(s) for t in d.states
                   if t != s and (s, t) not in taken]
        d.draw_strategy(with_remainder + event, addable, lambda: d.uniform(0.02, 0.3))
    fit_rows(d, rows)
    return d.finish(name, d.whole(300, 3000), cycle_perturbations(d, rows))


def draw_cycle_row(d: Draft, s: str, targets: list[str]) -> bool:
    """The ways out of state s; True when the row has a remainder."""
    if not targets:
        return False  # no way out: patients stay
    if d.chance(0.75):
        remainder = s if d.chance(0.7) else d.pick(targets)
        for t in targets:
            if t == remainder:
                continue
            value = d.uniform(0.02, 0.35)
            if d.chance(0.1) and t not in d.needed(s):
                value = 0.0
                d.features.add("probability 0")
            way = d.way(s, t, parameter=d.parameter(f"p_{s}_{t}", value))
            if value and not any(w.table for w in d.ways) and d.chance(0.15):
                way.table = probability_table(d, s, t)
                way.parameter = None
                del d.values[f"p_{s}_{t}"]
        d.way(s, remainder, remainder=True)
        return True
    ends = targets + ([s] if d.chance(0.5) else [])
    shares = d.rng.dirichlet(np.full(len(ends), 2.0))
    shares = [round(float(x), 4) for x in shares[:-1]]
    shares.append(1.0 - sum(shares))
    if shares[-1] <= 0:
        shares = [1.0 / len(ends)] * len(ends)
    for t, value in zip(ends, shares):
        d.way(s, t, parameter=d.parameter(f"p_{s}_{t}", value))
    return False


def probability_table(d: Draft, s: str, t: str) -> tuple:
    """A per-cycle probability table by time, time in state (tunnel states) or age."""
    axes = ["time", "time_in_state"] + (["age"] if d.knows_age() else [])
    by = d.pick(axes)
    if by == "time":
        starts = [0.0, d.cycle * d.whole(1, d.n_cycles - 1)]
    elif by == "time_in_state":
        starts = [0.0, d.cycle * d.whole(1, 3)]
    else:
        starts = [0.0, 65.0]
    d.features.add(f"table by {by.replace('_', ' ')}")
    return (f"table_{s}_{t}", by, starts, [d.uniform(0.02, 0.35) for _ in starts])


def level_rows(values: list) -> dict:
    """A table's rows for the levels of "group", none above its highest value (so the
    bounds drawn for the table hold) and not proportional to each other: as drawn, in
    reverse order, and halved."""
    return {GROUPS[0]: values, GROUPS[1]: values[::-1], GROUPS[2]: [v / 2 for v in values]}


def row_worst(d: Draft, s: str, changed: dict[str, float] | None = None) -> float:
    """The largest sum of the per-cycle probabilities out of s (other than its
    remainder) that effects, memory and treatment can give: sum of 1 - (1 - p)^m."""
    values = dict(d.values, **(changed or {}))
    total = 0.0
    for w in d.ways:
        if w.source == s and w.target is not None and not w.remainder:
            p = max(w.table[3]) if w.table else values[w.parameter]
            total += 1.0 - (1.0 - p) ** w.worst
    return total


def fit_rows(d: Draft, rows: dict[str, bool]):
    """Lower the probabilities of rows with a remainder until their worst case fits."""
    for s, has_remainder in rows.items():
        while has_remainder and row_worst(d, s) > 0.98:
            for w in d.ways:
                if w.source == s and w.target is not None and not w.remainder:
                    if w.table:
                        w.table = w.table[:3] + ([round(v * 0.7, 6) for v in w.table[3]],)
                    else:
                        d.values[w.parameter] = round(d.values[w.parameter] * 0.7, 6)


def cycle_perturbations(d: Draft, rows: dict[str, bool]) -> list[Perturbation]:
    """Each named probability scaled by 1.1 where its row (and the unit interval) leaves
    room, else divided by 1.1; the direction is drawn at random where both fit."""
    out = []
    for w in d.ways:
        if w.parameter is None:
            continue
        p = d.values[w.parameter]
        up = p * SCALE <= 1.0 and (w.target is None or (
            rows.get(w.source) and row_worst(d, w.source, {w.parameter: p * SCALE}) <= 1.0))
        value, how = (p * SCALE, "x") if up and d.chance(0.5) else (p / SCALE, "/")
        out.append(Perturbation(w.parameter, value, f"probability of {w.name} {how} {SCALE}"))
    return out


# -------------------------------------------------------------------------- rate models

def rate_model(rng: np.random.Generator, name: str, log_location: bool = False,
               sequence: bool = False, delayed: bool = False) -> RandomModel:
    d = Draft(rng, "rate", log_location, sequence, delayed=delayed)
    recipe = d.pick(["closed start"] * 2 + ["time since"] + ["semi-Markov"] * 2 + ["plain"] * 15)
    d.draw_frame()
    if (recipe != "plain" or sequence or delayed) and len(d.alive) < 2:
        d.alive.append(ALIVE[1])  # two live states: room for a closed start, re-entry or a stop
    d.draw_population(continuous=False)
    targets = {s: d.targets(s) for s in d.alive}
    if recipe == "closed start":
        s = d.alive[0]
        d.shares = {s: 1.0}
        targets[s] = [d.states[1]]
    addable = [(s, t) for s in d.alive for t in d.states if t != s and t not in targets[s]]
    treated = sequence or delayed or d.chance(0.35)
    added = d.pick(addable) if treated and addable else None
    entered = {t for ts in targets.values() for t in ts} | ({added[1]} if added else set())
    for s in d.alive:
        for t in targets[s]:
            if recipe == "closed start" and s == d.alive[0]:
                opens = d.cycle * d.whole(1, d.n_cycles - 1)
                d.way(s, t, table=(f"opening_{s}", "time", [0.0, opens], [0.0, d.hazard_level()]))
                d.features.add("no way out of the start state for a while")
            else:
                draw_rate_way(d, s, t, entered_source=s in entered)
    if recipe == "semi-Markov":
        semi_markov(d)
    spare = [w for w in d.ways if w.parameter and w.target not in d.needed(w.source)]
    if spare and d.chance(0.25):
        d.values[d.pick(spare).parameter] = 0.0
        d.features.add("rate 0")
    d.draw_event(d.hazard_level())
    for way in d.ways:
        d.add_effects(way)
    d.add_memory([w for w in d.ways if w.parameter], windows=False)
    if recipe == "time since":
        d.add_window_memory(d.pick(d.ways))
        d.exact = False  # time-since memory has no finite expansion in continuous time
    if treated:
        d.draw_strategy(list(d.ways), [added] if added else [], d.hazard_level)
    return d.finish(name, d.whole(200, 1500), rate_perturbations(d))


def draw_rate_way(d: Draft, s: str, t: str, entered_source: bool):
    """A constant rate, a table by time or age, or a Weibull or Gompertz
    hazard on the time-since-start or age clock (Weibull also on the time since entry
    when nothing enters the state, where that clock is the time since start)."""
    key = f"{s}_{t}"
    if d.log_location:
        draw_log_location_way(d, s, t, entered_source)
        return
    aged = d.start_age is not None  # age clocks are possible: draw them more often
    kind = d.pick(["constant"] * (8 if aged else 11) + ["table"] * 3
                  + ["weibull", "gompertz"] * (5 if aged else 3))
    if kind == "table":
        by = d.pick(["time"] + (["age"] if d.start_age is not None else []))
        starts = [0.0, d.cycle * d.whole(1, d.n_cycles - 1)] if by == "time" else \
            [0.0, round(d.start_age + d.end / 2, 1)]
        d.way(s, t, table=(f"table_{key}", by, starts, [d.hazard_level(), d.hazard_level()]))
        d.features.add(f"table by {by}")
        return
    if kind == "constant":
        d.way(s, t, parameter=d.parameter(f"r_{key}", d.hazard_level()))
        return
    clocks = ["since_start"] + (["age"] * 2 if d.start_age is not None else []) + (
        ["since_entry"] * 2 if kind == "weibull" and not entered_source else [])
    clock = d.pick(clocks)
    d.features.add(f"{kind} on {clock.replace('_', ' ')}")
    level = d.hazard_level()
    if kind == "weibull":
        if clock == "age":
            shape = d.uniform(2.0, 6.0, 3)
            a0, a1 = d.start_age, d.start_age + d.end
            scale = ((a1 ** shape - a0 ** shape) / (level * d.end)) ** (1 / shape)
        else:
            shape = d.uniform(0.7, 3.0, 3)
            scale = d.end / (level * d.end) ** (1 / shape)  # H(end) = level * end
        hazard = dict(family="weibull", shape=shape, scale=d.parameter(f"scale_{key}", scale))
    else:
        if clock == "age":
            growth = d.uniform(0.05, 0.1)
            rate = level * math.exp(-growth * d.start_age)
        else:
            growth = d.uniform(-0.5, 1.0) / d.end
            rate = level
        hazard = dict(family="gompertz", rate=d.parameter(f"g_{key}", rate), shape=growth)
    d.way(s, t, hazard=hazard, clock=clock)


def draw_log_location_way(d: Draft, s: str, t: str, entered_source: bool):
    """A constant rate, or a log-normal or generalised gamma hazard on the time since start
    (or since entry when nothing enters the state), its median between 0.3 and 2 horizons."""
    key = f"{s}_{t}"
    kind = d.pick(["constant", *LOG_LOCATION, *LOG_LOCATION])
    if kind == "constant":
        d.way(s, t, parameter=d.parameter(f"r_{key}", d.hazard_level()))
        return
    clock = d.pick(["since_start"] + (["since_entry"] if not entered_source else []))
    d.features.add(f"{kind} on {clock.replace('_', ' ')}")
    location = math.log(d.end * d.uniform(0.3, 2.0))
    if kind == "lognormal":
        hazard = dict(family=kind, meanlog=d.parameter(f"m_{key}", location),
                      sdlog=d.uniform(0.5, 1.5, 3))
    else:
        hazard = dict(family=kind, mu=d.parameter(f"m_{key}", location),
                      sigma=d.uniform(0.5, 1.2, 3), q=d.uniform(-1.0, 1.5, 3))
    d.way(s, t, hazard=hazard, clock=clock)


def semi_markov(d: Draft):
    """Make the way out of a state that patients enter a Weibull hazard on the time since
    entry: a semi-Markov model, which has no exact counterpart here."""
    entered = {w.target for w in d.ways}
    candidates = [w for w in d.ways if w.target is not None and w.source in entered]
    if not candidates:
        return  # nothing both entered and left: the model stays Markov
    way = d.pick(candidates)
    key = f"{way.source}_{way.target}"
    shape = d.uniform(0.7, 3.0, 3)
    level = d.hazard_level()
    d.values.pop(way.parameter or "", None)
    way.parameter, way.table, way.clock = None, None, "since_entry"
    way.hazard = dict(family="weibull", shape=shape,
                      scale=d.parameter(f"scale_{key}", d.end / (level * d.end) ** (1 / shape)))
    d.features.add("semi-Markov")
    d.exact = False


def rate_perturbations(d: Draft) -> list[Perturbation]:
    """Each named hazard scaled by 1.1: a constant or Gompertz rate times 1.1, a Weibull
    scale times 1.1^(-1/shape) (its cumulative hazard (t / scale)^shape then grows by 1.1);
    a log-normal or generalised gamma on a clock 1.1 times faster (its location on log time
    less log 1.1: the time ratio 1 / 1.1)."""
    out = []
    for w in d.ways:
        if w.hazard is not None and w.hazard["family"] in LOG_LOCATION:
            key = "meanlog" if w.hazard["family"] == "lognormal" else "mu"
            name = w.hazard[key]
            out.append(Perturbation(name, d.values[name] - math.log(SCALE),
                                    f"{w.hazard['family']} clock of {w.name} x {SCALE}"))
        elif w.hazard is not None and w.hazard["family"] == "weibull":
            name, shape = w.hazard["scale"], w.hazard["shape"]
            out.append(Perturbation(name, d.values[name] * SCALE ** (-1 / shape),
                                    f"Weibull hazard of {w.name} x {SCALE}"))
        elif w.hazard is not None:
            name = w.hazard["rate"]
            out.append(Perturbation(name, d.values[name] * SCALE,
                                    f"Gompertz hazard of {w.name} x {SCALE}"))
        elif w.parameter is not None:
            out.append(Perturbation(w.parameter, d.values[w.parameter] * SCALE,
                                    f"rate of {w.name} x {SCALE}"))
    return out


# ---------------------------------------------------------------------- all the models

def random_models(seed: int, cycle_models: int, rate_models: int,
                  log_location_models: int = 0, sequence_models: int = 0,
                  trigger_models: int = 0, delay_models: int = 0) -> list[RandomModel]:
    """The models of one seed; the log-location rate models, the treatment sequences
    (half cycle, half rate models), the cycle models whose treatment an event starts,
    starts after a delay, or stops (in turn; every other one a sequence) and the rate
    models with a fixed delay to treatment come from streams of their own, so adding them
    leaves the others as they were."""
    rng = np.random.default_rng(seed)
    models = ([cycle_model(rng, f"cycle-{i}") for i in range(cycle_models)]
              + [rate_model(rng, f"rate-{i}") for i in range(rate_models)])
    rng = np.random.default_rng([seed, 1])
    models += [rate_model(rng, f"log-location-{i}", log_location=True)
               for i in range(log_location_models)]
    rng = np.random.default_rng([seed, 2])
    models += [(cycle_model if i % 2 == 0 else rate_model)(
        rng, f"sequence-{i}", sequence=True) for i in range(sequence_models)]
    rng = np.random.default_rng([seed, 3])
    models += [cycle_model(rng, f"trigger-{i}", sequence=i % 2 == 1,
                           trigger=("start", "delay", "stop")[i % 3])
               for i in range(trigger_models)]
    rng = np.random.default_rng([seed, 4])
    return models + [rate_model(rng, f"delay-{i}", delayed=True) for i in range(delay_models)]
