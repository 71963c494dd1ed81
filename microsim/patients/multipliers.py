"""Proportional-hazards multipliers and time ratios of each risk for each patient.

Every risk's multiplier for a patient factorises as exp(log_static + age_slope * t):
a fixed part from the patient's attributes, and a part that moves with time because
attained age = age at entry + time since start (Cox 1972, "Regression models and
life-tables"). Effects given as time ratios (accelerated failure time) make a fixed time
ratio a = exp(log_time_scale) per patient and risk, by which the risk's clock is divided:
h(t) = m(t) h0(t / a) / a (`microsim.hazards.time_scaled`). For a constant rate that is the
hazard ratio 1 / a, and it is kept as one. Engines and the analytic cohort read the same
arrays, so both apply exactly the same model.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import partial
from typing import Callable

import numpy as np
import pandas as pd

from microsim.binding import BoundModel
from microsim.hazards import HazardFamily, TimeScaledHazard
from microsim.patients.population import check_population_file, expected_covariate

AGE = "age"


@dataclass(frozen=True)
class Window:
    """A treatment window per patient: while on <= t < off the risks' multipliers are
    scaled by on_factor, otherwise by off_factor (0 for risks that exist only on
    treatment). Untreated patients have an empty window (on = off = inf)."""
    on: np.ndarray  # (patients,)
    off: np.ndarray  # (patients,)
    on_factor: np.ndarray  # (risks,)
    off_factor: np.ndarray  # (risks,)

    def active(self, t) -> np.ndarray:
        return (self.on <= t) & (t < self.off)

    def on_grid(self, times: np.ndarray) -> np.ndarray:
        """(patients, T) whether each patient is on treatment at each time."""
        return (self.on[:, None] <= times) & (times < self.off[:, None])

    def factor(self, t) -> np.ndarray:
        """(patients, risks) factor at time t."""
        return np.where(self.active(t)[:, None], self.on_factor, self.off_factor)

    def take(self, index) -> "Window":
        return Window(self.on[index], self.off[index], self.on_factor, self.off_factor)

    def on_grid_points(self, times: np.ndarray) -> "Window":
        """The same window for a model that looks only at the grid `times` (cycle models):
        on and off moved up to the next grid time (inf beyond the last), which changes no
        `on <= t < off` at any grid time but lets patients whose windows differ only
        between grid times share one analytic result."""
        def snapped(x):
            index = np.searchsorted(times, x, side="left")
            return np.where(index < len(times), times[np.minimum(index, len(times) - 1)], np.inf)
        return Window(snapped(self.on), snapped(self.off), self.on_factor, self.off_factor)


@dataclass(frozen=True)
class Multipliers:
    log_static: np.ndarray  # (patients, risks)
    age_slope: np.ndarray  # (risks,) log hazard ratio per time unit of attained age
    entry_age: np.ndarray | None  # (patients,) age at time 0, when known
    window: Window | None = None  # a strategy's treatment window
    log_time_scale: np.ndarray | None = None  # (patients, risks) log time ratios, if any
    start: np.ndarray | None = None  # (patients, states) own start shares; None: the model's

    def at(self, t) -> np.ndarray:
        """Multipliers (patients, risks) at time t since start (t scalar)."""
        base = np.exp(self.log_static + self.age_slope * float(t))
        return base if self.window is None else base * self.window.factor(t)

    @property
    def size(self) -> int:
        return self.log_static.shape[0]

    def time_ratios(self, r: int) -> np.ndarray | None:
        """Risk r's time ratio per patient, or None when no time ratio acts on it."""
        if self.log_time_scale is None or not self.log_time_scale[:, r].any():
            return None
        return np.exp(self.log_time_scale[:, r])

    def hazard_for(self, r: int, hazard: HazardFamily) -> HazardFamily:
        """Risk r's hazard as these patients have it: on their own clocks under a time
        ratio (one per patient, for the array methods), else `hazard` itself."""
        ratios = self.time_ratios(r)
        return hazard if ratios is None else TimeScaledHazard(hazard, ratios)

    def take(self, index) -> "Multipliers":
        """The rows of some patients (an index array or slice)."""
        return Multipliers(self.log_static[index], self.age_slope,
                           None if self.entry_age is None else self.entry_age[index],
                           None if self.window is None else self.window.take(index),
                           None if self.log_time_scale is None else self.log_time_scale[index],
                           None if self.start is None else self.start[index])

    def rows(self) -> list[np.ndarray]:
        """What makes a patient's row: multipliers, time ratios, entry age, window, start
        shares."""
        parts = [self.log_static]
        if self.log_time_scale is not None:
            parts.append(self.log_time_scale)
        if self.entry_age is not None:
            parts.append(self.entry_age[:, None])
        if self.window is not None:
            parts += [self.window.on[:, None], self.window.off[:, None]]
        if self.start is not None:
            parts.append(self.start)
        return parts

    def unique(self) -> tuple["Multipliers", np.ndarray]:
        """The distinct patient rows and, for each patient, the index of its row: patients
        with the same multipliers, time ratios, entry age, window and start shares share
        one analytic result."""
        _, first, inverse = np.unique(np.hstack(self.rows()), axis=0, return_index=True,
                                      return_inverse=True)
        return self.take(first), inverse.ravel()

    def distinct(self) -> "Multipliers":
        """One row when every patient has the same multipliers and window (a uniform
        cohort), else self: the analytic side then needs one trace, not N."""
        same = all(np.all(part == part[:1]) for part in self.rows())
        return self.take(slice(0, 1)) if same else self

    def repeated(self, n: int) -> "Multipliers":
        """A one-row (uniform cohort) set of multipliers for n identical patients."""
        return self if self.size == n else self.take(np.zeros(n, dtype=int))


def indicator(patients: pd.DataFrame, attribute: str, level: str | None) -> np.ndarray:
    """The covariate an effect multiplies: the value, or 1 where the level applies."""
    column = patients[attribute]
    if level is not None:
        return (column.astype(str) == level).to_numpy(float)
    return column.to_numpy(float)  # yes/no columns are bool: 1 when yes


def multipliers(model: BoundModel, patients: pd.DataFrame | None = None,
                means: Callable[[str, str | None], float] | None = None) -> Multipliers:
    """Per-patient, per-risk multipliers.

    With `patients`, one row per patient. Without, one row for the uniform cohort: every
    covariate at its expected value `means(attribute, level)` (the 'average patient' of the
    population spec), and age at the scenario's start age when it gives one."""
    n = 1 if patients is None else len(patients)

    def covariate(attribute, level):
        if patients is not None:
            return indicator(patients, attribute, level)
        if means is None:
            raise ValueError(f"the cohort needs the mean of attribute {attribute!r}")
        return np.array([means(attribute, level)])

    if patients is not None and AGE in patients:
        ages = patients[AGE].to_numpy(float)
    elif model.start_age is not None:
        ages = np.full(n, model.start_age)
    elif patients is None and means is not None and _uses_age(model):
        ages = np.array([means(AGE, None)])
    else:
        ages = None
    log_static = np.zeros((n, len(model.risks)))
    log_scale = np.zeros((n, len(model.risks)))
    slope = np.zeros(len(model.risks))
    for r, risk in enumerate(model.risks):
        for effect in risk.effects:
            if effect.attribute == AGE and effect.level is None:  # never a time ratio
                if ages is None:
                    raise ValueError(f"risk {risk.name!r} has an age effect but no age is known")
                log_static[:, r] += effect.log_hr * (ages - effect.centre)
                slope[r] += effect.log_hr
                continue
            term = effect.log_hr * (covariate(effect.attribute, effect.level) - effect.centre)
            if not effect.time_ratio:
                log_static[:, r] += term
            elif risk.family == "constant":  # rate / a: the hazard ratio 1 / a
                log_static[:, r] -= term
            else:
                log_scale[:, r] += term
    start = None
    if model.start_effects:
        logits = np.tile(np.log(np.where(model.start > 0, model.start, 1.0)), (n, 1))
        for state, effect in model.start_effects:
            x = ages if effect.attribute == AGE and effect.level is None else \
                covariate(effect.attribute, effect.level)
            logits[:, state] += effect.log_hr * (x - effect.centre)
        start = start_shares(logits, model.start > 0)
    return Multipliers(log_static, slope, ages,
                       log_time_scale=log_scale if log_scale.any() else None, start=start)


def start_shares(logits: np.ndarray, possible: np.ndarray) -> np.ndarray:
    """Each patient's start shares: the multinomial logit softmax(logits) over the states
    with a start share (McFadden 1974, "Conditional logit analysis of qualitative choice
    behavior"), shifted by each row's largest logit so that exp cannot overflow."""
    logits = np.where(possible, logits, -np.inf)
    weights = np.exp(logits - logits.max(axis=1, keepdims=True))
    return weights / weights.sum(axis=1, keepdims=True)


def cohort_multipliers(model: BoundModel) -> Multipliers:
    """The uniform cohort: every covariate at the population's expected value (exact,
    from the population spec), age at the start age or the population's mean age."""
    spec = model.scenario.population
    check_population_file(model.scenario)
    means = None if spec is None else partial(expected_covariate, spec)
    return multipliers(model, None, means)


def _uses_age(model: BoundModel) -> bool:
    return any(e.attribute == AGE for r in model.risks for e in r.effects) or any(
        r.clock == "age" for r in model.risks) or any(
        e.attribute == AGE for _, e in model.start_effects)


def average_patient(cohort: Multipliers, patients: Multipliers) -> Multipliers:
    """The 'average patient' for these patients: one row per patient, every row with the
    uniform cohort's mean attributes (`cohort_multipliers`: the population section's
    expected values), and each with its patient's own treatment window.

    The log multiplier (and the log time ratio) is linear in the attributes (0/1 indicators
    for levels and yes/no), so the mean attributes give the mean of the log multipliers: a
    yes/no attribute enters as its share of "yes", so a hazard ratio HR on it becomes
    HR ** share. Attained age moves on from the mean entry age. Start shares that depend on
    attributes take the mean attributes the same way: they enter the log odds linearly.
    Keeping every patient's window means that under a strategy
    the average patient is treated as the patients are (the same share treated, from the
    same start, stopping at the same times), so the comparison isolates the attributes.
    Feeding a cohort model mean covariates is common practice; Jensen's inequality is why
    it differs from the mean of the patients' own results."""
    n = patients.size

    def first(part):
        return None if part is None else np.repeat(part[:1], n, axis=0)

    ages = None if cohort.entry_age is None else first(cohort.entry_age)
    return Multipliers(first(cohort.log_static), cohort.age_slope, ages, patients.window,
                       first(cohort.log_time_scale), first(cohort.start))
