"""SimPy resources for a health service: priority by class, then by time of joining the queue;
pre-emption only by a strictly higher class; capacity that changes by period.

Built on SimPy's own PriorityResource (whose queue is sorted by each request's `key`, ties in
request order) with two small changes: a `Ticket` keeps the time its patient joined the queue
when it is renewed (a waiting patient whose class changes keeps its place among equals), and
pre-emption compares classes only, so a patient never displaces one of its own class.
A capacity below the most units is held back by `keep_capacity`: tickets of a class above
every patient's, which take units as they come free and give them back when the period ends
(units in use are never taken from patients).
"""
from __future__ import annotations

import simpy
from simpy.resources.resource import Request

from microsim.capacity.binding import Capacity

HELD_BACK = -1  # the class of units held back from patients: above every patient's (0, 1, ...)


class Ticket(Request):
    """A request for one unit, served by (class, time joined the queue), then request order."""

    def __init__(self, resource: "SharedResource", priority: int, joined: float):
        self.priority = priority
        self.key = (priority, joined)
        super().__init__(resource)


class SharedResource(simpy.PriorityResource):
    """Units shared by patients; with `preemptive`, a patient's ticket of a higher class takes
    the unit of the lowest-class patient in service (the latest to join among equals); units
    held back for a lower capacity never take one."""

    def __init__(self, env: simpy.Environment, units: int, preemptive: bool = False):
        super().__init__(env, units)
        self.preemptive = preemptive

    def _do_put(self, event: Ticket) -> None:
        if self.preemptive and event.priority != HELD_BACK and len(self.users) >= self.capacity:
            lowest = max(self.users, key=lambda ticket: ticket.key)
            if lowest.priority > event.priority:
                self.users.remove(lowest)
                lowest.proc.interrupt(self)
        super()._do_put(event)


def give_back(ticket: Ticket) -> None:
    """Return a unit, or withdraw a request that has not been granted."""
    if ticket.triggered:
        ticket.resource.release(ticket)
    else:
        ticket.cancel()


def keep_capacity(env: simpy.Environment, resource: SharedResource, capacity: Capacity):
    """A process holding back `resource.capacity - capacity(t)` units in each period."""
    held: list[Ticket] = []
    for start, units in zip(capacity.starts, capacity.units):
        if start > env.now:
            yield env.timeout(start - env.now)
        while len(held) > resource.capacity - units:
            give_back(held.pop())
        while len(held) < resource.capacity - units:
            held.append(Ticket(resource, HELD_BACK, env.now))
