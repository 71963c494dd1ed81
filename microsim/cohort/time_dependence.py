"""Whether the chain of a bound model changes with time, and why, in plain words.

The question is asked of the expanded chain (`microsim.cohort.expand`): time-in-state tables
of cycle models and count memory are carried by tunnel and counter states, so they leave
that chain the same from cycle to cycle. What makes it change over time:
- a table by age or by time whose values differ from time 0 on (steps at known times);
- a treatment window that starts after 0 or stops before the end and changes some hazard
  (steps at its edges);
- a Weibull, Gompertz or log-logistic hazard on the time-since-start or age clock, or on the
  time since entering a state that only time 0 fills (then it is the time since start);
- an effect of attained age (a non-zero age slope of the multipliers).
A non-constant hazard on the time since entering a state that patients enter later is
semi-Markov: no finite expansion makes it a Markov chain at all (`Expansion.exact` is False);
the analytic side reads its clock as the time since start, which this module reports too.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from microsim.binding import BoundRisk
from microsim.cohort.expand import Expansion, semi_markov
from microsim.patients.multipliers import Multipliers
from microsim.scenario.spec import TableSpec


@dataclass(frozen=True)
class TimeDependence:
    """Why a chain changes with time since start (no reasons: it is time-homogeneous), and
    whether some change is smooth rather than in steps at known times."""
    reasons: tuple[str, ...]
    smooth: bool

    @property
    def homogeneous(self) -> bool:
        return not self.reasons


def changes_from(table: TableSpec, start) -> bool:
    """True when a step table (some level's row, for a table by level) takes more than one
    value from `start` (scalar or per patient) on; value i holds from starts[i], the first
    one before starts[0]."""
    first = np.searchsorted(np.asarray(table.starts), np.min(start), side="right") - 1
    return any(len(set(row[max(int(first), 0):])) > 1 for row in table.rows)


def clock_words(exp: Expansion, risk: BoundRisk) -> str:
    """The clock of a risk, said so that a reader sees why it moves with time since start."""
    model = exp.model
    if risk.clock == "age":
        return "attained age"
    if risk.clock == "since_start":
        return "the time since start"
    where = model.states[risk.source]
    if semi_markov(model, risk):
        return (f"the time since entering '{where}', which patients also enter later "
                "(semi-Markov; read as the time since start)")
    return f"the time since entering '{where}', which only time 0 fills (so the time since start)"


def risk_change(exp: Expansion, risk: BoundRisk, ages) -> tuple[str, bool] | None:
    """How one risk's base hazard or probability moves with time: (words, smooth), or None."""
    table = risk.table if risk.table is not None else (
        risk.probability if isinstance(risk.probability, TableSpec) else None)
    if table is not None:
        if exp.model.discrete and table.by == "time_in_state":
            return None  # carried by tunnel states
        if not changes_from(table, ages if table.by == "age" else 0.0):
            return None
        if table.by == "time_in_state":  # rate models: the time since entry
            return f"'{risk.name}' reads a table on {clock_words(exp, risk)}", False
        return f"'{risk.name}' reads a table by {table.by}", False
    if risk.family in (None, "constant"):
        return None
    return f"'{risk.name}' has a {risk.family} hazard on {clock_words(exp, risk)}", True


def window_change(exp: Expansion, mult: Multipliers) -> str | None:
    """A treatment window that changes some hazard part-way through the horizon."""
    window = mult.window
    if window is None or np.array_equal(window.on_factor, window.off_factor):
        return None
    end = exp.model.n_cycles * exp.model.cycle
    treated = window.on < end
    inside = treated & ((window.on > 0) | (window.off < end))
    if not inside.any():
        return None
    if mult.size == 1:
        stops = f" and stops at {window.off[0]:g}" if window.off[0] < end else ""
        return (f"the treatment starts at {window.on[0]:g}{stops}, and its hazard ratios "
                "apply only while it lasts")
    return "treatment windows start after time 0 or stop before the end"


def time_dependence(exp: Expansion, mult: Multipliers) -> TimeDependence:
    """Why the expanded chain of `exp.model`, for patients with multipliers `mult`, changes
    with time since start; the one answer to that question in the package."""
    reasons, smooth = [], False
    ages = mult.entry_age
    for r, risk in enumerate(exp.model.risks):
        change = risk_change(exp, risk, ages)
        if change is not None:
            reasons.append(change[0])
            smooth |= change[1]
        if mult.age_slope[r] != 0:
            reasons.append(f"'{risk.name}' has an effect of attained age")
            smooth = True
    window = window_change(exp, mult)
    if window is not None:
        reasons.append(window)
    return TimeDependence(tuple(dict.fromkeys(reasons)), smooth)
