"""Reading a TOML scenario file into frozen specs (first pass: shapes, types and ranges).

The first pass walks the document section by section with `Node`s, so every refusal
carries its field path. Cross-references and whole-model rules (row sums, reachability,
model kind, attributes) are the second pass, in checks.py (and, for strategies, economics,
uncertainty and capacity, beside their readers).
"""
from __future__ import annotations

import math
import re
import tomllib
from dataclasses import replace
from pathlib import Path
from typing import Any, Mapping

from .checks import check_scenario, entry_uses, unknown_state
from .errors import ScenarioError
from .fields import (ANY, NON_NEGATIVE, POSITIVE, SHARE, TOLERANCE, UTILITY, VALUE_TABLE_AXES,
                     Node, Reading, closest, listing, show)
from .read_capacity import check_capacity, read_capacity, strategies_with_capacity
from .read_economics import ECONOMICS_KEYS, check_economics, read_economics
from .read_parameters import read_parameters, read_tables
from .options import named_by_option, with_options
from .read_population import read_population
from .read_sensitivity import SENSITIVITY_KEYS, check_sensitivity, read_sensitivity
from .read_strategies import check_strategies, read_strategies
from .read_transitions import read_events, read_start_effects, read_transitions
from .read_uncertainty import UNCERTAINTY_KEYS, check_uncertainty, read_uncertainty
from .rows import check_row_bounds, check_row_structure
from .toml_hints import plain, syntax_hint
from .spec import (DISCOUNTINGS, PROBABILITY_RULES, SEPARATE, OutcomesSpec, Scenario, SimulationSpec,
                   StartSpec, StateSpec, TimeSpec)

TOP_KEYS = ("title", "description", "provenance", "time", "start", "states", "transitions",
            "events", "parameters", "tables", "outcomes", "population", "simulation",
            "strategies", "economics", "uncertainty", "sensitivity",
            "arrivals", "resources", "replications")  # the last three: microsim.capacity
TIME_KEYS = ("unit", "cycle", "horizon", "lifetime_cap", "probability_rule", "years_per_unit")
START_KEYS = ("age", "shares", "effects")
STATE_KEYS = ("name", "label", "absorbing", "cost", "utility")
OUTCOMES_KEYS = ("discount_costs", "discount_effects", "correction", "discounting")
SIMULATION_KEYS = ("seed", "batch_size", "grid", "validation_patients")
CORRECTIONS = ("none", "half-cycle", "trapezoidal", "simpson")
LIFETIME = "lifetime"
DEFAULT_LIFETIME_CAP = 100.0
MAX_CYCLES = 1_000_000  # beyond this a run cannot hold its traces in memory
UNIT_WORD = re.compile(r"[A-Za-z]+")
TOML_POSITION = re.compile(r"\s*\(at (?:line (\d+), column (\d+)|end of document)\)\s*$")


def read_scenario(path: str | Path, options: Mapping[str, Any] | None = None) -> Scenario:
    """Read and check a scenario file; refuse bad input with a `ScenarioError`.
    `options` {key: value} override the keys of `microsim.scenario.options`."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as error:
        raise ScenarioError(str(path), f"cannot read the scenario file ({error.strerror})") \
            from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as error:
        raise ScenarioError(path.name, f"is not UTF-8 text (bad byte at offset {error.start})") \
            from None
    return parse_scenario(text, source=path, options=options)


def parse_scenario(text: str, source: str | Path | None = None,
                   options: Mapping[str, Any] | None = None) -> Scenario:
    """Check scenario text; `source` names it in errors and anchors relative file paths."""
    label = Path(source).name if source is not None else "scenario"
    data = load_toml(text, label)
    try:
        return scenario_from_data(with_options(data, options or {}), source)
    except ScenarioError as error:
        raise named_by_option(error, options or {}) from None


def load_toml(text: str, label: str) -> dict[str, Any]:
    """tomllib, with its syntax errors turned into `<file> line N: ...`; a byte-order mark
    at the start (as some editors save UTF-8) is no part of the text."""
    try:
        return tomllib.loads(text.removeprefix("\ufeff"))
    except tomllib.TOMLDecodeError as error:
        message = str(error)
        position = TOML_POSITION.search(message)
        detail = message[:position.start()] if position else message
        detail = plain(detail[:1].lower() + detail[1:])
        if position and position.group(1):
            line, column = int(position.group(1)), int(position.group(2))
            where, at = line, f"(column {column})"
        else:
            line = column = None
            where, at = max(1, len(text.splitlines())), "(at the end of the file)"
        hint = syntax_hint(detail, text, line, column)
        raise ScenarioError(f"{label} line {where}",
                            f"{detail} {at}" + (f"; {hint}" if hint else "")) from None
    except RecursionError:
        raise ScenarioError(label, "is nested too deeply to read") from None


def scenario_from_data(data: dict[str, Any], source: str | Path | None = None) -> Scenario:
    """Build and check a Scenario from an already-parsed TOML document."""
    reading = Reading()
    doc = Node(data, "", reading, TOP_KEYS)
    base = Path(source).parent if source is not None else Path.cwd()
    title = doc.text("title", nonempty=True)
    description = doc.text("description", "")
    provenance = doc.text("provenance", nonempty=True)
    time = read_time(doc.node("time", TIME_KEYS))
    parameters = read_parameters(doc.node("parameters", None, default=None))
    tables_node = doc.node("tables", None, default=None)
    for name in (tables_node.data if tables_node else ()):  # before any entry names one
        if name in parameters:
            raise ScenarioError(f"tables.{name}", f"{name!r} is also a parameter name; "
                                "parameters and tables share one set of names")
    tables = read_tables(tables_node, parameters)
    states = read_states(doc.nodes("states", None, required=True))
    draft = Scenario(
        title=title, description=description, provenance=provenance, time=time,
        states=states,
        start=read_start(doc.node("start", START_KEYS), [s.name for s in states]),
        transitions=read_transitions(doc.nodes("transitions", None, required=True), tables),
        parameters=parameters,
        tables=tables,
        events=read_events(doc.nodes("events", None), tables),
        outcomes=read_outcomes(doc.node("outcomes", OUTCOMES_KEYS, default=None)),
        population=read_population(doc.node("population", None, default=None), base,
                                   fixed_size=not doc.has("arrivals")),
        simulation=read_simulation(doc.node("simulation", SIMULATION_KEYS, default=None)),
        strategies=read_strategies(doc.nodes("strategies", None), tables, time, read_states),
        economics=read_economics(doc.node("economics", ECONOMICS_KEYS, default=None)),
        uncertainty=read_uncertainty(doc.node("uncertainty", UNCERTAINTY_KEYS, default=None)),
        sensitivity=read_sensitivity(doc.node("sensitivity", SENSITIVITY_KEYS, default=None)),
        source=Path(source) if source is not None else None,
    )
    capacity = read_capacity(doc, base, time)
    draft = replace(draft, capacity=capacity, strategies=strategies_with_capacity(
        doc.nodes("strategies", None), draft.strategies, capacity, base))
    found = check_scenario(draft, reading)
    found += check_strategies(draft, reading) + check_uncertainty(draft) + check_economics(draft)
    check_capacity(draft, reading)
    uses = reading.references + check_row_structure(draft)
    uses += entry_uses(draft, uses)  # a table's entries are used as the table is
    check_row_bounds(draft)  # the base case first, so its refusal names the rows themselves
    check_sensitivity(draft, uses)
    return replace(draft, warnings=tuple(found), uses=tuple(uses))


def read_time(node: Node) -> TimeSpec:
    unit = node.text("unit", nonempty=True)
    if not UNIT_WORD.fullmatch(unit):
        node.fail("unit", f"must be a single word such as 'years' or 'days', got {unit!r}")
    cycle = node.number("cycle", 1.0, role=POSITIVE)
    horizon = node.number_or("horizon", LIFETIME, POSITIVE, f"a number of {unit}")
    if horizon is None:
        cap = node.number("lifetime_cap", DEFAULT_LIFETIME_CAP, role=POSITIVE)
        whole_cycles(node, "lifetime_cap", cap, cycle,
                     "" if node.has("lifetime_cap") else " (the default lifetime_cap)")
    else:
        if node.has("lifetime_cap"):
            node.fail("lifetime_cap", f'is only used with horizon = "{LIFETIME}"')
        whole_cycles(node, "horizon", horizon, cycle)
        cap = DEFAULT_LIFETIME_CAP
    rule = node.text("probability_rule", SEPARATE, choices=PROBABILITY_RULES)
    return TimeSpec(unit=unit, cycle=cycle, horizon=horizon, lifetime_cap=cap,
                    probability_rule=rule, years_per_unit=years_per_unit(node, unit))


YEARS_PER_UNIT = {"year": 1.0, "month": 1 / 12, "week": 7 / 365.25, "day": 1 / 365.25,
                  "hour": 1 / (24 * 365.25), "minute": 1 / (60 * 24 * 365.25)}  # Julian years


def years_per_unit(node: Node, unit: str) -> float:
    """How many years one time unit is: life years and QALYs are counted in years and
    discount rates are per year whatever the unit, so an unknown unit must say."""
    known = YEARS_PER_UNIT.get(unit.lower().removesuffix("s"))
    if node.has("years_per_unit") or known is None:
        if not node.has("years_per_unit"):
            known_units = [f"{u}s" for u in YEARS_PER_UNIT]
            close = closest(unit, known_units)
            hint = f"; did you mean {close!r}?" if close else ""
            node.fail("unit", f"{unit!r} is not a unit microsim knows ({listing(known_units)}"
                              f"{hint}); give time.years_per_unit, the length of one unit in "
                              "years")
        return node.number("years_per_unit", role=POSITIVE)
    return known


def whole_cycles(node: Node, key: str, length: float, cycle: float, note: str = "") -> None:
    """Refuse a length that is not a whole number (>= 1) of cycles (1e-9 relative)."""
    n = length / cycle
    if not math.isfinite(n) or n > MAX_CYCLES:
        node.fail(key, f"{show(length)}{note} is {show(n)} cycles; at most {MAX_CYCLES} "
                       "cycles are supported (use a longer cycle)")
    if round(n) < 1 or abs(n - round(n)) > TOLERANCE * max(1.0, n):
        node.fail(key, f"{show(length)}{note} is not a whole multiple of the cycle length "
                       f"{show(cycle)}; give a whole number of cycles")


def read_states(nodes: list[Node]) -> tuple[StateSpec, ...]:
    states: list[StateSpec] = []
    for node in nodes:
        name = node.entry_name([s.name for s in states], "state", "states")
        node.only(STATE_KEYS)
        states.append(StateSpec(
            name=name, label=node.text("label", name, nonempty=True),
            absorbing=node.flag("absorbing", False),
            cost=node.ref("cost", ANY, 0.0, tables=VALUE_TABLE_AXES),
            utility=node.ref("utility", UTILITY, 0.0, tables=VALUE_TABLE_AXES)))
    return tuple(states)


def read_start(node: Node, state_names: list[str]) -> StartSpec:
    age = node.number("age", None, role=NON_NEGATIVE)
    shares_node = node.node("shares", None)
    given = {}
    for name in shares_node.data:
        if name not in state_names:
            shares_node.fail(name, unknown_state(name, state_names))
        given[name] = shares_node.number(name, role=SHARE)
    total = sum(given.values())
    if abs(total - 1.0) > TOLERANCE:
        node.fail("shares", f"shares sum to {show(total)}, not 1; states not listed start "
                            "with share 0")
    shares = {s: given.get(s, 0.0) for s in state_names}
    return StartSpec(shares=shares, age=age, effects=read_start_effects(node, shares))


def read_outcomes(node: Node | None) -> OutcomesSpec:
    if node is None:
        return OutcomesSpec()
    return OutcomesSpec(
        discount_costs=discount_rate(node, "discount_costs"),
        discount_effects=discount_rate(node, "discount_effects"),
        correction=node.text("correction", "trapezoidal", choices=CORRECTIONS),
        discounting=node.text("discounting", "annual", choices=DISCOUNTINGS))


def discount_rate(node: Node, key: str) -> float:
    """A rate of 1 (100%) a year or more is a percentage written as a fraction's slot."""
    rate = node.number(key, 0.0, role=NON_NEGATIVE)
    if rate >= 1:
        node.fail(key, f"{show(rate)} a year is {show(100 * rate)}%; discount rates are "
                       f"fractions: write {show(rate / 100)} for {show(rate)}%")
    return rate


def read_simulation(node: Node | None) -> SimulationSpec:
    if node is None:
        return SimulationSpec()
    defaults = SimulationSpec()
    return SimulationSpec(
        seed=node.whole("seed", defaults.seed, minimum=0, maximum=2**64 - 1),
        batch_size=node.whole("batch_size", defaults.batch_size, minimum=1),
        grid=node.number("grid", None, role=POSITIVE),
        validation_patients=node.whole("validation_patients", None, minimum=1))
