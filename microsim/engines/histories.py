"""Per-patient histories: what engines return, as flat columns.

A history is a list of records (patient, time, from state, to state, risk). The first
record of each patient is its start (from -1, risk -1); an event that does not change the
state has from == to. Engines keep one record list per patient, so the histories come out
grouped by patient and in time order, as the aggregators need.
"""
from __future__ import annotations

from dataclasses import dataclass
from itertools import chain

import numpy as np
import pyarrow as pa

START = -1


class Recorder:
    """Cheap appends from inside the engines' hot loops: one list per patient row, one
    tuple (time, from state, to state, risk) per record, already in time order."""
    __slots__ = ("rows",)

    def __init__(self, n_patients: int):
        self.rows: list[list[tuple]] = [[] for _ in range(n_patients)]

    def histories(self) -> "Histories":
        lengths = np.fromiter(map(len, self.rows), np.int64, count=len(self.rows))
        table = np.fromiter(chain.from_iterable(chain.from_iterable(self.rows)), float,
                            count=4 * int(lengths.sum())).reshape(-1, 4)
        return Histories(np.repeat(np.arange(len(self.rows)), lengths), table[:, 0],
                         table[:, 1].astype(np.int16), table[:, 2].astype(np.int16),
                         table[:, 3].astype(np.int32), len(self.rows))


@dataclass(frozen=True)
class Histories:
    """Records of one batch; `patient` holds row positions 0..n_patients-1 in the batch."""
    patient: np.ndarray
    time: np.ndarray
    source: np.ndarray
    target: np.ndarray
    risk: np.ndarray
    n_patients: int
    # (n_patients, cycles + 1) state at each cycle point, from an engine that has it at
    # hand (the compiled cycle engine), so it need not be rebuilt from the records
    cycle_states: np.ndarray | None = None

    def treatment_times(self, window, phases: np.ndarray | None,
                        treated: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Each patient's start and stop of treatment: the window's for a patient it treats
        (`treated`: alive when it opens, within the horizon), or under treatment phases
        (`phases`: per state 1 on a treatment, 0 off, -1 absorbing) the first entry into a
        treated state inside the window and the first entry after it into an untreated
        living state (or the window's end)."""
        on, off = np.asarray(window.on, float), np.asarray(window.off, float)
        if phases is None:
            return np.where(treated, on, np.inf), np.where(treated, off, np.inf)
        p, t, code = self.patient, self.time, phases[self.target]
        start = np.full(self.n_patients, np.inf)
        np.minimum.at(start, p, np.where((code == 1) & (on[p] <= t) & (t < off[p]), t, np.inf))
        stop = off.copy()
        np.minimum.at(stop, p, np.where((code == 0) & (t > start[p]), t, np.inf))
        return start, np.where(np.isinf(start), np.inf, stop)

    def table(self, patients, state_names, risk_names, strategy: str | None = None,
              window=None, phases: np.ndarray | None = None,
              treated: np.ndarray | None = None) -> pa.Table:
        """The records as a typed Arrow table: patient id, time, from state, to state,
        event, then the patient's attributes (`patients`: the batch's rows, with ids in
        column 'patient'); under a strategy, its name and each patient's time on treatment
        (`treatment_start`, `treatment_stop`: empty for a patient never treated, or never
        stopped; `treated`: whether each patient spent time on treatment)."""
        patient_ids = patients["patient"].to_numpy()
        states = pa.array(list(state_names))
        names = list(dict.fromkeys(risk_names))  # an event in several states has one name
        name_of = np.array([names.index(n) for n in risk_names] + [0], np.int32)
        risks = pa.array(names)
        table = pa.table({
            "patient": pa.array(np.asarray(patient_ids)[self.patient]),
            "time": pa.array(self.time),
            "from_state": pa.DictionaryArray.from_arrays(
                pa.array(np.where(self.source < 0, None, self.source), pa.int16()), states),
            "to_state": pa.DictionaryArray.from_arrays(pa.array(self.target, pa.int16()), states),
            "event": pa.DictionaryArray.from_arrays(
                pa.array(np.where(self.risk < 0, None, name_of[self.risk]), pa.int32()), risks),
        })
        if strategy is not None:
            table = table.append_column("strategy", pa.DictionaryArray.from_arrays(
                pa.array(np.zeros(len(self.time), np.int32)), pa.array([strategy])))
        if window is not None:
            for name, times in zip(("treatment_start", "treatment_stop"),
                                   self.treatment_times(window, phases, treated)):
                at = times[self.patient]
                table = table.append_column(name, pa.array(np.where(np.isinf(at), None, at),
                                                           pa.float64()))
        attributes = patients.drop(columns="patient").iloc[self.patient].reset_index(drop=True)
        for name in attributes.columns:
            table = table.append_column(name, pa.Array.from_pandas(attributes[name]))
        return table


def from_records(records, n_patients: int, cycle_states: np.ndarray | None = None) -> Histories:
    """Histories from the vectorised engines' records, each (patient rows, time, from state,
    to state, risk) with scalars or arrays over those rows: grouped by patient, and within a
    patient in the order they were made in (time order, events before the transition at the
    same time), as the Recorder does."""
    patients = np.concatenate([who for who, *_ in records]).astype(np.int64)

    def column(k: int, dtype):
        return np.concatenate([np.broadcast_to(np.asarray(rec[k], dtype), rec[0].shape)
                               for rec in records])

    # a stable sort; on 16-bit keys numpy's is a radix sort, several times faster
    keys = patients.astype(np.uint16) if n_patients <= 2**16 else patients
    order = np.argsort(keys, kind="stable")
    return Histories(patients[order], column(1, float)[order], column(2, np.int16)[order],
                     column(3, np.int16)[order], column(4, np.int32)[order], n_patients,
                     cycle_states)
