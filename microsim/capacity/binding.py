"""Binding a scenario's arrivals and resources: specs -> the numbers the capacity engine reads.

Like `microsim.binding` for the model itself: a strategy's changed capacity, priority rule or
arrival rate is a new binding of the same specs, never a new code path.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import numpy as np

from microsim.binding import BoundModel, bind, table_hazard
from microsim.hazards import ConstantHazard, HazardFamily
from microsim.scenario.spec import ArrivalsSpec, Ref, ResourceSpec, Scenario


@dataclass(frozen=True)
class Capacity:
    """Units available from starts[k] (calendar time) until the next start."""
    starts: tuple[float, ...]
    units: tuple[int, ...]

    @property
    def most(self) -> int:
        return max(self.units)

    @property
    def constant(self) -> bool:
        return len(set(self.units)) == 1

    def integral(self, lo: float, hi: float) -> float:
        """Unit-time units available over [lo, hi)."""
        edges = np.append(self.starts, np.inf)
        overlap = np.clip(np.minimum(edges[1:], hi) - np.maximum(edges[:-1], lo), 0.0, None)
        return float(np.dot(overlap, self.units))


@dataclass(frozen=True)
class BoundResource:
    """A resource in numbers: states by index, capacity by period, the priority rule."""
    name: str
    label: str
    state: int  # patients in it hold one unit each
    waiting: tuple[int, ...]  # waiting begins in waiting[0]
    capacity: Capacity
    cost: float  # per unit of capacity per time unit
    priority_attribute: str | None
    priority_levels: tuple[str, ...]  # served in this order (yes/no: "yes", "no")
    priority_states: tuple[int, ...]  # waiting states, served in this order
    preemptive: bool
    queue_limit: int | None
    turned_away: int | None
    patience: float | None
    leave_to: int | None
    wait_target: float | None

    @property
    def first_come(self) -> bool:
        return self.priority_attribute is None and not self.priority_states


@dataclass(frozen=True)
class BoundArrivals:
    """Poisson arrivals with a cumulative rate (`hazard`, constant or by period), or the
    arrival times of a file."""
    hazard: HazardFamily | None
    times: np.ndarray | None

    @property
    def constant_rate(self) -> float | None:
        return self.hazard.rate if isinstance(self.hazard, ConstantHazard) else None


@dataclass(frozen=True)
class CapacityModel:
    """What one strategy's service runs: the bound model, its resources and arrivals."""
    model: BoundModel
    resources: tuple[BoundResource, ...]
    arrivals: BoundArrivals | None  # None: a closed cohort, everyone at time 0
    end: float  # calendar length of the run

    def holder(self, state: int) -> int | None:
        """The resource whose units patients in `state` hold, if any."""
        return next((k for k, r in enumerate(self.resources) if r.state == state), None)

    def queue_of(self, state: int) -> int | None:
        """The resource a patient in `state` waits for, if any."""
        return next((k for k, r in enumerate(self.resources) if state in r.waiting), None)

    def without_resources(self) -> "CapacityModel":
        """The same service with no limit on any resource: nobody ever waits."""
        return CapacityModel(self.model, (), self.arrivals, self.end)


def bind_capacity(scenario: Scenario, strategy: str | None = None,
                  values: Mapping[str, float] | None = None) -> CapacityModel:
    """The capacity model of one strategy (None: the scenario as written)."""
    model = bind(scenario, values, strategy=strategy)
    spec = scenario.capacity
    if strategy is not None and scenario.strategy(strategy).capacity is not None:
        spec = scenario.strategy(strategy).capacity
    bound = model.scenario  # its tables in numbers
    return CapacityModel(model, tuple(bind_resource(r, model, bound) for r in spec.resources),
                         bind_arrivals(spec.arrivals, model, bound), scenario.time.end)


def number(model: BoundModel, ref: Ref) -> float:
    return float(model.values[ref]) if isinstance(ref, str) else float(ref)


def bind_resource(spec: ResourceSpec, model: BoundModel, scenario: Scenario) -> BoundResource:
    index = {name: i for i, name in enumerate(model.states)}
    if isinstance(spec.capacity, str) and spec.capacity in scenario.tables:
        table = scenario.tables[spec.capacity]
        capacity = Capacity((0.0,) + table.starts[1:] if table.starts[0] > 0 else table.starts,
                            tuple(int(v) for v in table.values))
    else:
        capacity = Capacity((0.0,), (int(number(model, spec.capacity)),))
    priority = spec.priority
    levels = priority.levels if priority is not None else ()
    states = tuple(index[s] for s in priority.states) if priority is not None else ()
    return BoundResource(
        name=spec.name, label=spec.label, state=index[spec.state],
        waiting=tuple(index[w] for w in spec.waiting), capacity=capacity,
        cost=number(model, spec.cost),
        priority_attribute=None if priority is None else priority.attribute,
        priority_levels=levels, priority_states=states,
        preemptive=priority is not None and priority.preemptive,
        queue_limit=spec.queue_limit,
        turned_away=None if spec.turned_away is None else index[spec.turned_away],
        patience=spec.patience,
        leave_to=None if spec.leave_to is None else index[spec.leave_to],
        wait_target=spec.wait_target)


def bind_arrivals(spec: ArrivalsSpec | None, model: BoundModel, scenario: Scenario
                  ) -> BoundArrivals | None:
    if spec is None:
        return None
    if spec.rate is None:
        return BoundArrivals(None, np.asarray(spec.times, float))
    if isinstance(spec.rate, str) and spec.rate in scenario.tables:
        return BoundArrivals(table_hazard(scenario.tables[spec.rate]), None)
    return BoundArrivals(ConstantHazard(number(model, spec.rate)), None)
