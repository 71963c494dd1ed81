"""Bands of time in which every cost and utility read from a table by age or by time holds
one value, for each patient row.

A table by attained age changes value at the ages a_k of its starts, which a patient who is
x at time 0 reaches at times a_k - x since the start; a table by time changes at its starts.
Each row's time in state, time on treatment and occurrences are split at these times (all
of the model's value tables at once, so one split serves them all), and the valuation reads
each band's own value (`microsim.results.outcomes`). Simulated histories and the analytic
cohort split the same way, so the comparison of the two still compares like with like.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from microsim.binding import BoundModel

AGE, TIME = "age", "time"


@dataclass(frozen=True)
class Bands:
    """Exposure split by band: band k of row b is [edges[b, k], edges[b, k + 1]) in time
    since the start (some bands may be empty); `age` is each row's age at time 0 (nan
    when the model knows none), for the tables by age."""
    edges: np.ndarray  # (B, K + 1)
    age: np.ndarray  # (B,)
    occupancy: np.ndarray  # (B, S, K, 3)
    on_treatment: np.ndarray  # (B, S, K, 3)
    occurrences: np.ndarray  # (B, R, K, 3)

    FIELDS = ("edges", "age", "occupancy", "on_treatment", "occurrences")

    @classmethod
    def empty(cls, rows: int, n_bands: int, n_states: int, n_risks: int) -> "Bands":
        """Room for `rows` patients, to be filled part by part (`put`)."""
        return cls(np.empty((rows, n_bands + 1)), np.empty(rows),
                   *(np.empty((rows, n, n_bands, 3)) for n in (n_states, n_states, n_risks)))

    def put(self, rows, part: "Bands") -> None:
        for f in self.FIELDS:
            getattr(self, f)[rows] = getattr(part, f)

    @classmethod
    def join(cls, parts: list["Bands"]) -> "Bands":
        return cls(*(np.concatenate([getattr(p, f) for p in parts]) for f in cls.FIELDS))

    def take(self, rows) -> "Bands":
        return Bands(*(getattr(self, f)[rows] for f in self.FIELDS))

    def clocks(self, by: str) -> np.ndarray:
        """(B, K) the middle of each band on a table's clock (age, or time since start):
        the value a table holds there is the band's, since no start of a value table falls
        inside a band."""
        middle = (self.edges[:, :-1] + self.edges[:, 1:]) / 2
        return middle + self.age[:, None] if by == AGE else middle


def value_starts(model: BoundModel, by: str) -> np.ndarray:
    """The distinct starts of the model's cost and utility tables by `by`."""
    starts = [s for t in model.value_tables if t.by == by for s in t.starts]
    return np.unique(np.asarray(starts, float))


def band_count(model: BoundModel) -> int | None:
    """How many bands `band_edges` gives each row (None: no cost or utility by age or time):
    one more than the starts of the tables by age and by time."""
    starts = len(value_starts(model, AGE)) + len(value_starts(model, TIME))
    return 1 + starts if starts else None


def band_edges(model: BoundModel, entry_age: np.ndarray | None, rows: int) -> np.ndarray | None:
    """(rows, K + 1) each row's band edges: 0, the starts of the tables by time and by age
    (as times since the start: an age less the row's age at time 0) within [0, end] in
    order, and the end; None when no cost or utility is read from a table by age or time."""
    ages, times = value_starts(model, AGE), value_starts(model, TIME)
    if not len(ages) and not len(times):
        return None
    if len(ages) and entry_age is None:
        raise ValueError("a cost or utility by age needs each patient's age at time 0")
    end = model.n_cycles * model.cycle
    inner = [np.broadcast_to(times, (rows, len(times)))]
    if len(ages):
        inner.append(ages[None, :] - np.asarray(entry_age, float)[:, None])
    inner = np.sort(np.clip(np.concatenate(inner, axis=1), 0.0, end), axis=1)
    return np.concatenate([np.zeros((rows, 1)), inner, np.full((rows, 1), end)], axis=1)


def band_of(edges: np.ndarray, times: np.ndarray) -> np.ndarray:
    """The band of each time: `times` (B, ...) of the rows of `edges` (B, K + 1); a time at
    an edge is in the band that starts there (a table's value holds from its start)."""
    inner = edges[:, 1:-1].reshape(edges.shape[0], *([1] * (times.ndim - 1)), edges.shape[1] - 2)
    return (times[..., None] >= inner).sum(axis=-1)


def entry_ages(entry_age: np.ndarray | None, rows: int) -> np.ndarray:
    return np.full(rows, np.nan) if entry_age is None else np.asarray(entry_age, float)
