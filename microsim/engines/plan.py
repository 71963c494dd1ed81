"""What the engines precompute for a batch: purposes, memory, start states, multipliers.

Everything a patient process reads in its loop is turned into plain Python lists and
tuples here, once per batch, because attribute lookups and numpy scalars cost more than
the arithmetic of a transition.
"""
from __future__ import annotations

import gc
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np

from microsim.binding import BoundModel
from microsim.hazards.cycle_probabilities import log_survival
from microsim.hazards import TimeScaledHazard
from microsim.patients.multipliers import Multipliers

CLOCKS = {"since_start": 0, "since_entry": 1, "age": 2}
START_PURPOSE = "start"


def tracked_names(model: BoundModel) -> tuple[str, ...]:
    """Names whose occurrences some memory effect counts or times."""
    return tuple(sorted({m.after for r in model.risks for m in r.memory}))


def bumps(model: BoundModel, tracked: tuple[str, ...]) -> list[tuple[int, ...]]:
    """For each risk, the tracked names its occurrence advances (its own name, and the
    state it enters when that is another state, not a copy of the same one)."""
    out = []
    for risk in model.risks:
        hit = {risk.name}
        if risk.target is not None and model.entered(risk.target) != model.entered(risk.source):
            hit.add(model.entered(risk.target))
        out.append(tuple(k for k, name in enumerate(tracked) if name in hit))
    return out


def memory_terms(model: BoundModel, tracked: tuple[str, ...]) -> list[tuple]:
    """For each risk: ((tracked index, multipliers or None, within, multiplier), ...)."""
    return [tuple((tracked.index(m.after), m.multipliers, m.within, m.multiplier)
                  for m in risk.memory) for risk in model.risks]


def risk_purpose(model: BoundModel, risk) -> str:
    """The draw purpose of a risk: its name and the state it leaves, so an event that can
    happen in several states has an independent stream in each, and a strategy that adds
    a risk shifts no other risk's draws.

    A copy of a state in a treatment phase reads the streams of the state it is a copy of
    (`BoundModel.entered`), so a patient whom a phase does not treat keeps, draw for draw,
    the draws of every other strategy (common random numbers). In cycle models the
    occurrences are cycle numbers, which a patient never repeats; in rate models they
    count the rounds in the state, which its copies count together (`round_owners`)."""
    return f"{risk.name}@{model.entered(risk.source)}"


def round_owners(model: BoundModel) -> list[int]:
    """For each state, the state whose count of rounds its rounds continue (rate models):
    itself, or for a copy of a state in a treatment phase the first copy of that state.
    A patient who comes to a state's copy (by an event that moves the phase on, by a
    wait's end, by entering it) takes round k + 1 after round k in any copy of the state,
    as it would in the comparator, where it stays in the state itself: every occurrence of
    a stream is read at most once, and as long as the treatment has changed nothing for a
    patient, the patient reads the comparator's occurrences."""
    first: dict[str, int] = {}
    return [first.setdefault(model.entered(i), i) for i in range(model.n_states)]


def risk_purposes(model: BoundModel) -> tuple[str, ...]:
    return tuple(risk_purpose(model, r) for r in model.risks)


@dataclass(frozen=True, slots=True)
class RiskView:
    """What the event engine's general path reads of a risk: its clock and hazard, its
    age slope, and its treatment factors (None when no strategy changes it)."""
    clock: str
    hazard: object
    slope: float
    on_factor: float | None
    off_factor: float | None
    rate: float | None  # a constant rate's value, None for other families
    risk: object  # the bound risk it views

    def __init__(self, risk, slope: float, on_factor=None, off_factor=None, hazard=None):
        rate = risk.params["rate"] if risk.family == "constant" else None
        for name, value in (("clock", risk.clock), ("hazard", hazard or risk.hazard),
                            ("slope", slope), ("on_factor", on_factor),
                            ("off_factor", off_factor), ("rate", rate)):
            object.__setattr__(self, name, value)
        object.__setattr__(self, "risk", risk)

    def with_hazard(self, hazard) -> "RiskView":
        """The same view with another hazard (a level's row of a table by level)."""
        return RiskView(self.risk, self.slope, self.on_factor, self.off_factor, hazard)

    def scaled(self, ratio: float) -> "RiskView":
        """The same risk under a patient's time ratio (never a constant rate's: the
        multipliers keep that as a hazard ratio)."""
        view = object.__new__(RiskView)
        for name in self.__slots__:
            object.__setattr__(view, name, getattr(self, name))
        object.__setattr__(view, "hazard", TimeScaledHazard(self.hazard, ratio))
        return view


def risk_views(model: BoundModel, mult: Multipliers) -> list[RiskView]:
    """Every risk as the event engines read it, with treatment factors where the strategy's
    window changes it."""
    window = mult.window

    def factors(r: int):
        if window is None or window.on_factor[r] == window.off_factor[r]:
            return None, None
        return window.on_factor[r], window.off_factor[r]

    return [RiskView(risk, float(mult.age_slope[r]), *factors(r))
            for r, risk in enumerate(model.risks)]


def level_plans(mult: Multipliers) -> dict[int, tuple[list, list, list]]:
    """For each risk with a table by level (cycle models): its rows of band values and of
    L = -ln(1 - p), as lists, and each patient's row; both cycle engines read these same
    numbers."""
    return {t.risk: (t.values.tolist(), [[log_survival(p) for p in row] for row in t.values.tolist()],
                     t.row.tolist()) for t in mult.tables}


def level_views(views: list[RiskView], mult: Multipliers) -> dict[int, tuple[list, list]]:
    """For each risk with a table by level (rate models): one view per row (its hazard)
    and each patient's row."""
    return {t.risk: ([views[t.risk].with_hazard(h) for h in t.hazards], t.row.tolist())
            for t in mult.tables}


def patient_views(views: list[RiskView], levels: dict[int, tuple[list, list]],
                  mult: Multipliers, b: int) -> list[RiskView]:
    """The risk views of patient row b: its own level's hazard where a table is by level,
    on its own clock where a time ratio acts (never both on one risk: refused when read)."""
    mine = views
    if levels:
        mine = list(views)
        for r, (by_row, row) in levels.items():
            mine[r] = by_row[row[b]]
    if mult.log_time_scale is None:
        return mine
    ratios = np.exp(mult.log_time_scale[b]).tolist()
    return [view if ratio == 1.0 else view.scaled(ratio) for view, ratio in zip(mine, ratios)]


def start_states(model: BoundModel, u: np.ndarray, mult: Multipliers) -> list[int]:
    """Each patient's starting state, from its own 'start' uniform and the start shares
    (the patient's own when they depend on its attributes)."""
    if mult.start is not None:
        cumulative = np.cumsum(mult.start, axis=1)
        cumulative[:, -1] = 1.0
        return (cumulative <= np.asarray(u)[:, None]).sum(axis=1).tolist()
    cumulative = np.cumsum(model.start)
    cumulative[-1] = 1.0
    return np.searchsorted(cumulative, u, side="right").tolist()


def static_multipliers(mult: Multipliers) -> list[list[float]]:
    return np.exp(mult.log_static).tolist()


def initial_memory(model: BoundModel, tracked: tuple[str, ...], state: int):
    """Counts and last-occurrence times at the start: entering the start state counts."""
    name = model.entered(state)
    counts = [int(t == name) for t in tracked]
    last = [0.0 if t == name else None for t in tracked]
    return counts, last


def initial_memory_arrays(model: BoundModel, tracked: tuple[str, ...], starts: np.ndarray):
    """`initial_memory` for patients starting in `starts`, as arrays (tracked name, patient):
    counts, and last-occurrence times with nan for none."""
    initial = [initial_memory(model, tracked, s) for s in range(model.n_states)]
    counts = np.array([c for c, _ in initial], np.int64).reshape(model.n_states, -1)
    last = np.array([[np.nan if x is None else x for x in t] for _, t in initial],
                    float).reshape(model.n_states, -1)
    return counts[starts].T.copy(), last[starts].T.copy()


@contextmanager
def paused_gc():
    """Pause Python's cyclic garbage collector while a batch runs: the loop allocates
    many small objects (events, records) and would otherwise trigger collections that
    walk every live object again and again; the collector catches up afterwards."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()
