"""Per-patient histories: what engines return, as flat columns.

A history is a list of records (patient, time, from state, to state, risk). The first
record of each patient is its start (from -1, risk -1); an event that does not change the
state has from == to. Engines append records in simulation order; `sorted_by_patient`
puts each patient's records together, in time order, for the aggregators.
"""
from __future__ import annotations

from dataclasses import dataclass
from itertools import chain

import numpy as np
import pyarrow as pa

START = -1


class Recorder:
    """Cheap appends from inside the engines' hot loops: one tuple per record,
    (patient row, time, from state, to state, risk)."""
    __slots__ = ("rows",)

    def __init__(self):
        self.rows: list[tuple] = []

    def histories(self, n_patients: int) -> "Histories":
        table = np.fromiter(chain.from_iterable(self.rows), float,
                            count=5 * len(self.rows)).reshape(-1, 5)
        return Histories(table[:, 0].astype(np.int64), table[:, 1], table[:, 2].astype(np.int16),
                         table[:, 3].astype(np.int16), table[:, 4].astype(np.int32),
                         n_patients).sorted_by_patient()


@dataclass(frozen=True)
class Histories:
    """Records of one batch; `patient` holds row positions 0..n_patients-1 in the batch."""
    patient: np.ndarray
    time: np.ndarray
    source: np.ndarray
    target: np.ndarray
    risk: np.ndarray
    n_patients: int

    def sorted_by_patient(self) -> "Histories":
        order = np.lexsort((self.time, self.patient))
        return Histories(self.patient[order], self.time[order], self.source[order],
                         self.target[order], self.risk[order], self.n_patients)

    def table(self, patient_ids: np.ndarray, state_names, risk_names) -> pa.Table:
        """The records as a typed Arrow table with patient ids and readable names."""
        states = pa.array(list(state_names))
        names = list(dict.fromkeys(risk_names))  # an event in several states has one name
        name_of = np.array([names.index(n) for n in risk_names] + [0], np.int32)
        risks = pa.array(names)
        return pa.table({
            "patient": pa.array(np.asarray(patient_ids)[self.patient]),
            "time": pa.array(self.time),
            "from_state": pa.DictionaryArray.from_arrays(
                pa.array(np.where(self.source < 0, None, self.source), pa.int16()), states),
            "to_state": pa.DictionaryArray.from_arrays(pa.array(self.target, pa.int16()), states),
            "event": pa.DictionaryArray.from_arrays(
                pa.array(np.where(self.risk < 0, None, name_of[self.risk]), pa.int32()), risks),
        })
