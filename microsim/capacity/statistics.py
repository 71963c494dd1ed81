"""What a resource did over a window of calendar time: waits, queue length, use, losses.

A visit is one time a patient needed a unit; its wait runs from asking to admission. The
statistics of a window take the visits that asked in it (whose waits may end after it;
waits still running when the run ends are left out of means and quantiles, and counted
as over the target only once they have passed it) and the time averages of the queue length
and of the units in use over it. Groups of windows (replications, or batches of one long
run) give means with standard errors and Student-t intervals (common practice; e.g. Law
2015, "Simulation Modeling and Analysis", 5th ed., ch. 9, from memory).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from microsim.capacity.binding import BoundResource
from microsim.capacity.engine import LEFT, SERVED, TURNED, WAITING, ResourceLog

LITTLE_SHARE = 0.9  # of each window, for Little's law: the joiners' times end by the run's end

QUEUE_MEASURES = {  # measure: what it is
    "needing_per_time": "patients needing a unit, per time unit",
    "admitted_per_time": "patients admitted, per time unit",
    "waited": "share of admitted patients who waited at all",
    "mean_wait": "mean wait of admitted patients",
    "wait_median": "median wait of admitted patients",
    "wait_90th": "90th percentile of the wait of admitted patients",
    "over_target": "share waiting longer than the target",
    "turned_away": "share turned away (queue full)",
    "left_queue": "share who left the queue before admission",
    "mean_queue": "mean number waiting",
    "mean_in_use": "mean units in use",
    "utilisation": "units in use / units available",
    "little_gap": "mean number waiting - joining rate x mean time in the queue (Little: 0), "
                  "over the first nine tenths of the window",
}


def area(starts: np.ndarray, ends: np.ndarray, points) -> np.ndarray:
    """The integral from 0 to x of N(t) = #{i: starts_i <= t < ends_i}, at each point x:
    sum over starts below x of (x - start), less the same over ends."""
    points = np.asarray(points, float)

    def swept(edges):
        edges = np.sort(edges[np.isfinite(edges)])
        below = np.searchsorted(edges, points, side="right")
        before = np.concatenate([[0.0], np.cumsum(edges)])[below]
        return below * points - before

    return swept(np.asarray(starts, float)) - swept(np.asarray(ends, float))


def count_at(starts: np.ndarray, ends: np.ndarray, points) -> np.ndarray:
    """N(x) = #{i: starts_i <= x < ends_i} at each point."""
    return (np.searchsorted(np.sort(starts), points, side="right")
            - np.searchsorted(np.sort(ends), points, side="right"))


def window_measures(log: ResourceLog, resource: BoundResource, lo: float, hi: float,
                    end: float) -> dict[str, float]:
    """Every QUEUE_MEASURES figure of one resource over [lo, hi) of a run that ends at `end`."""
    span = hi - lo
    asked = (log.asked >= lo) & (log.asked < hi)
    turned = asked & (log.outcome == TURNED)
    entered = asked & ~turned
    served = asked & (log.outcome == SERVED)
    wait = log.ended - log.asked
    waits = wait[served]
    # differences of sums: round-off can leave -1e-19 where the truth is 0
    queue = max(float(np.diff(area(log.asked, log.ended, [lo, hi]))[0]), 0.0) / span
    in_use = max(float(np.diff(area(log.held_from, log.held_to, [lo, hi]))[0]), 0.0)
    target = resource.wait_target
    known = entered & ((log.outcome != WAITING) | (end - log.asked > (target or 0.0)))

    def share(part, whole) -> float:
        return float(part.sum() / whole.sum()) if whole.any() else np.nan

    def quantile(q) -> float:
        return float(np.quantile(waits, q)) if waits.size else np.nan

    return {
        "needing_per_time": asked.sum() / span,
        "admitted_per_time": served.sum() / span,
        "waited": share(served & (wait > 0), served),
        "mean_wait": float(waits.mean()) if waits.size else np.nan,
        "wait_median": quantile(0.5),
        "wait_90th": quantile(0.9),
        "over_target": np.nan if target is None else share(known & (wait > target), known),
        "turned_away": share(turned, asked),
        "left_queue": share(entered & (log.outcome == LEFT), entered),
        "mean_queue": queue,
        "mean_in_use": in_use / span,
        "utilisation": in_use / resource.capacity.integral(lo, hi),
        "little_gap": little_gap(log, lo, lo + LITTLE_SHARE * span, end),
    }


def little_gap(log: ResourceLog, lo: float, hi: float, end: float) -> float:
    """Mean number waiting over [lo, hi) less (patients joining the queue per time unit) x
    (their mean time in it), which Little's law (1961) says is 0 in the long run. The
    joiners' whole times count, also after hi (in a steady state that balances the time of
    earlier joiners inside the window), so the window stops short of the end of the run
    (LITTLE_SHARE), where times still running would be cut off; any still running at the
    end count up to it."""
    joined = (log.asked >= lo) & (log.asked < hi) & (log.outcome != TURNED)
    time_in_queue = np.minimum(log.ended, end) - log.asked
    queue = max(float(np.diff(area(log.asked, log.ended, [lo, hi]))[0]), 0.0)
    return (queue - float(time_in_queue[joined].sum())) / (hi - lo)


def interval(values) -> tuple[float, float, float, float, int]:
    """Mean, standard error and 95% Student-t interval over the finite group values."""
    x = np.asarray(values, float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return np.nan, np.nan, np.nan, np.nan, 0
    mean = float(x.mean())
    if x.size < 2:
        return mean, np.nan, np.nan, np.nan, 1
    se = float(x.std(ddof=1) / np.sqrt(x.size))
    half = float(stats.t.ppf(0.975, x.size - 1)) * se
    return mean, se, mean - half, mean + half, int(x.size)


def summarise(groups: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """Tidy per-group values (keys..., group, measure, value) -> mean, se, lower, upper,
    groups, by keys and measure."""
    rows = [(*key, *interval(part.value))
            for key, part in groups.groupby(keys + ["measure"], sort=False)]
    return pd.DataFrame(rows, columns=keys + ["measure", "mean", "se", "lower", "upper",
                                              "groups"])


def over_time(logs: list[ResourceLog], resource: BoundResource, grid: np.ndarray
              ) -> pd.DataFrame:
    """Queue length and units in use at each grid time, averaged over replications."""
    queue = np.mean([count_at(log.asked, log.ended, grid) for log in logs], axis=0)
    in_use = np.mean([count_at(log.held_from, log.held_to, grid) for log in logs], axis=0)
    edges = np.asarray(resource.capacity.starts)
    units = np.asarray(resource.capacity.units)[np.searchsorted(edges, grid, side="right") - 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        use = np.where(units > 0, in_use / units, np.nan)
    return pd.DataFrame({"time": grid, "queue_length": queue, "in_use": in_use,
                         "capacity": units, "utilisation": use})


def interval_means(logs: list[ResourceLog], grid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Time-average queue length and units in use over each grid interval, averaged over
    replications: the series a warm-up is estimated from."""
    step = np.diff(grid)
    queue = np.mean([np.diff(area(log.asked, log.ended, grid)) for log in logs], axis=0)
    in_use = np.mean([np.diff(area(log.held_from, log.held_to, grid)) for log in logs], axis=0)
    return queue / step, in_use / step
