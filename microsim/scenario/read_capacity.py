"""Reading [arrivals], [[resources]] and [replications], and the strategies' changes to them.

Capacity is where patients stop being independent: an open population arrives over time and
shares a limited number of units of each resource. The first pass reads the sections with
field paths; the second (`check_capacity`) checks them against the model: which state holds
a unit, where patients wait, and that waiting states are reached only by waiting, so that
where a resource never runs out the model is exactly the model without resources.
"""
from __future__ import annotations

import csv
import math
from dataclasses import replace
from pathlib import Path
from typing import Callable

from .checks import can_happen, population_kinds, unknown_attribute, unknown_state
from .errors import ScenarioError
from .fields import (MAX_PATIENTS, NON_NEGATIVE, POSITIVE, RATE, Node, Reading, Role, describe,
                     did_you_mean, listing, show)
from .spec import (ArrivalsSpec, CapacitySpec, PrioritySpec, ReplicationsSpec, ResourceSpec,
                   Scenario, StrategySpec, TimeSpec)

ARRIVALS_KEYS = ("rate", "file")
CHANGEABLE_KEYS = ("capacity", "cost", "priority", "queue_limit", "turned_away", "patience",
                   "leave_to", "wait_target")
RESOURCE_KEYS = ("name", "label", "state", "waiting") + CHANGEABLE_KEYS
PRIORITY_KEYS = ("attribute", "levels", "states", "preemptive")
REPLICATIONS_KEYS = ("count", "warm_up")
ESTIMATE = "estimate"
TIME_COLUMN = "time"
MAX_REPLICATIONS = 10_000
YES_NO_LEVELS = ("yes", "no")

CAPACITY = Role("a capacity", 0.0)
CAPACITY_COST = Role("a capacity cost", 0.0)


# -- first pass ------------------------------------------------------------------------------

def read_capacity(doc: Node, base: Path, time: TimeSpec) -> CapacitySpec | None:
    """The scenario's arrivals, resources and replications (None when it has neither
    arrivals nor resources: independent patients, as without this section)."""
    arrivals = read_arrivals(doc.node("arrivals", ARRIVALS_KEYS, default=None), base)
    resources = read_resources(doc.nodes("resources", None))
    replications = doc.node("replications", REPLICATIONS_KEYS, default=None)
    if arrivals is None and not resources:
        if replications is not None:
            replications.fail(None, "is only used with [arrivals] or [[resources]] (a service "
                                    "whose patients share capacity)")
        return None
    return CapacitySpec(resources, arrivals,
                        read_replications(replications, arrivals is not None, time))


def read_arrivals(node: Node | None, base: Path) -> ArrivalsSpec | None:
    if node is None:
        return None
    if node.one_of(ARRIVALS_KEYS) == "rate":
        return ArrivalsSpec(rate=node.ref("rate", RATE, tables=True))
    given = node.text("file", nonempty=True)
    path = base / given
    return ArrivalsSpec(file=path, times=read_arrival_times(path, given, node.at("file")))


def read_arrival_times(path: Path, given: str, where: str) -> tuple[float, ...]:
    """The `time` column of a CSV file, sorted: one arrival per row (blank lines skipped;
    row 1 is the first after the header)."""
    if path.suffix.lower() != ".csv":
        raise ScenarioError(where, f"must be a .csv file with a column {TIME_COLUMN!r}, got "
                                   f"{given!r}")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        problem = "is not UTF-8 text" if isinstance(error, UnicodeDecodeError) else \
            "no such file (a relative path is read from the folder of the scenario file)"
        raise ScenarioError(where, f"{path}: {problem}") from None
    rows = [row for row in csv.reader(text.splitlines()) if any(cell.strip() for cell in row)]
    header = [cell.strip() for cell in rows[0]] if rows else []
    if TIME_COLUMN not in header:
        raise ScenarioError(where, f"{path.name} has no column {TIME_COLUMN!r} (columns: "
                                   f"{listing(header)}); give one arrival time per row")
    column = header.index(TIME_COLUMN)
    times = []
    for number, row in enumerate(rows[1:], start=1):
        value = row[column].strip() if column < len(row) else ""
        try:
            x = float(value)
        except ValueError:
            x = math.nan
        if not math.isfinite(x) or x < 0:
            raise ScenarioError(where, f"{path.name} row {number}: {describe(value)} is not an "
                                       "arrival time; give a number of at least 0")
        times.append(x)
    if not times:
        raise ScenarioError(where, f"{path.name} has no arrival times (no rows after the header)")
    return tuple(sorted(times))


def read_resources(nodes: list[Node]) -> tuple[ResourceSpec, ...]:
    resources: list[ResourceSpec] = []
    for node in nodes:
        name = node.entry_name([r.name for r in resources], "resource", "resources")
        node.only(RESOURCE_KEYS)
        base = ResourceSpec(name=name, label=node.text("label", name, nonempty=True),
                            capacity=node.ref("capacity", CAPACITY, tables=True),
                            state=node.name("state"), waiting=node.names("waiting"))
        resources.append(changed_resource(node, base))
    return tuple(resources)


def changed_resource(node: Node, resource: ResourceSpec) -> ResourceSpec:
    """`resource` with the changeable keys `node` gives (a strategy's change, or the keys of
    [[resources]] beside the required ones)."""
    readers: dict[str, Callable[[], object]] = {
        "capacity": lambda: node.ref("capacity", CAPACITY, tables=True),
        "cost": lambda: node.ref("cost", CAPACITY_COST),
        "priority": lambda: read_priority(node.node("priority", PRIORITY_KEYS)),
        "queue_limit": lambda: node.whole("queue_limit", minimum=0, maximum=MAX_PATIENTS),
        "turned_away": lambda: node.name("turned_away"),
        "patience": lambda: node.number("patience", role=POSITIVE),
        "leave_to": lambda: node.name("leave_to"),
        "wait_target": lambda: node.number("wait_target", role=POSITIVE),
    }
    return replace(resource, **{key: read() for key, read in readers.items() if node.has(key)})


def read_priority(node: Node) -> PrioritySpec:
    preemptive = node.flag("preemptive", False)
    if node.one_of(("attribute", "states")) == "states":
        if node.has("levels"):
            node.fail("levels", "is only used with attribute; states lists the waiting states "
                                "in the order they are served")
        return PrioritySpec(states=node.names("states"), preemptive=preemptive)
    return PrioritySpec(attribute=node.name("attribute"), levels=node.texts("levels"),
                        preemptive=preemptive)


def read_replications(node: Node | None, open_population: bool, time: TimeSpec
                      ) -> ReplicationsSpec:
    """An open population's warm-up is estimated unless given; a closed cohort's is 0."""
    default_warm_up = None if open_population else 0.0
    if node is None:
        return ReplicationsSpec(warm_up=default_warm_up)
    count = node.whole("count", ReplicationsSpec.count, minimum=1, maximum=MAX_REPLICATIONS)
    if count == 1 and not open_population:
        node.fail("count", "is 1, but a closed cohort has no steady state to cut into batches; "
                           "give at least 2 replications for standard errors")
    warm_up = default_warm_up
    if node.has("warm_up"):
        warm_up = node.number_or("warm_up", ESTIMATE, NON_NEGATIVE, f"a number of {time.unit}")
    if warm_up is not None and warm_up >= time.end:
        node.fail("warm_up", f"{show(warm_up)} is at or beyond the end of the run "
                             f"({show(time.end)} {time.unit}); nothing would be left to measure")
    return ReplicationsSpec(count, warm_up)


def strategies_with_capacity(nodes: list[Node], strategies: tuple[StrategySpec, ...],
                             capacity: CapacitySpec | None, base: Path
                             ) -> tuple[StrategySpec, ...]:
    """Each strategy with the arrivals and resources it runs (`capacity` None where it
    changes none of them): [strategies.arrivals] replaces the arrivals, and
    [strategies.resources.<name>] changes keys of one resource."""
    changed = []
    for node, strategy in zip(nodes, strategies):
        node.path = f"strategies.{strategy.name}"
        changed.append(replace(strategy, capacity=strategy_capacity(node, capacity, base)))
    return tuple(changed)


def strategy_capacity(node: Node, capacity: CapacitySpec | None, base: Path
                      ) -> CapacitySpec | None:
    arrivals_node = node.node("arrivals", ARRIVALS_KEYS, default=None)
    resources_node = node.node("resources", None, default=None)
    if arrivals_node is None and resources_node is None:
        return None
    if capacity is None:
        node.fail("arrivals" if arrivals_node is not None else "resources",
                  "the scenario has no [arrivals] or [[resources]] for a strategy to change")
    arrivals = capacity.arrivals
    if arrivals_node is not None:
        if arrivals is None:
            arrivals_node.fail(None, "the scenario is a closed cohort (no [arrivals]); only the "
                                     "arrivals of an open population can be changed")
        arrivals = read_arrivals(arrivals_node, base)
    resources = list(capacity.resources)
    known = [r.name for r in resources]
    for name in resources_node.data if resources_node is not None else ():
        if name not in known:
            resources_node.fail(name, f"no resource named {name!r}{did_you_mean(name, known)}; "
                                      f"resources: {listing(known)}")
        i = known.index(name)
        resources[i] = changed_resource(resources_node.node(name, CHANGEABLE_KEYS), resources[i])
    return replace(capacity, arrivals=arrivals, resources=tuple(resources))


# -- second pass -----------------------------------------------------------------------------

def check_capacity(s: Scenario, reading: Reading) -> None:
    """Refuse arrivals and resources the model cannot run, for the model as written and for
    every strategy (its own changes and added transitions included)."""
    if s.capacity is None:
        return
    where = "arrivals" if s.capacity.arrivals is not None else "resources"
    if s.discrete:
        raise ScenarioError(where, "capacity runs in continuous time (patients wait for a unit "
                                   "between events), but this model uses per-cycle probabilities; "
                                   "give its transitions as rates or hazards")
    if s.capacity.arrivals is not None and s.time.horizon is None:
        raise ScenarioError("time.horizon", f'is "lifetime", but an open population ([arrivals]) '
                                            f"runs for a stated time; give a number of {s.time.unit}")
    paths = {t.where: f"transitions.{t.where}" for t in s.transitions}
    check_plan(s, s, s.capacity, "", paths, reading)
    for strategy in s.strategies:
        prefix = f"strategies.{strategy.name}"
        merged = s.with_added(strategy)
        added = {t.where: f"{prefix}.transitions.{t.where}" for t in strategy.transitions}
        check_plan(s, merged, strategy.capacity or s.capacity,
                   f"{prefix}." if strategy.capacity else "", {**paths, **added}, reading)


def check_plan(s: Scenario, model: Scenario, capacity: CapacitySpec, prefix: str,
               paths: dict[str, str], reading: Reading) -> None:
    """One set of arrivals and resources against one model (as written, or a strategy's)."""
    for table in s.tables.values():
        if table.attribute is not None and table.name in tables_read(model):
            raise ScenarioError(f"tables.{table.name}.attribute", "a table by level is not "
                                "available in a service with arrivals or resources; give the "
                                "levels' rates by effects of the attribute instead")
    for use in reading.references:
        table = s.tables.get(use.name)
        if use.table_axes is not None and table is not None and table.by is not None:
            raise ScenarioError(use.path, f"table {table.name!r} is by {table.by}; a cost or "
                                "a utility by age or time is not available in a service with "
                                "arrivals or resources (its patients enter at their own "
                                "times); give a number, or a table by level alone")
    if capacity.arrivals is not None and isinstance(capacity.arrivals.rate, str):
        table = s.tables.get(capacity.arrivals.rate)
        if table is not None and (table.by != "time" or table.attribute is not None):
            raise ScenarioError(f"{prefix}arrivals.rate", f"table {table.name!r} is by "
                                f"{table.axis_words}; arrivals over calendar time need a table by time")
    holders: dict[str, str] = {}  # state -> the first resource that names it
    waiters: dict[str, str] = {}
    for r in capacity.resources:
        holders.setdefault(r.state, r.name)
        for w in r.waiting:
            waiters.setdefault(w, r.name)
    for resource in capacity.resources:
        path = f"{prefix}resources.{resource.name}"
        check_capacity_value(s, resource.capacity, f"{path}.capacity")
        check_holding_state(model, resource, path, holders)
        check_waiting_states(model, resource, path, holders, waiters, paths)
        check_exits(model, resource, path, waiters, capacity)
        if resource.priority is not None:
            check_priority(s, reading, resource, f"{path}.priority")


def tables_read(model: Scenario) -> set:
    """The table names the model's transitions and events read."""
    used = set()
    for occurrence in (*model.transitions, *model.events):
        if isinstance(occurrence.probability, str):
            used.add(occurrence.probability)
        if occurrence.hazard is not None and occurrence.hazard.family == "table":
            used.add(occurrence.hazard.params["table"])
    return used


def check_capacity_value(s: Scenario, value, path: str) -> None:
    """A capacity is a whole number of units: at least 1, or a table by time of whole
    numbers (0 closes the resource for a period) that is somewhere at least 1."""
    if isinstance(value, float):
        if not value.is_integer() or value < 1:
            raise ScenarioError(path, f"must be a whole number of units, at least 1, got "
                                      f"{show(value)}")
        return
    if value in s.tables:
        table = s.tables[value]
        if table.by != "time" or table.attribute is not None:
            raise ScenarioError(path, f"table {value!r} is by {table.axis_words}; a capacity by period "
                                      "needs a table by time")
        for i, x in enumerate(table.values):
            if isinstance(x, str):
                raise ScenarioError(f"tables.{value}.values[{i}]", f"names the parameter {x!r}, "
                                    f"but the table is the capacity at {path}, a count of units "
                                    "that no analysis varies; give the whole number")
            if not x.is_integer():
                raise ScenarioError(f"tables.{value}.values[{i}]", f"{show(x)} is not a whole "
                                    f"number of units (the table is the capacity at {path})")
        if max(table.values) < 1:
            raise ScenarioError(f"tables.{value}.values", f"are all 0, so the resource at {path} "
                                "never has a unit; give at least one period a capacity of 1 or more")
        return
    parameter = s.parameters[value]
    if parameter.distribution is not None and parameter.distribution.family != "fixed":
        raise ScenarioError(f"parameters.{value}.distribution", f"a capacity (used at {path}) "
                            "is a count of units; give it without a distribution")
    check_capacity_value(s, parameter.value, f"parameters.{value}.value")


def check_holding_state(model: Scenario, resource: ResourceSpec, path: str,
                        holders: dict[str, str]) -> None:
    state = resource.state
    if state not in model.state_names:
        raise ScenarioError(f"{path}.state", unknown_state(state, model.state_names))
    if holders[state] != resource.name:
        raise ScenarioError(f"{path}.state", f"{state!r} already holds units of resource "
                            f"{holders[state]!r}; a state holds one resource")
    leaving = [t for t in model.transitions if t.source == state and can_happen(model, t)]
    if next(s for s in model.states if s.name == state).absorbing or not leaving:
        raise ScenarioError(f"{path}.state", f"patients never leave {state!r}, so its units are "
                            "never freed; give it a transition out (the end of service)")


def check_waiting_states(model: Scenario, resource: ResourceSpec, path: str,
                         holders: dict[str, str], waiters: dict[str, str],
                         paths: dict[str, str]) -> None:
    """Waiting states are reached only by waiting: no start share, no transition in from
    outside the queue, and no transition out to the held state (the resource admits)."""
    absorbing = {s.name for s in model.states if s.absorbing}
    for i, name in enumerate(resource.waiting):
        here = f"{path}.waiting[{i}]"
        if name not in model.state_names:
            raise ScenarioError(here, unknown_state(name, model.state_names))
        if name in holders or name in absorbing:
            why = "holds units of a resource" if name in holders else "is absorbing"
            raise ScenarioError(here, f"{name!r} {why}; a waiting state is one where patients "
                                      "wait for a unit and can still leave")
        if waiters[name] != resource.name:
            raise ScenarioError(here, f"{name!r} is already a waiting state of resource "
                                      f"{waiters[name]!r}; each resource has its own")
        if model.start.shares.get(name, 0.0) > 0:
            raise ScenarioError(f"start.shares.{name}", f"{name!r} is a waiting state of "
                                f"{resource.name!r}; patients wait only when no unit is free, "
                                "so nobody starts there")
    queue = set(resource.waiting)
    for t in model.transitions:
        if t.target in queue and t.source not in queue:
            raise ScenarioError(f"{paths[t.where]}.to", f"{t.target!r} is a waiting state of "
                                f"{resource.name!r}: patients enter it only when no unit is free "
                                f"as they would enter {resource.state!r}; send this transition to "
                                f"{resource.state!r} instead")
        if t.source in queue and t.target == resource.state:
            raise ScenarioError(paths[t.where], f"patients leave the waiting state {t.source!r} for "
                                f"{resource.state!r} when {resource.name!r} has a free unit; remove "
                                "this transition")


def check_exits(model: Scenario, resource: ResourceSpec, path: str, waiters: dict[str, str],
                capacity: CapacitySpec) -> None:
    """Turned away or out of patience, patients go somewhere that is not a queue; turned
    away to another resource's units, they may wait for them but not be turned away again
    (which could send them round in a circle)."""
    for key, partner, what in (("queue_limit", "turned_away", "where patients who find the "
                                "queue full go"),
                               ("patience", "leave_to", "where patients who wait that long go")):
        given, target = getattr(resource, key), getattr(resource, partner)
        if (given is None) != (target is None):
            missing, other = (partner, key) if target is None else (key, partner)
            raise ScenarioError(f"{path}.{missing}", f"is required with {other} ({partner}: "
                                                     f"{what})")
        if target is None:
            continue
        if target not in model.state_names:
            raise ScenarioError(f"{path}.{partner}", unknown_state(target, model.state_names))
        if target == resource.state or target in waiters:
            raise ScenarioError(f"{path}.{partner}", f"{target!r} is "
                                + ("the state that holds the unit" if target == resource.state
                                   else "a waiting state")
                                + "; send these patients to a state outside the queue")
        other = next((r for r in capacity.resources if r.state == target), None)
        if partner == "turned_away" and other is not None and other.queue_limit is not None:
            raise ScenarioError(f"{path}.{partner}", f"{target!r} holds units of "
                                f"{other.name!r}, whose queue is limited too, so patients could "
                                "be turned away again and again; send them where they can wait")


def check_priority(s: Scenario, reading: Reading, resource: ResourceSpec, path: str) -> None:
    priority = resource.priority
    if priority.states:
        expected, key, what = resource.waiting, "states", "waiting state"
    else:
        kinds = population_kinds(s, reading)
        name = priority.attribute
        if s.population is None or name not in kinds:
            raise ScenarioError(f"{path}.attribute", unknown_attribute(s, name, kinds))
        kind, levels = kinds[name]
        if kind not in ("categorical", "yesno"):
            raise ScenarioError(f"{path}.attribute", f"{name!r} is {describe_kind(kind)}; a "
                                "priority orders levels: give a categorical or yes/no attribute, "
                                "or bands of a number ([[population.derived]])")
        expected, key, what = (YES_NO_LEVELS if kind == "yesno" else levels), "levels", "level"
    given = getattr(priority, key)
    for i, value in enumerate(given):
        if value not in expected:
            raise ScenarioError(f"{path}.{key}[{i}]", f"{value!r} is not a {what} of "
                                f"{resource.name!r}{did_you_mean(value, expected)}; list "
                                f"{listing(repr(e) for e in expected)} in the order served")
    missing = [e for e in expected if e not in given]
    if missing:
        raise ScenarioError(f"{path}.{key}", f"leaves out {listing(repr(m) for m in missing)}; "
                            f"list every {what} in the order served")


def describe_kind(kind: str) -> str:
    return {"continuous": "a number", "column": "a column of the population file"}.get(kind, kind)
