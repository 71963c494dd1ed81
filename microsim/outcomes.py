"""Costs, QALYs and life years from time in state and counts of occurrences.

Simulated patients and the analytic cohort both reduce to the same two arrays — expected
(or realised) time in each state and number of each risk's occurrences, undiscounted and
discounted at the cost and the effect rates — so one function values both, and any gap
between them comes from the model, never from the arithmetic.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from microsim.binding import BoundModel

MEASURES = ("life_years", "qalys", "costs", "qalys_discounted", "costs_discounted")


def outcome_values(model: BoundModel, occupancy: np.ndarray,
                   occurrences: np.ndarray) -> dict[str, np.ndarray]:
    """Per row: life years (time in non-absorbing states, undiscounted), QALYs and costs,
    undiscounted and discounted. occupancy (B, S, 3), occurrences (B, R, 3)."""
    alive = (~model.absorbing).astype(float)
    risk_cost = np.array([r.cost for r in model.risks])
    risk_loss = np.array([r.disutility for r in model.risks])

    def qalys(w):
        return occupancy[:, :, w] @ model.state_utility - occurrences[:, :, w] @ risk_loss

    def costs(w):
        return occupancy[:, :, w] @ model.state_cost + occurrences[:, :, w] @ risk_cost

    return {"life_years": occupancy[:, :, 0] @ alive, "qalys": qalys(0), "costs": costs(0),
            "qalys_discounted": qalys(2), "costs_discounted": costs(1)}


def occurrence_counts(model: BoundModel, occurrences: np.ndarray) -> dict[str, np.ndarray]:
    """Expected (or realised) number of each named transition or event, per row."""
    counts: dict[str, np.ndarray] = {}
    for r, risk in enumerate(model.risks):
        if risk.target == risk.source:
            continue  # staying put is no occurrence
        counts[risk.name] = counts.get(risk.name, 0.0) + occurrences[:, r, 0]
    return counts


def outcome_table(model: BoundModel, occupancy: np.ndarray, occurrences: np.ndarray) -> pd.DataFrame:
    """Tidy table of the mean outcomes over rows: measure, value."""
    values = outcome_values(model, occupancy, occurrences)
    rows = [(m, float(np.mean(values[m]))) for m in MEASURES]
    rows += [(f"count:{name}", float(np.mean(v)))
             for name, v in occurrence_counts(model, occurrences).items()]
    return pd.DataFrame(rows, columns=["measure", "value"])
