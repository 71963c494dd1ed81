"""Costs, QALYs and life years from time in state and counts of occurrences.

Simulated patients and the analytic cohort both reduce to the same two arrays — expected
(or realised) time in each state and number of each risk's occurrences, undiscounted and
discounted at the cost and the effect rates — so one function values both, and any gap
between them comes from the model, never from the arithmetic. A cost or utility read from a
table by level or age is each patient's own: the exposure carries each row's weights on the
levels and, for tables by age or time, the same arrays split by bands of time.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import pandas as pd

from microsim.binding import BoundModel
from microsim.results.bands import Bands, band_count
from microsim.scenario.spec import TableSpec

MEASURES = ("life_years", "qalys", "costs", "qalys_discounted", "costs_discounted")
WEIGHTINGS = ("undiscounted", "costs", "effects")


@dataclass(frozen=True)
class Exposure:
    """What a patient (row) was exposed to, expected or realised; the last axis indexes
    WEIGHTINGS (no discount, discounted at the cost rate, at the effect rate).

    occupancy (B, S, 3): time in each state; on_treatment (B, S, 3): the part of it spent
    on a strategy's treatment; occurrences (B, R, 3): number of each risk's occurrences.
    For costs and utilities read from tables: `levels` (table name -> (B, levels)), each
    row's weight on each level of a table by level, and `bands`, the three split by the
    bands of time of the tables by age or time (`microsim.results.bands`)."""
    occupancy: np.ndarray
    occurrences: np.ndarray
    on_treatment: np.ndarray
    levels: Mapping[str, np.ndarray] = field(default_factory=dict)
    bands: Bands | None = None

    FIELDS = ("occupancy", "occurrences", "on_treatment")

    @classmethod
    def empty(cls, rows: int, model: BoundModel) -> "Exposure":
        """Room for `rows` patients of `model`, to be filled part by part (`put`), with
        the levels and bands its costs' and utilities' tables need."""
        S, R = model.n_states, len(model.risks)
        levels = {t.name: np.empty((rows, len(t.levels)))
                  for t in model.value_tables if t.attribute is not None}
        K = band_count(model)
        return cls(np.empty((rows, S, 3)), np.empty((rows, R, 3)), np.empty((rows, S, 3)),
                   levels, None if K is None else Bands.empty(rows, K, S, R))

    def put(self, rows, part: "Exposure") -> None:
        for f in self.FIELDS:
            getattr(self, f)[rows] = getattr(part, f)
        for name, weights in part.levels.items():
            self.levels[name][rows] = weights
        if part.bands is not None:
            self.bands.put(rows, part.bands)

    @classmethod
    def join(cls, parts: list["Exposure"]) -> "Exposure":
        first = parts[0]
        return cls(*(np.concatenate([getattr(p, f) for p in parts]) for f in cls.FIELDS),
                   {name: np.concatenate([p.levels[name] for p in parts])
                    for name in first.levels},
                   None if first.bands is None else Bands.join([p.bands for p in parts]))

    def take(self, rows) -> "Exposure":
        return Exposure(*(getattr(self, f)[rows] for f in self.FIELDS),
                        {name: w[rows] for name, w in self.levels.items()},
                        None if self.bands is None else self.bands.take(rows))


def outcome_values(model: BoundModel, exposure: Exposure) -> dict[str, np.ndarray]:
    """Per row: life years (time in non-absorbing states, undiscounted), QALYs and costs,
    undiscounted and discounted, including a strategy's costs and utility on treatment.
    Life years and QALYs are in years whatever the time unit (a utility is a weight per
    year lived); costs are the model's, per time unit in a state and once per occurrence,
    each patient's own where a table gives them."""
    alive = (~model.absorbing).astype(float)
    risk_cost = np.array([number(r.cost) for r in model.risks])
    risk_loss = np.array([number(r.disutility) for r in model.risks])
    t = model.treatment
    extra_cost = np.zeros(model.n_states) if t is None else t.extra_cost
    extra_utility = np.zeros(model.n_states) if t is None else t.extra_utility
    occ, on, count = exposure.occupancy, exposure.on_treatment, exposure.occurrences
    from_tables = table_values(model, exposure)

    years = model.years_per_unit

    def qalys(w):
        return years * (occ[:, :, w] @ model.state_utility + on[:, :, w] @ extra_utility
                        + from_tables["utility"][:, w]) \
            - count[:, :, w] @ risk_loss - from_tables["disutility"][:, w]

    def costs(w):
        return occ[:, :, w] @ model.state_cost + on[:, :, w] @ extra_cost \
            + count[:, :, w] @ risk_cost + from_tables["cost"][:, w]

    return {"life_years": years * (occ[:, :, 0] @ alive), "qalys": qalys(0), "costs": costs(0),
            "qalys_discounted": qalys(2), "costs_discounted": costs(1)}


def unvalued(model: BoundModel) -> set[str]:
    """The measures ("qalys", "costs") the model gives no value anywhere: no state, time
    on treatment, occurrence or table of theirs is other than 0, so every patient's is 0
    whatever happens to them (certain, not a chance without variation)."""
    t = model.treatment
    tables = {v.measure for v in model.state_tables} | (
        set() if t is None else {v.measure for v in t.tables})
    risks = [(r.cost, r.disutility) for r in model.risks]
    zero = {"qalys": not np.any(model.state_utility) and (t is None or not np.any(
                t.extra_utility)) and all(isinstance(loss, float | int) and loss == 0
                                          for _, loss in risks)
                     and not tables & {"utility", "disutility"},
            "costs": not np.any(model.state_cost) and (t is None or not np.any(t.extra_cost))
                     and all(isinstance(cost, float | int) and cost == 0 for cost, _ in risks)
                     and "cost" not in tables}
    return {measure for measure, none in zero.items() if none}


def number(value: float | TableSpec) -> float:
    """A cost or utility's number: 0 for one a table gives (`table_values` adds it)."""
    return 0.0 if isinstance(value, TableSpec) else value


def table_values(model: BoundModel, exposure: Exposure) -> dict[str, np.ndarray]:
    """(B, 3) per measure (cost, utility per time unit, disutility): what the costs and
    utilities read from tables add to each row, at the three weightings."""
    B = exposure.occupancy.shape[0]
    total = {m: np.zeros((B, 3)) for m in ("cost", "utility", "disutility")}
    bands = exposure.bands
    terms = [(v.measure, v.table, "occupancy", v.state) for v in model.state_tables]
    terms += [(v.measure, v.table, "on_treatment", v.state)
              for v in (() if model.treatment is None else model.treatment.tables)]
    terms += [(measure, value, "occurrences", r) for r, risk in enumerate(model.risks)
              for measure, value in (("cost", risk.cost), ("disutility", risk.disutility))
              if isinstance(value, TableSpec)]
    for measure, table, kind, i in terms:
        values = row_values(table, exposure)  # (B, K): K = 1 for a table by level alone
        if table.by is None:
            total[measure] += getattr(exposure, kind)[:, i] * values
        else:
            total[measure] += np.einsum("bkw,bk->bw", getattr(bands, kind)[:, i], values)
    return total


def row_values(table: TableSpec, exposure: Exposure) -> np.ndarray:
    """(B, K) each row's value of a cost's or utility's table in each band of the
    exposure (one column for a table by level alone): the level-weighted mean of the
    levels' values (a patient's own level's; the average patient's shares)."""
    rows = np.asarray(table.rows, float)  # (levels, table bands)
    B = exposure.occupancy.shape[0]
    if table.attribute is None:
        weights = np.ones((B, 1))
    elif table.name in exposure.levels:
        weights = exposure.levels[table.name]
    else:
        raise ValueError(f"the exposure has no levels of table {table.name!r}; build it "
                         "with the patients' multipliers")
    if table.by is None:
        return weights @ rows[:, :1]
    if exposure.bands is None:
        raise ValueError(f"table {table.name!r} is by {table.by}, but the exposure is not "
                         "split by bands of time")
    clocks = exposure.bands.clocks(table.by)
    index = np.clip(np.searchsorted(np.asarray(table.starts), clocks, side="right") - 1, 0, None)
    return np.einsum("bl,lbk->bk", weights, rows[:, index])


def occurrence_counts(model: BoundModel, exposure: Exposure) -> dict[str, np.ndarray]:
    """Expected (or realised) number of each named transition or event, per row."""
    counts: dict[str, np.ndarray] = {}
    for r, risk in enumerate(model.risks):
        if risk.target == risk.source:
            continue  # staying put is no occurrence
        counts[risk.name] = counts.get(risk.name, 0.0) + exposure.occurrences[:, r, 0]
    return counts


def outcome_table(model: BoundModel, exposure: Exposure) -> pd.DataFrame:
    """Tidy table of the mean outcomes over rows: measure, value."""
    values = outcome_values(model, exposure)
    rows = [(m, float(np.mean(values[m]))) for m in MEASURES]
    rows += [(f"count:{name}", float(np.mean(v)))
             for name, v in occurrence_counts(model, exposure).items()]
    return pd.DataFrame(rows, columns=["measure", "value"])
