"""Run a population through a bound model in batches, keeping per-patient summaries.

Histories stream to a Parquet file batch by batch (or are dropped when only aggregates are
wanted), so memory holds only a few numbers per patient whatever the population size.
Because every draw is keyed by (seed, patient id, purpose, occurrence), a patient's
history does not depend on the batch size or on which other patients are simulated.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from microsim import threads
from microsim.results import aggregate
from microsim.binding import BoundModel
from microsim.patients.multipliers import Multipliers
from microsim.engines.cycle_engine import simulate_cycles
from microsim.engines.event_engine import simulate_events
from microsim.engines.vectorised_events import simulate_events_vectorised
from microsim.engines.compiled_cycles import simulate_cycles_compiled
from microsim.results.outcomes import MEASURES, Exposure, outcome_values
from microsim.patients.population import PATIENT
from microsim.scenario.errors import ScenarioError
from microsim.store import writing
from microsim.patients.treatment import patient_multipliers


@dataclass(frozen=True)
class Simulation:
    """Per-patient results of one run; rows follow `patients`."""
    model: BoundModel
    patients: pd.DataFrame
    seed: int
    mult: Multipliers  # the hazard multipliers (and treatment windows) the engine used
    grid: np.ndarray  # (T,) time points of `states`
    states: np.ndarray  # (N, T) state index of each patient at each grid time (int8 for
    # fewer than 128 states, else int16; -1 before a patient's first record)
    values: dict[str, np.ndarray]  # each patient's outcomes (`outcomes.MEASURES`)
    treated: np.ndarray  # (N,) whether each patient spent time on treatment (in a treated
    # copy of a state, under treatment phases)
    transitions: int  # records other than starts: transitions and events simulated
    # time in state, on treatment and occurrences per patient, when asked for (`simulate`)
    exposure: Exposure | None = None
    # under treatment phases: per treatment (a sequence's first and `then` lines), whether
    # each patient spent time on it (`treatment_copies`); empty without phases
    treated_by: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def size(self) -> int:
        return len(self.patients)

    def head(self, n: int) -> "Simulation":
        """The first n patients (all of them when there are fewer)."""
        return self if n >= self.size else self.rows(slice(0, n))

    def rows(self, part: slice) -> "Simulation":
        """The patients of `part` (a slice of rows) as a simulation of their own."""
        return Simulation(self.model, self.patients.iloc[part].reset_index(drop=True),
                          self.seed, self.mult.take(part), self.grid, self.states[part],
                          {m: v[part] for m, v in self.values.items()}, self.treated[part], -1,
                          None if self.exposure is None else self.exposure.take(part),
                          {t: on[part] for t, on in self.treated_by.items()})


def report_grid(model: BoundModel, step: float | None = None) -> np.ndarray:
    """Time points for traces: the cycle points, or a finer/coarser step in rate models."""
    if model.discrete or step is None:
        return model.times
    end = model.n_cycles * model.cycle
    return np.linspace(0.0, end, int(round(end / step)) + 1)


def cycle_points_of(model: BoundModel, grid: np.ndarray) -> np.ndarray | slice | None:
    """Which cycle points the grid's times are (their indices; a slice for all of them), or
    None when some are not: states on a grid of cycle points are read off the cycle states,
    not rebuilt."""
    if np.array_equal(grid, model.times):
        return slice(None)
    index = np.minimum(np.searchsorted(model.times, grid), len(model.times) - 1)
    return index if np.array_equal(model.times[index], grid) else None


ENGINES = ("auto", "simpy", "vectorised")


def choose_engine(model: BoundModel, engine: str):
    """auto (and vectorised): the vectorised engine of the model's kind, simpy: the SimPy
    engine of the model's kind, the readable reference. For cycle models the two give
    identical histories, draw for draw; for rate models the same records, with times equal
    within floating-point tolerance (`microsim.engines.vectorised_events`)."""
    if engine not in ENGINES:
        raise ScenarioError("--engine", f"must be one of {', '.join(ENGINES)}, got {engine!r}")
    if model.scenario.capacity is not None:  # patients who share capacity are not independent
        raise ScenarioError("resources" if model.scenario.capacity.resources else "arrivals",
                            "patients here share capacity or arrive over time, which the "
                            "engines of independent patients cannot run; the capacity engine "
                            "does (microsim.capacity.run.run_service, or `microsim run`)")
    if engine == "simpy":
        return simulate_cycles if model.discrete else simulate_events
    return simulate_cycles_compiled if model.discrete else simulate_events_vectorised


class HistoryFile:
    """Histories streamed to one Parquet file, batch by batch and across calls of
    `simulate`; the file takes its name only when it is closed complete (a failure or an
    interrupt leaves only a partial file beside it, which the caller's scratch folder drops)."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self.partial = self.path.with_suffix(".parquet.partial")
        self.writer = None

    def write(self, table) -> None:
        with writing(self.path):
            if self.writer is None:
                self.partial.parent.mkdir(parents=True, exist_ok=True)
                self.writer = pq.ParquetWriter(self.partial, table.schema)
            self.writer.write_table(table)

    def __enter__(self) -> "HistoryFile":
        return self

    def __exit__(self, kind, error, trace) -> None:
        if self.writer is None:
            return
        with writing(self.path):
            self.writer.close()
            if kind is None:
                os.replace(self.partial, self.path)  # complete, so it takes its name


def phase_codes(model: BoundModel) -> np.ndarray | None:
    """Under treatment phases, each state's code for the histories: 1 on a treatment, 0
    off it, -1 absorbing (dying on treatment stops nothing); None without phases."""
    if model.treated_states is None:
        return None
    return np.where(model.absorbing, -1, model.treated_states.astype(np.int8))


def treatment_copies(model: BoundModel) -> dict[str, np.ndarray]:
    """Under treatment phases, each treatment's copies of the states (`<state>+<name>`,
    the treated copies of treatment_phases): a mask of the states per treatment name."""
    if model.treated_states is None:
        return {}
    names = [model.states[i].removeprefix(model.entered(i) + "+") if on else None
             for i, on in enumerate(model.treated_states)]
    return {name: np.array([n == name for n in names]) for name in dict.fromkeys(names)
            if name is not None}


def simulate(model: BoundModel, patients: pd.DataFrame, seed: int, *, batch_size: int = 5000,
             grid: np.ndarray | None = None, histories: Path | HistoryFile | None = None,
             mult: Multipliers | None = None, engine: str = "auto",
             keep_exposure: bool = False) -> Simulation:
    """Simulate every patient (rows of `patients`, ids in column 'patient'); `histories`
    streams every record to Parquet (a path, or an open `HistoryFile` shared by calls).

    Each batch's histories are valued as they come (`Simulation.values`), so a run holds
    its states on the grid and a few numbers per patient; `keep_exposure` also keeps each
    patient's time in state and occurrences (`Simulation.exposure`, 24 bytes a state and
    a risk)."""
    if isinstance(histories, (str, Path)):
        with HistoryFile(histories) as file:
            return simulate(model, patients, seed, batch_size=batch_size, grid=grid,
                            histories=file, mult=mult, engine=engine,
                            keep_exposure=keep_exposure)
    grid = report_grid(model) if grid is None else grid
    mult = patient_multipliers(model, patients, seed) if mult is None else mult.repeated(len(patients))
    engine = choose_engine(model, engine)
    ids = patients[PATIENT].to_numpy()
    points = cycle_points_of(model, grid)
    # filled batch by batch: joining per-batch arrays at the end would copy them all again
    states = np.empty((len(ids), len(grid)), np.int8 if model.n_states < 128 else np.int16)
    values = {m: np.empty(len(ids)) for m in MEASURES}
    treated = np.zeros(len(ids), bool)
    # time on treatment counts in living states only: a patient dead when a window opens
    # is never treated
    on_a_treatment = ~np.asarray(model.absorbing, bool) if model.treated_states is None \
        else np.asarray(model.treated_states, bool)
    copies = treatment_copies(model)
    treated_by = {name: np.zeros(len(ids), bool) for name in copies}
    exposure = Exposure.empty(len(ids), model) if keep_exposure else None
    write = None if histories is None else (
        lambda h, part, batch: h.table(patients.iloc[part], model.states,
                                       [r.name for r in model.risks],
                                       None if model.treatment is None else model.treatment.strategy,
                                       batch.window, phase_codes(model), treated[part]))

    def one_batch(lo: int):
        """Simulate and value the batch from row `lo`, filling its rows of the arrays
        above (batches own disjoint rows, so threads never write the same row)."""
        part = slice(lo, lo + batch_size)
        batch = mult.take(part)
        h = engine(model, batch, ids[part], seed)
        cycle_states = h.cycle_states
        if cycle_states is None and model.discrete:
            cycle_states = aggregate.grid_states(h, model.times)  # once, for both uses
        states[part] = (cycle_states[:, points] if cycle_states is not None and points is not None
                        else aggregate.grid_states(h, grid))
        mine = aggregate.exposure(model, h, batch, cycle_states)
        for m, v in outcome_values(model, mine).items():
            values[m][part] = v
        treated[part] = mine.on_treatment[:, on_a_treatment, 0].sum(axis=1) > 0
        for name, states_of in copies.items():
            treated_by[name][part] = mine.on_treatment[:, states_of, 0].sum(axis=1) > 0
        if exposure is not None:
            exposure.put(part, mine)
        return int(np.sum(h.risk >= 0)), None if write is None else write(h, part, batch)

    transitions = 0
    simpy = engine in (simulate_cycles, simulate_events)  # holds the GIL: threads gain nothing
    for moved, table in threads.in_order(one_batch, range(0, len(ids), batch_size),
                                         1 if simpy else threads.count()):
        transitions += moved
        if table is not None:
            histories.write(table)  # in the batches' order, whatever thread ran them
    return Simulation(model, numbered(patients), seed, mult, grid, states, values, treated,
                      transitions, exposure, treated_by)


def numbered(patients: pd.DataFrame) -> pd.DataFrame:
    """`patients` with rows numbered 0..n-1, copied only when they are not (a copy of a
    million patients costs a tenth of their simulation)."""
    if patients.index.equals(pd.RangeIndex(len(patients))):
        return patients
    return patients.reset_index(drop=True)
