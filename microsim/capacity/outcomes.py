"""Costs, QALYs and life years of a service over a window of calendar time, capacity included.

A service's patients come and go, so its outcomes are what accrues inside the window
[lo, hi): each patient's time in each state there (from the histories, on the calendar), the
one-off costs and QALY losses of what happens there, the strategy's treatment costs while on
treatment, and the cost of every unit of capacity, used or not. Discounting runs from the
start of the observation (the end of the warm-up), with the scenario's rates. The valuation
is `microsim.results.outcomes.outcome_values`, as for every other simulation.
"""
from __future__ import annotations

import numpy as np

from microsim.capacity.binding import CapacityModel
from microsim.capacity.engine import ServiceRun
from microsim.results.aggregate import discount_rates, next_times, sojourn_integrals
from microsim.results.outcomes import Exposure, outcome_values

MEASURES = ("costs_discounted", "qalys_discounted", "life_years", "costs", "qalys",
            "capacity_costs_discounted", "patient_costs_discounted")


def clipped(model, start: np.ndarray, stop: np.ndarray, lo: float, hi: float, origin: float
            ) -> np.ndarray:
    """(n, 3) integrals of 1 and of the two discount factors over [start, stop) within
    [lo, hi), with time counted from `origin`."""
    return sojourn_integrals(model, np.clip(start, lo, hi) - origin,
                             np.clip(stop, lo, hi) - origin)


def window_exposure(run: ServiceRun, cm: CapacityModel, lo: float, hi: float, origin: float
                    ) -> Exposure:
    """What each patient of the run was exposed to within [lo, hi)."""
    model, h = cm.model, run.histories
    shift = run.arrival[h.patient]
    start, stop = h.time + shift, next_times(h, np.inf) + shift
    occupancy = np.zeros((h.n_patients, model.n_states, 3))
    np.add.at(occupancy, (h.patient, h.target), clipped(model, start, stop, lo, hi, origin))
    on = np.zeros_like(occupancy)
    window = run.mult.window
    if window is not None:
        on_from = np.maximum(start, window.on[h.patient] + shift)
        on_to = np.minimum(stop, window.off[h.patient] + shift)
        np.add.at(on, (h.patient, h.target), clipped(model, on_from, on_to, lo, hi, origin))
    counted = (h.risk >= 0) & (start >= lo) & (start < hi)
    occurrences = np.zeros((h.n_patients, len(model.risks), 3))
    weights = np.exp(-np.outer(start[counted] - origin, discount_rates(model)))
    np.add.at(occurrences, (h.patient[counted], h.risk[counted]), weights)
    return Exposure(occupancy, occurrences, on, run.mult.levels)


def capacity_cost(cm: CapacityModel, lo: float, hi: float, origin: float) -> tuple[float, float]:
    """Undiscounted and discounted cost of every resource's units over [lo, hi)."""
    total = np.zeros(3)
    for resource in cm.resources:
        starts = np.asarray(resource.capacity.starts)
        stops = np.append(starts[1:], np.inf)
        units = np.asarray(resource.capacity.units, float)
        total += resource.cost * (units @ clipped(cm.model, starts, stops, lo, hi, origin))
    return float(total[0]), float(total[1])


def window_outcomes(run: ServiceRun, cm: CapacityModel, lo: float, hi: float, origin: float
                    ) -> dict[str, float]:
    """Totals of MEASURES over [lo, hi): the patients' and the capacity's."""
    patients = {m: float(v.sum()) for m, v in
                outcome_values(cm.model, window_exposure(run, cm, lo, hi, origin)).items()}
    capacity, capacity_discounted = capacity_cost(cm, lo, hi, origin)
    return {"costs_discounted": patients["costs_discounted"] + capacity_discounted,
            "qalys_discounted": patients["qalys_discounted"],
            "life_years": patients["life_years"],
            "costs": patients["costs"] + capacity,
            "qalys": patients["qalys"],
            "capacity_costs_discounted": capacity_discounted,
            "patient_costs_discounted": patients["costs_discounted"]}
