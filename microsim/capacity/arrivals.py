"""Who arrives when: patient ids of a replication and their arrival times.

Replication r's patients have ids r * REPLICATION_STRIDE + k (k = 0, 1, ...: the arrival
number), so every draw of a patient stays a function of (seed, patient id, purpose,
occurrence) and replications share nothing. Poisson arrivals with cumulative rate Lambda
come by inversion (Cinlar 1975, "Introduction to Stochastic Processes", section 4.7, from
memory): the k-th arrives at Lambda^-1(E_0 + ... + E_k), with E_j the unit exponential of
arrival j's own draw (purpose "arrival"); so arrival k is the same patient whatever the
rate, and a strategy that changes the rate moves the same patients in time (common random
numbers). A rate by period is a piecewise-constant Lambda.
"""
from __future__ import annotations

import math

import numpy as np

from microsim import streams
from microsim.capacity.binding import BoundArrivals

ARRIVAL_PURPOSE = "arrival"
REPLICATION_STRIDE = 2**40  # ids per replication: more patients than any run holds


def first_id(replication: int) -> int:
    return replication * REPLICATION_STRIDE


def arrival_times(arrivals: BoundArrivals, seed: int, replication: int, end: float,
                  limit: int | None = None) -> np.ndarray:
    """Calendar arrival times before `end` (at most `limit` of them), in order."""
    if arrivals.times is not None:
        times = arrivals.times[arrivals.times < end]
        return times[:limit]
    hazard, first = arrivals.hazard, first_id(replication)
    expected = hazard.cumulative_hazard(end)
    chunk = max(64, int(expected + 6 * math.sqrt(expected) + 64))
    found, total = [], 0.0
    while True:
        n = sum(map(len, found))
        if limit is not None and n >= limit:
            break
        e = -np.log(streams.uniforms(seed, np.arange(first + n, first + n + chunk),
                                     ARRIVAL_PURPOSE))
        cumulative = np.cumsum(np.concatenate([[total], e]))[1:]  # one running sum
        total = float(cumulative[-1])
        times = hazard.inverse_cumulative_hazard_array(cumulative)
        inside = times < end
        found.append(times[inside])
        if not inside.all():
            break
    times = np.concatenate(found) if found else np.empty(0)
    return times[:limit]
