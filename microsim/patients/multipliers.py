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

from dataclasses import dataclass, field
from functools import cached_property, partial
from typing import Callable, Mapping

import numpy as np
import pandas as pd

from microsim.binding import BoundModel, table_hazard
from microsim.hazards import HazardFamily, TimeScaledHazard
from microsim.patients.population import check_population_file, expected_covariate, gives_age
from microsim.scenario.errors import ScenarioError
from microsim.scenario.fields import LARGEST
from microsim.scenario.spec import TableSpec

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
class LevelRows:
    """A risk's table by level as patients read it: rows of band values (one per level, or
    the average patient's) and each patient's row. Such a table is not proportional (its
    levels may differ by band), so it is carried beside the multipliers, not in them."""
    risk: int
    table: TableSpec
    values: np.ndarray  # (rows, bands)
    row: np.ndarray  # (patients,) index into values

    def take(self, index) -> "LevelRows":
        return LevelRows(self.risk, self.table, self.values, self.row[index])

    def band_values(self, band) -> np.ndarray:
        """Each patient's value in `band` (a band, or one per patient)."""
        return self.values[self.row, band]

    @cached_property
    def hazards(self) -> list:
        """Each row as a hazard on the table's clock (rate models)."""
        return [table_hazard(self.table, row) for row in self.values.tolist()]

    def hazard_array(self, clock: np.ndarray) -> np.ndarray:
        """Each patient's hazard at its clock (patients first, any further axes)."""
        out = np.empty(np.shape(clock))
        for j, hazard in enumerate(self.hazards):
            mine = self.row == j
            out[mine] = hazard.hazard_array(clock[mine])
        return out


@dataclass(frozen=True)
class Multipliers:
    log_static: np.ndarray  # (patients, risks)
    age_slope: np.ndarray  # (risks,) log hazard ratio per time unit of attained age
    entry_age: np.ndarray | None  # (patients,) age at time 0, when known
    window: Window | None = None  # a strategy's treatment window
    log_time_scale: np.ndarray | None = None  # (patients, risks) log time ratios, if any
    start: np.ndarray | None = None  # (patients, states) own start shares; None: the model's
    tables: tuple[LevelRows, ...] = ()  # the risks' tables by level, each patient's row
    # costs' and utilities' tables by level: table name -> (patients, levels) each patient's
    # weight on each level (1 on its own; the average patient: the shares)
    levels: Mapping[str, np.ndarray] = field(default_factory=dict)

    def level_rows(self, r: int) -> LevelRows | None:
        """Risk r's table by level as these patients read it (None: not by level)."""
        return next((t for t in self.tables if t.risk == r), None)

    def at(self, t) -> np.ndarray:
        """Multipliers (patients, risks) at time t since start (t scalar)."""
        return self.over(np.array([float(t)]))[0]

    def over(self, times: np.ndarray) -> np.ndarray:
        """Multipliers at several times since start at once: (times, patients, risks)."""
        times = np.asarray(times, float)
        base = np.exp(self.log_static) * np.exp(self.age_slope * times[:, None, None])
        if self.window is None:
            return base
        on = self.window.on_grid(times).T[:, :, None]
        return base * np.where(on, self.window.on_factor, self.window.off_factor)

    @property
    def size(self) -> int:
        return self.log_static.shape[0]

    def time_ratios(self, r: int) -> np.ndarray | None:
        """Risk r's time ratio per patient, or None when no time ratio acts on it."""
        if self.log_time_scale is None or not self.log_time_scale[:, r].any():
            return None
        return np.exp(self.log_time_scale[:, r])

    def hazard_for(self, r: int, hazard: HazardFamily | None) -> HazardFamily:
        """Risk r's hazard as these patients have it: each patient's own row of a table
        by level, on their own clocks under a time ratio (one per patient, for the array
        methods), else `hazard` itself. (A time ratio on a table is refused when read.)"""
        rows = self.level_rows(r)
        if rows is not None:
            return rows
        ratios = self.time_ratios(r)
        return hazard if ratios is None else TimeScaledHazard(hazard, ratios)

    def take(self, index) -> "Multipliers":
        """The rows of some patients (an index array or slice)."""
        return Multipliers(self.log_static[index], self.age_slope,
                           None if self.entry_age is None else self.entry_age[index],
                           None if self.window is None else self.window.take(index),
                           None if self.log_time_scale is None else self.log_time_scale[index],
                           None if self.start is None else self.start[index],
                           tuple(t.take(index) for t in self.tables),
                           {name: w[index] for name, w in self.levels.items()})

    def rows(self) -> list[np.ndarray]:
        """What makes a patient's row: multipliers, time ratios, entry age, window, start
        shares, rows of tables by level (of risks, and of costs and utilities)."""
        parts = [self.log_static] + [t.row[:, None] for t in self.tables]
        parts += list(self.levels.values())
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
    if level is not None and isinstance(column.dtype, pd.CategoricalDtype):
        # by the categories' codes: the same as comparing every value's text, without it
        match = np.append(column.cat.categories.astype(str) == level, False)
        return match[column.cat.codes.to_numpy()].astype(float)  # code -1 (missing): no
    if level is not None:
        return (column.astype(str) == level).to_numpy(float)
    return column.to_numpy(float)  # yes/no columns are bool: 1 when yes


def multipliers(model: BoundModel, patients: pd.DataFrame | None = None,
                means: Callable[[str, str | None], float] | None = None) -> Multipliers:
    """Per-patient, per-risk multipliers.

    With `patients`, one row per patient. Without, one row for the uniform cohort: every
    covariate at its expected value `means(attribute, level)` (the 'average patient' of the
    population spec), and age at the population's mean age where it gives patients ages,
    else at the scenario's start age when it gives one."""
    n = 1 if patients is None else len(patients)

    def covariate(attribute, level):
        if patients is not None:
            return indicator(patients, attribute, level)
        if means is None:
            raise ValueError(f"the cohort needs the mean of attribute {attribute!r}")
        return np.array([means(attribute, level)])

    if patients is not None and AGE in patients:
        ages = patients[AGE].to_numpy(float)
    elif patients is None and means is not None and gives_age(model.scenario.population):
        ages = np.array([means(AGE, None)])  # the patients' own ages' mean, not start.age
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
            check_term(term, effect.attribute, risk.name)
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
    tables = tuple(level_rows(r, risk, patients, means)
                   for r, risk in enumerate(model.risks) if risk.level_table is not None)
    levels = {t.name: level_weights(t, patients, means)
              for t in model.value_tables if t.attribute is not None}
    return Multipliers(log_static, slope, ages,
                       log_time_scale=log_scale if log_scale.any() else None, start=start,
                       tables=tables, levels=levels)


LOG_LARGEST = float(np.log(LARGEST))


def check_term(term: np.ndarray, attribute: str, risk: str) -> None:
    """Refuse a patient whose attribute makes a hazard ratio term larger than LARGEST in
    size (a lognormal attribute with a wide sdlog, say): exp of it overflows, and the
    patient's probabilities would be nan."""
    if term.size and not np.max(np.abs(term)) <= LOG_LARGEST:
        k = int(np.argmax(np.where(np.isnan(term), np.inf, np.abs(term))))
        raise ScenarioError(f"population.attributes.{attribute}",
                            f"a patient's {attribute} makes the hazard ratio on {risk!r} "
                            f"e^{term[k]:.4g}, beyond {LARGEST:g}: the attribute reaches far "
                            "outside the range its hazard ratio describes; bound it (a normal "
                            "with lower and upper, or a uniform) or narrow its spread")


def start_shares(logits: np.ndarray, possible: np.ndarray) -> np.ndarray:
    """Each patient's start shares: the multinomial logit softmax(logits) over the states
    with a start share (McFadden 1974, "Conditional logit analysis of qualitative choice
    behavior"), shifted by each row's largest logit so that exp cannot overflow."""
    logits = np.where(possible, logits, -np.inf)
    weights = np.exp(logits - logits.max(axis=1, keepdims=True))
    return weights / weights.sum(axis=1, keepdims=True)


def level_rows(r: int, risk, patients: pd.DataFrame | None,
               means: Callable[[str, str | None], float] | None) -> LevelRows:
    """Risk r's table by level for these patients (each its level's row), or for the
    average patient (`average_row`)."""
    table = risk.level_table
    rows = np.array(table.rows, float)
    if patients is not None:
        column = patients[table.attribute].astype(str)
        row = column.map({level: k for k, level in enumerate(table.levels)})
        if row.isna().any():
            raise ValueError(f"table {table.name!r} has no row for level "
                             f"{column[row.isna()].iloc[0]!r} of {table.attribute!r}")
        return LevelRows(r, table, rows, row.to_numpy(np.int64))
    if means is None:
        raise ValueError(f"the cohort needs the shares of attribute {table.attribute!r}")
    shares = np.array([means(table.attribute, level) for level in table.levels])
    probability = isinstance(risk.probability, TableSpec)
    return LevelRows(r, table, average_row(rows, shares, probability), np.zeros(1, np.int64))


def level_weights(table: TableSpec, patients: pd.DataFrame | None,
                  means: Callable[[str, str | None], float] | None) -> np.ndarray:
    """Each patient's weight on each level of a cost's or utility's table by level: 1 on
    its own level; for the average patient, the population's share of each level, so that
    it is valued at the share-weighted mean of the levels' values (a value is linear in the
    levels' 0/1 indicators, and the average patient has their means)."""
    if patients is None:
        if means is None:
            raise ValueError(f"the cohort needs the shares of attribute {table.attribute!r}")
        return np.array([[means(table.attribute, level) for level in table.levels]])
    column = patients[table.attribute].astype(str).to_numpy()
    weights = (column[:, None] == np.array(table.levels)[None, :]).astype(float)
    if not weights.sum(axis=1).all():
        level = column[weights.sum(axis=1) == 0][0]
        raise ValueError(f"table {table.name!r} has no value for level {level!r} of "
                         f"{table.attribute!r}")
    return weights


def average_row(rows: np.ndarray, shares: np.ndarray, probability: bool) -> np.ndarray:
    """The average patient's row of a table by level: the share-weighted geometric mean of
    the levels' hazards, band by band, h = prod_l h_l^(s_l) (on the rate scale for
    probabilities: L = -ln(1 - p) is averaged so, and p = 1 - exp(-L)).

    It is the rule every categorical attribute follows in the average patient: the log
    hazard is linear in the levels' 0/1 indicators, so at their means (the shares) a level
    with hazard ratio HR enters as HR^share. A table by level is such an attribute whose
    hazard ratios h_l / h_ref change from band to band, and prod_l (h_l / h_ref)^(s_l) h_ref
    is prod_l h_l^(s_l) whatever the reference. (The hazard of the mixed cohort, a mean of
    the levels' survivors, is not of this form; Jensen's inequality again.) A level with a
    zero hazard in a band at a positive share makes the average 0 there, as HR = 0 would."""
    kept = shares > 0
    hazards = -np.log1p(-rows[kept]) if probability else rows[kept]
    with np.errstate(divide="ignore"):
        mean = np.exp(shares[kept] @ np.log(hazards))[None, :]
    return -np.expm1(-mean) if probability else mean


def cohort_multipliers(model: BoundModel) -> Multipliers:
    """The uniform cohort: every covariate at the population's expected value (exact,
    from the population spec), age at the population's mean age where it gives patients
    ages, else at the start age."""
    spec = model.scenario.population
    check_population_file(model.scenario)
    means = None if spec is None else partial(expected_covariate, spec)
    return multipliers(model, None, means)


def _uses_age(model: BoundModel) -> bool:
    return any(e.attribute == AGE for r in model.risks for e in r.effects) or any(
        r.clock == "age" for r in model.risks) or any(
        e.attribute == AGE for _, e in model.start_effects) or any(
        t.by == AGE for t in model.value_tables)


def average_patient(cohort: Multipliers, patients: Multipliers) -> Multipliers:
    """The 'average patient' for these patients: one row per patient, every row with the
    uniform cohort's mean attributes (`cohort_multipliers`: the population section's
    expected values), and each with its patient's own treatment window.

    The log multiplier (and the log time ratio) is linear in the attributes (0/1 indicators
    for levels and yes/no), so the mean attributes give the mean of the log multipliers: a
    yes/no attribute enters as its share of "yes", so a hazard ratio HR on it becomes
    HR ** share, and a table by level gives the share-weighted geometric mean of its
    levels' hazards (`average_row`). Attained age moves on from the mean entry age. Start
    shares that depend on attributes take the mean attributes the same way: they enter the
    log odds linearly, and so do costs and utilities by level (the share-weighted mean of
    the levels' values, `level_weights`). Keeping every patient's window means that under a
    strategy the average patient is treated as the patients are (the same share treated, from the
    same start, stopping at the same times), so the comparison isolates the attributes.
    Feeding a cohort model mean covariates is common practice; Jensen's inequality is why
    it differs from the mean of the patients' own results."""
    n = patients.size

    def first(part):
        return None if part is None else np.repeat(part[:1], n, axis=0)

    ages = None if cohort.entry_age is None else first(cohort.entry_age)
    return Multipliers(first(cohort.log_static), cohort.age_slope, ages, patients.window,
                       first(cohort.log_time_scale), first(cohort.start),
                       tuple(t.take(np.zeros(n, np.int64)) for t in cohort.tables),
                       {name: first(w) for name, w in cohort.levels.items()})
