"""The measures a one-way sensitivity analysis can vary: a strategy's discounted costs,
QALYs or net monetary benefit, on their own or against the comparator.

Kept apart from `one_way` (and free of heavy imports) so the command line can list the
choices in its help without loading the engines.
"""
from __future__ import annotations

import numpy as np

MEASURES = {  # name: what it is, in the report's words
    "incremental_nmb": "incremental net monetary benefit",
    "incremental_qalys": "incremental QALYs (discounted)",
    "incremental_costs": "incremental costs (discounted)",
    "nmb": "net monetary benefit",
    "qalys": "QALYs (discounted)",
    "costs": "costs (discounted)",
}


def incremental(measure: str) -> bool:
    return measure.startswith("incremental_")


def per_patient(measure: str, costs: np.ndarray, qalys: np.ndarray,
                threshold: float) -> np.ndarray:
    """One strategy's per-patient value of a measure (the increment is taken by the caller):
    net monetary benefit is threshold x QALYs - costs (common practice)."""
    kind = measure.removeprefix("incremental_")
    return {"nmb": threshold * qalys - costs, "qalys": qalys, "costs": costs}[kind]
