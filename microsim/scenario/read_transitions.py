"""Reading [[transitions]] and [[events]]: how often, on which clock, with which
covariate effects and memory, and what each occurrence costs."""
from __future__ import annotations

import math
from typing import Any, Mapping

from .fields import (ANY, HAZARD_RATIO, IDENTIFIER, MULTIPLIER, POSITIVE, PROBABILITY, RATE,
                     Node, Reference, did_you_mean, listing, show)
from .spec import EffectSpec, EventSpec, HazardSpec, MemorySpec, TableSpec, TransitionSpec

SHARED_KEYS = ("probability", "rate", "hazard", "clock", "cost", "disutility", "effects",
               "memory")
TRANSITION_KEYS = ("from", "to", "name") + SHARED_KEYS
EVENT_KEYS = ("name", "states") + SHARED_KEYS
HAZARD_KEYS = {"constant": ("rate",), "weibull": ("shape", "scale"),
               "gompertz": ("rate", "shape"), "loglogistic": ("shape", "scale"),
               "table": ("table",)}
HAZARD_ROLES = {("constant", "rate"): RATE, ("gompertz", "shape"): ANY}  # others: > 0
CLOCKS = ("since_start", "since_entry", "age")
DEFAULT_CLOCK = "since_entry"
EFFECT_KEYS = ("attribute", "hazard_ratio", "coefficient", "centre", "level")
MEMORY_KEYS = ("after", "multipliers", "within", "multiplier")
MAX_COEFFICIENT = 700.0  # exp(700) is close to the largest float


def read_transitions(nodes: list[Node], tables: Mapping[str, TableSpec]
                     ) -> tuple[TransitionSpec, ...]:
    transitions = []
    for node in nodes:
        ends = (node.data.get("from"), node.data.get("to"))
        if all(isinstance(end, str) and IDENTIFIER.fullmatch(end) for end in ends):
            node.path = f"transitions.{ends[0]}->{ends[1]}"
        node.only(TRANSITION_KEYS)
        source, target = node.name("from"), node.name("to")
        transitions.append(TransitionSpec(
            source=source, target=target, name=node.name("name", f"{source}->{target}"),
            **read_occurrence(node, tables, remainder=True)))
    return tuple(transitions)


def read_events(nodes: list[Node], tables: Mapping[str, TableSpec]) -> tuple[EventSpec, ...]:
    events = []
    for node in nodes:
        name = node.name("name")
        node.path = f"events.{name}"
        node.only(EVENT_KEYS)
        events.append(EventSpec(name=name, states=node.names("states"),
                                **read_occurrence(node, tables, remainder=False)))
    return tuple(events)


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
    effects = tuple(read_effect(n) for n in node.nodes("effects", EFFECT_KEYS))
    seen: set[tuple[str, str | None]] = set()
    for i, effect in enumerate(effects):
        if (effect.attribute, effect.level) in seen:
            node.fail(f"effects[{i}]", f"a second effect of {effect.attribute!r}"
                      + (f" at level {effect.level!r}" if effect.level else "")
                      + "; give each attribute (and level) one effect")
        seen.add((effect.attribute, effect.level))
    return dict(
        probability=probability, hazard=hazard, clock=read_clock(node, table),
        effects=effects,
        memory=tuple(read_memory(n) for n in node.nodes("memory", MEMORY_KEYS)),
        cost=node.ref("cost", ANY, 0.0), disutility=node.ref("disutility", ANY, 0.0))


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


def read_effect(node: Node) -> EffectSpec:
    attribute = node.name("attribute")
    if node.one_of(("hazard_ratio", "coefficient")) == "hazard_ratio":
        ratio, is_coefficient = node.ref("hazard_ratio", HAZARD_RATIO), False
    else:
        coefficient = node.ref("coefficient", ANY)
        if isinstance(coefficient, str):
            ratio, is_coefficient = coefficient, True
        elif abs(coefficient) > MAX_COEFFICIENT:
            node.fail("coefficient", f"{show(coefficient)} is too large: the hazard ratio "
                                     f"exp({show(coefficient)}) cannot be represented; "
                                     f"give a log-hazard between -{show(MAX_COEFFICIENT)} "
                                     f"and {show(MAX_COEFFICIENT)}")
        else:
            ratio, is_coefficient = math.exp(coefficient), False
    level = node.text("level", None, nonempty=True)
    if level is not None and node.has("centre"):
        node.fail("centre", "is only used with continuous attributes; with level the hazard "
                            "ratio applies to patients at that level")
    return EffectSpec(attribute=attribute, hazard_ratio=ratio, level=level,
                      centre=node.number("centre", 0.0), coefficient=is_coefficient)


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
