"""The warm-up: the start of each run, before the service settles, that statistics leave out.

A run starts empty, which a service in its steady state never is; figures that include
the start are biased. The warm-up is either stated in the scenario or estimated by MSER-5,
the marginal standard error rule applied to batch means of five observations (White 1997,
"An effective truncation heuristic for bias reduction in simulation output", Simulation
69:323-334; White, Cobb & Spratt 2000, "A comparison of five steady-state truncation
heuristics for simulation", Proceedings of the 2000 Winter Simulation Conference, 755-760;
from memory): of the batch means Z_1..Z_m, drop the first d that minimise

    MSER(d) = sum_{j > d} (Z_j - mean(Z_{d+1..m}))^2 / (m - d)^2,

searching d up to m / 2 (common practice: a minimum later than that says the run never
settled). The series are the time-average queue length and units in use of each resource
over the report grid's intervals, averaged over replications; the warm-up is the largest
truncation point over every series and strategy, so all strategies share one window.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

BATCH = 5
RULE = "MSER-5 (White 1997; White, Cobb & Spratt 2000)"


def mser_truncation(series: np.ndarray, batch: int = BATCH) -> tuple[int, bool]:
    """The number of leading observations MSER drops from `series`, and whether the minimum
    is at the end of the search (the first half): a sign that the series never settled."""
    m = len(series) // batch
    if m < 2:
        return 0, False
    z = np.asarray(series[:m * batch], float).reshape(m, batch).mean(axis=1)
    tail_sum = np.cumsum(z[::-1])[::-1]
    tail_squares = np.cumsum((z * z)[::-1])[::-1]
    kept = m - np.arange(m)
    spread = np.maximum(tail_squares - tail_sum ** 2 / kept, 0.0)
    search = m // 2 + 1
    scores = spread[:search] / kept[:search] ** 2
    flat = scores.max() - scores.min() <= 1e-12 * max(scores.max(), 1e-300)
    d = 0 if flat else int(np.argmin(scores))
    return batch * d, d == search - 1 and not flat


@dataclass(frozen=True)
class WarmUp:
    length: float  # time units left out at the start of every run
    rule: str  # "stated in the scenario" or RULE
    note: str | None = None  # why the estimate may not be trusted


def estimate_warm_up(series: dict[str, np.ndarray], grid: np.ndarray) -> WarmUp:
    """The largest MSER-5 truncation time over named series on the grid's intervals."""
    if len(grid) - 1 < 2 * BATCH:
        return WarmUp(0.0, RULE, f"{RULE} needs at least {2 * BATCH} report-grid intervals and "
                                 f"the run has {len(grid) - 1}; set a finer simulation.grid or "
                                 "state replications.warm_up")
    length, unsettled = 0.0, []
    for name, values in series.items():
        cut, at_limit = mser_truncation(values)
        length = max(length, float(grid[cut]))
        if at_limit:
            unsettled.append(name)
    note = None if not unsettled else (
        f"{RULE} found no settled level in the first half of the run for "
        f"{', '.join(unsettled)}: the service may not reach a steady state within the horizon "
        "(a queue that keeps growing, or too short a run)")
    return WarmUp(length, RULE, note)
