"""Reading [[transitions]] and [[events]]: how often, on which clock, with which
covariate effects and memory, and what each occurrence costs."""
from __future__ import annotations

import math
from dataclasses import replace
from typing import Any, Mapping

from .fields import (AGE, ANY, HAZARD_RATIO, IDENTIFIER, MULTIPLIER, ODDS_RATIO, POSITIVE,
                     PROBABILITY, RATE, TIME_RATIO, VALUE_TABLE_AXES, Node, Reference,
                     did_you_mean, listing, show)
from .spec import Ref
from .spec import EffectSpec, EventSpec, HazardSpec, MemorySpec, TableSpec, TransitionSpec

SHARED_KEYS = ("probability", "rate", "hazard", "clock", "cost", "disutility", "effects",
               "memory")
TRANSITION_KEYS = ("from", "to", "name") + SHARED_KEYS
EVENT_KEYS = ("name", "states") + SHARED_KEYS
HAZARD_KEYS = {"constant": ("rate",), "weibull": ("shape", "scale"),
               "gompertz": ("rate", "shape"), "loglogistic": ("shape", "scale"),
               "lognormal": ("meanlog", "sdlog"), "generalised_gamma": ("mu", "sigma", "q"),
               "table": ("table",)}
HAZARD_ROLES = {("constant", "rate"): RATE, ("gompertz", "shape"): ANY,
                ("lognormal", "meanlog"): ANY, ("generalised_gamma", "mu"): ANY,
                ("generalised_gamma", "q"): ANY}  # others: > 0
CLOCKS = ("since_start", "since_entry", "age")
DEFAULT_CLOCK = "since_entry"
RATIO_KEYS = ("hazard_ratio", "coefficient", "time_ratio", "time_coefficient")
EFFECT_KEYS = ("attribute",) + RATIO_KEYS + ("centre", "level")
START_EFFECT_KEYS = ("state", "attribute", "odds_ratio", "coefficient", "centre", "level")
MEMORY_KEYS = ("after", "multipliers", "within", "multiplier")
MAX_COEFFICIENT = 700.0  # exp(700) is close to the largest float


def read_transitions(nodes: list[Node], tables: Mapping[str, TableSpec]
                     ) -> tuple[TransitionSpec, ...]:
    pairs = [(node.data.get("from"), node.data.get("to")) for node in nodes]
    transitions = []
    for node, ends in zip(nodes, pairs):
        parallel = pairs.count(ends) > 1
        if all(isinstance(end, str) and IDENTIFIER.fullmatch(end) for end in ends):
            name = node.data.get("name")
            named = parallel and isinstance(name, str) and IDENTIFIER.fullmatch(name)
            node.path = f"transitions.{ends[0]}->{ends[1]}" + (f"[{name}]" if named else "")
        node.only(TRANSITION_KEYS)
        source, target = node.name("from"), node.name("to")
        transitions.append(TransitionSpec(
            source=source, target=target, name=node.name("name", f"{source}->{target}"),
            parallel=parallel, **read_occurrence(node, tables, remainder=True)))
    return tuple(transitions)


def read_events(nodes: list[Node], tables: Mapping[str, TableSpec]) -> tuple[EventSpec, ...]:
    events = []
    for node in nodes:
        name = node.name("name")
        node.path = f"events.{name}"
        node.only(EVENT_KEYS)
        by_state = read_by_state(node)
        if by_state is None:
            events.append(EventSpec(name=name, states=node.names("states"),
                                    **read_occurrence(node, tables, remainder=False)))
            continue
        kind, values = by_state
        first = dict(node.data, **{kind: next(iter(values.values()))})
        fields = read_occurrence(Node(first, node.path, node.reading), tables, remainder=False)
        references = node.reading.references  # the first value is recorded by its state
        references[:] = [r for r in references if r.path != node.at(kind)]
        events.append(EventSpec(name=name, states=tuple(values), by_state=values, **fields))
    return tuple(events)


def read_by_state(node: Node) -> tuple[str, dict[str, Ref]] | None:
    """An event's `probability = { state = value }` or `rate = { ... }`: its value in each
    state it can happen in (numbers or parameters); None for one value everywhere."""
    kind = next((k for k in ("probability", "rate") if isinstance(node.data.get(k), dict)), None)
    if kind is None:
        return None
    if node.has("states"):
        node.fail("states", f"the states are the keys of {kind} = {{ state = value }}; "
                            "remove states, or give one value for all of them")
    by = Node(node.data[kind], node.at(kind), node.reading)
    if not by.data:
        by.fail(None, "must name at least one state, like { mild = 0.1, severe = 0.3 }")
    role = PROBABILITY if kind == "probability" else RATE
    return kind, {by._name(state, state): by.ref(state, role) for state in by.data}


def read_occurrence(node: Node, tables: Mapping[str, TableSpec], remainder: bool
                    ) -> dict[str, Any]:
    """The fields transitions and events share."""
    kind = node.one_of(("probability", "rate", "hazard"))
    probability, hazard, table = None, None, None
    if kind == "probability":
        probability = node.ref("probability", PROBABILITY, tables=True, remainder=remainder)
        table = tables.get(probability) if isinstance(probability, str) else None
        if node.has("clock"):
            node.fail("clock", "is only used with rate or hazard; a per-cycle probability "
                               "follows its table's `by`, if it reads a table")
    elif kind == "rate":
        rate = node.ref("rate", RATE, tables=True)
        table = tables.get(rate) if isinstance(rate, str) else None
        hazard = HazardSpec("table", {"table": rate}) if table else \
            HazardSpec("constant", {"rate": rate})
    else:
        hazard = read_hazard(node.node("hazard", None), tables)
        table = tables[hazard.params["table"]] if hazard.family == "table" else None
    stiff = ("a per-cycle probability has no clock to stretch" if kind == "probability" else
             "a table of rates steps at fixed clock values" if table is not None else None)
    effects = tuple(read_effect(n, stiff) for n in node.nodes("effects", EFFECT_KEYS))
    refuse_repeated_effects(node, effects)
    return dict(
        probability=probability, hazard=hazard, clock=read_clock(node, table),
        effects=effects,
        memory=tuple(read_memory(n) for n in node.nodes("memory", MEMORY_KEYS)),
        cost=node.ref("cost", ANY, 0.0, tables=VALUE_TABLE_AXES),
        disutility=node.ref("disutility", ANY, 0.0, tables=VALUE_TABLE_AXES))


def read_hazard(node: Node, tables: Mapping[str, TableSpec]) -> HazardSpec:
    family = node.text("family", choices=tuple(HAZARD_KEYS))
    keys = HAZARD_KEYS[family]
    node.only(("family",) + keys, f" for a {family} hazard")
    if family == "table":
        name = node.name("table")
        if name not in tables:
            node.fail("table", f"no table named {name!r}{did_you_mean(name, tables)}; "
                               f"tables: {listing(tables)}")
        node.reading.references.append(Reference(name, node.at("table"), RATE, True))
        return HazardSpec("table", {"table": name})
    return HazardSpec(family, {k: node.ref(k, HAZARD_ROLES.get((family, k), POSITIVE))
                               for k in keys})


def read_clock(node: Node, table: TableSpec | None) -> str:
    """A table fixes the clock through its `by`; otherwise (no table, or a table by level
    alone) the file's clock or the default."""
    if table is None or table.by is None:
        return node.text("clock", DEFAULT_CLOCK, choices=CLOCKS)
    if node.has("clock") and node.text("clock", choices=CLOCKS) != table.clock:
        node.fail("clock", f"table {table.name!r} is by {table.by}, which fixes the clock to "
                           f'"{table.clock}"; remove clock or set it to "{table.clock}"')
    return table.clock


def refuse_repeated_effects(node: Node, effects: tuple[EffectSpec, ...]) -> None:
    seen: set[tuple] = set()
    for i, effect in enumerate(effects):
        if (effect.attribute, effect.level, effect.state) in seen:
            node.fail(f"effects[{i}]", f"a second effect of {effect.attribute!r}"
                      + (f" at level {effect.level!r}" if effect.level else "")
                      + (f" on starting in {effect.state!r}" if effect.state else "")
                      + "; give each attribute (and level) one effect")
        seen.add((effect.attribute, effect.level, effect.state))


def read_start_effects(node: Node, shares: Mapping[str, float]) -> tuple[EffectSpec, ...]:
    """[[start.effects]]: odds ratios of starting in a state by attribute."""
    effects = []
    for effect_node in node.nodes("effects", START_EFFECT_KEYS):
        state = effect_node.name("state")
        if state not in shares:
            effect_node.fail("state", f"no state named {state!r}{did_you_mean(state, shares)}; "
                                      f"states: {listing(shares)}")
        if shares[state] == 0:
            effect_node.fail("state", f"{state!r} has start share 0, which no odds ratio can "
                                      "raise; give it a share in start.shares (its share at "
                                      "the reference attributes)")
        effects.append(replace(read_effect(effect_node, start=True), state=state))
    effects = tuple(effects)
    refuse_repeated_effects(node, effects)
    return effects


def read_effect(node: Node, stiff: str | None = None, start: bool = False) -> EffectSpec:
    """One effect: a hazard ratio (proportional hazards) or a time ratio (accelerated failure
    time), or the log of either; of a start effect, an odds ratio or its log. `stiff` says
    why the occurrence cannot take a time ratio."""
    attribute = node.name("attribute")
    key = node.one_of(("odds_ratio", "coefficient") if start else RATIO_KEYS)
    on_time = key.startswith("time")
    if on_time and stiff is not None:
        node.fail(key, f"a time ratio stretches the clock of a rate or parametric hazard, and "
                       f"{stiff}; give a hazard_ratio (or coefficient) instead")
    if on_time and attribute == AGE:
        node.fail(key, "attained age moves as the clock runs, and a time ratio that changes "
                       "with the clock it stretches is not defined here; give age a "
                       "hazard_ratio, or put the time ratio on an attribute that stays fixed "
                       "(such as the age at entry under another name)")
    what = "odds ratio" if start else "time ratio" if on_time else "hazard ratio"
    if key in ("hazard_ratio", "time_ratio", "odds_ratio"):
        role = ODDS_RATIO if start else TIME_RATIO if on_time else HAZARD_RATIO
        ratio, is_coefficient = node.ref(key, role), False
    else:
        coefficient = node.ref(key, ANY)
        if isinstance(coefficient, str):
            ratio, is_coefficient = coefficient, True
        elif abs(coefficient) > MAX_COEFFICIENT:
            node.fail(key, f"{show(coefficient)} is too large: the {what} "
                           f"exp({show(coefficient)}) cannot be represented; give a log-"
                           f"{what} between -{show(MAX_COEFFICIENT)} and {show(MAX_COEFFICIENT)}")
        else:
            ratio, is_coefficient = math.exp(coefficient), False
    level = node.text("level", None, nonempty=True)
    if level is not None and node.has("centre"):
        node.fail("level", f"cannot be combined with centre: level is for a categorical or "
                           f"yes/no attribute (the {what} applies to patients at that level), "
                           f"centre for a continuous one; keep the one that fits {attribute!r}")
    return EffectSpec(attribute=attribute, hazard_ratio=ratio, level=level,
                      centre=node.number("centre", 0.0), coefficient=is_coefficient,
                      time_ratio=on_time)


def read_memory(node: Node) -> MemorySpec:
    after = node.text("after", nonempty=True)
    timed = [k for k in ("within", "multiplier") if node.has(k)]
    if node.has("multipliers"):
        if timed:
            node.fail(timed[0], "cannot be combined with multipliers; give either multipliers "
                                "(by number of earlier occurrences) or within with multiplier")
        return MemorySpec(after=after, multipliers=node.refs("multipliers", MULTIPLIER))
    if not timed:
        node.fail(None, "needs multipliers = [...] (by number of earlier occurrences) or "
                        "within = ... with multiplier = ... (since the last occurrence)")
    return MemorySpec(after=after, within=node.number("within", role=POSITIVE),
                      multiplier=node.ref("multiplier", MULTIPLIER))
