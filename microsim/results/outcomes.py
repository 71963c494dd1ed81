"""Costs, QALYs and life years from time in state and counts of occurrences.

Simulated patients and the analytic cohort both reduce to the same two arrays — expected
(or realised) time in each state and number of each risk's occurrences, undiscounted and
discounted at the cost and the effect rates — so one function values both, and any gap
between them comes from the model, never from the arithmetic.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from microsim.binding import BoundModel

MEASURES = ("life_years", "qalys", "costs", "qalys_discounted", "costs_discounted")
WEIGHTINGS = ("undiscounted", "costs", "effects")


@dataclass(frozen=True)
class Exposure:
    """What a patient (row) was exposed to, expected or realised; the last axis indexes
    WEIGHTINGS (no discount, discounted at the cost rate, at the effect rate).

    occupancy (B, S, 3): time in each state; on_treatment (B, S, 3): the part of it spent
    on a strategy's treatment; occurrences (B, R, 3): number of each risk's occurrences."""
    occupancy: np.ndarray
    occurrences: np.ndarray
    on_treatment: np.ndarray

    FIELDS = ("occupancy", "occurrences", "on_treatment")

    @classmethod
    def empty(cls, rows: int, n_states: int, n_risks: int) -> "Exposure":
        """Room for `rows` patients, to be filled part by part (`put`)."""
        return cls(np.empty((rows, n_states, 3)), np.empty((rows, n_risks, 3)),
                   np.empty((rows, n_states, 3)))

    def put(self, rows, part: "Exposure") -> None:
        for f in self.FIELDS:
            getattr(self, f)[rows] = getattr(part, f)

    @classmethod
    def join(cls, parts: list["Exposure"]) -> "Exposure":
        return cls(*(np.concatenate([getattr(p, f) for p in parts]) for f in cls.FIELDS))

    def take(self, rows) -> "Exposure":
        return Exposure(self.occupancy[rows], self.occurrences[rows], self.on_treatment[rows])

    def mean(self) -> "Exposure":
        return Exposure(*(getattr(self, f).mean(axis=0, keepdims=True) for f in self.FIELDS))


def outcome_values(model: BoundModel, exposure: Exposure) -> dict[str, np.ndarray]:
    """Per row: life years (time in non-absorbing states, undiscounted), QALYs and costs,
    undiscounted and discounted, including a strategy's costs and utility on treatment.
    Life years and QALYs are in years whatever the time unit (a utility is a weight per
    year lived); costs are the model's, per time unit in a state and once per occurrence."""
    alive = (~model.absorbing).astype(float)
    risk_cost = np.array([r.cost for r in model.risks])
    risk_loss = np.array([r.disutility for r in model.risks])
    t = model.treatment
    extra_cost = np.zeros(model.n_states) if t is None else t.extra_cost
    extra_utility = np.zeros(model.n_states) if t is None else t.extra_utility
    occ, on, count = exposure.occupancy, exposure.on_treatment, exposure.occurrences

    years = model.years_per_unit

    def qalys(w):
        return years * (occ[:, :, w] @ model.state_utility + on[:, :, w] @ extra_utility) \
            - count[:, :, w] @ risk_loss

    def costs(w):
        return occ[:, :, w] @ model.state_cost + on[:, :, w] @ extra_cost \
            + count[:, :, w] @ risk_cost

    return {"life_years": years * (occ[:, :, 0] @ alive), "qalys": qalys(0), "costs": costs(0),
            "qalys_discounted": qalys(2), "costs_discounted": costs(1)}


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
