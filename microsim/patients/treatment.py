"""Who a strategy treats, and when: eligibility, uptake and treatment windows per patient.

Eligibility is structured data (conditions on attributes at entry), never evaluated code.
Uptake and early discontinuation are draws of the patient's own streams, shared by every
strategy (purposes "uptake" and "discontinuation"): a patient who takes up one treatment
with 60% uptake also takes up another with 80%, and stops early alike — common random
numbers for who is treated as well as for what happens to them.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from microsim.binding import BoundModel
from microsim.patients.multipliers import Multipliers, Window, cohort_multipliers, multipliers
from microsim import streams
from microsim.patients.population import PATIENT
from microsim.scenario.errors import ScenarioError
from microsim.scenario.spec import ConditionSpec, EligibilitySpec

UPTAKE_PURPOSE = "uptake"
DISCONTINUATION_PURPOSE = "discontinuation"  # shared too: the same patients stop early


def condition_holds(condition: ConditionSpec, patients: pd.DataFrame) -> np.ndarray:
    column = patients[condition.attribute]
    value = condition.value
    match condition.test:
        case "above":
            return (column > value).to_numpy()
        case "at_least":
            return (column >= value).to_numpy()
        case "below":
            return (column < value).to_numpy()
        case "at_most":
            return (column <= value).to_numpy()
        case "equals":
            if isinstance(value, bool) or (isinstance(value, (int, float))
                                           and pd.api.types.is_numeric_dtype(column)):
                return (column == value).to_numpy()
            return (column.astype(str) == str(value)).to_numpy()
        case "one_of":
            return column.astype(str).isin([str(v) for v in value]).to_numpy()
    raise ValueError(f"unknown condition test {condition.test!r}")


def eligible(spec: EligibilitySpec | None, patients: pd.DataFrame) -> np.ndarray:
    """Patients who meet every `all` condition and, when `any` is given, one of those."""
    ok = np.ones(len(patients), dtype=bool)
    if spec is None:
        return ok
    for condition in spec.all:
        ok &= condition_holds(condition, patients)
    if spec.any:
        ok &= np.logical_or.reduce([condition_holds(c, patients) for c in spec.any])
    return ok


def treatment_window(model: BoundModel, patients: pd.DataFrame, seed: int) -> Window | None:
    """Each patient's time on treatment under the model's strategy: from the start time
    to the stop time or an earlier discontinuation (exponential at the given rate), for
    eligible patients whose uptake draw falls below the uptake share."""
    t = model.treatment
    if t is None:
        return None
    ids = patients[PATIENT].to_numpy()
    treated = eligible(t.eligible, patients)
    treated &= streams.uniforms(seed, ids, UPTAKE_PURPOSE) < t.uptake
    off = np.full(len(ids), t.stop)
    if t.discontinuation > 0:
        u = streams.uniforms(seed, ids, DISCONTINUATION_PURPOSE)
        off = np.minimum(off, t.start - np.log(u) / t.discontinuation)
    on = np.where(treated, t.start, np.inf)
    return Window(on, np.where(treated, off, np.inf), t.on_factor, t.off_factor)


def patient_multipliers(model: BoundModel, patients: pd.DataFrame, seed: int) -> Multipliers:
    """Covariate multipliers for these patients, with the strategy's treatment windows."""
    has_attributes = len(patients.columns) > 1
    mult = multipliers(model, patients) if has_attributes else cohort_multipliers(model).repeated(len(patients))
    window = treatment_window(model, patients, seed)
    return mult if window is None else replace(mult, window=window)


def uniform_multipliers(model: BoundModel) -> Multipliers:
    """The uniform cohort of a bound model: mean covariates and, under a strategy that
    treats everyone alike (no eligibility, full uptake, no discontinuation), its window.
    Any other strategy treats some patients and not others, which no single cohort row
    can show; that is refused rather than answered wrongly."""
    mult = cohort_multipliers(model)
    t = model.treatment
    if t is None:
        return mult
    if t.eligible is not None or t.uptake < 1 or t.discontinuation > 0:
        raise ScenarioError(f"strategies.{t.strategy}",
                            "treats only some patients (eligibility, uptake or "
                            "discontinuation), so it has no single cohort trace; simulate it "
                            "with `microsim run` or `microsim validate --strategy`")
    window = Window(np.array([t.start]), np.array([t.stop]), t.on_factor, t.off_factor)
    return replace(mult, window=window)
