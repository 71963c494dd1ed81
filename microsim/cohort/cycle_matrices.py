"""Cycle models: the per-cycle transition matrices a bound model implies, per patient.

Within a cycle a patient in expanded state (i, d, counts) takes one of the transitions out
of i (the "remainder" takes what the others leave) and, independently, each event of i
happens or not; counts and time-in-state then move on, and an event that starts or stops
treatment passes the patient to the next phase's copy of the cycle's end state
(`BoundModel.phase_on`). Covariate and memory multipliers act on the rate scale, each move
on its own, p' = 1 - (1 - p)^m (common practice; e.g. Briggs, Claxton & Sculpher 2006,
"Decision Modelling for Health Economic Evaluation", ch. 3), or, under the competing rule,
the row's moves combined through their rates (`microsim.hazards.cycle_probabilities`). The
cycle engines follow exactly these rules.
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Callable

import numpy as np

from microsim.binding import BoundModel, BoundRisk
from microsim.cohort.expand import Expansion
from microsim.patients.multipliers import LevelRows, Multipliers
from microsim.hazards.cycle_probabilities import LIMIT, competing, overflow, separate
from microsim.scenario.spec import COMPETING, TableSpec


def table_band(table: TableSpec, time: float, age, time_in_state: float):
    """The band of a table at the point on its own axis (band i holds from starts[i]; a
    table by level alone has one band)."""
    if table.by is None:
        return 0
    x = {"time": time, "age": age, "time_in_state": time_in_state}[table.by]
    return np.maximum(np.searchsorted(np.asarray(table.starts), x, side="right") - 1, 0)


def on_rate_scale(p, log, m):
    """Apply hazard multiplier m to a per-cycle probability p (cumulative hazard L):
    1 - (1 - p)^m, the file's p itself where m is 1."""
    m = np.asarray(m, float)
    return np.where(m == 1.0, p, separate(log, m))


def risk_probability(risk: BoundRisk, band_at: Callable, duration: int,
                     rows: LevelRows | None = None):
    """Base per-cycle probability of a (non-remainder) risk for a batch of patients over a
    block of cycles, and its L = -ln(1 - p) (the competing rule's weight); `band_at(table,
    duration)` is the band of a table in each cycle for each patient (`table_band`);
    `rows`: the patients' rows of the risk's table by level."""
    base = risk.probability
    if not isinstance(base, TableSpec):
        return base, risk.logs[0]
    band = band_at(base, duration)
    if rows is not None:
        p = rows.band_values(band)
        with np.errstate(divide="ignore"):
            return p, -np.log1p(-p)
    return np.asarray(base.values)[band], np.asarray(risk.logs)[band]


def moves_phase(model: BoundModel, r: int) -> bool:
    """True when risk r is an event that moves the treatment phase on (`BoundModel.phase_on`
    is not the identity for it)."""
    return model.phase_on is not None and bool(
        np.any(model.phase_on[r] != np.arange(model.n_states)))


def cycle_matrices(exp: Expansion, n: int, mult: Multipliers):
    """Transition matrices (B, E, E) of cycle n and each risk's probability (B, E, R)."""
    moves, risk_p = cycle_moves(exp, np.array([n]), mult)
    P = np.zeros((exp.size, exp.size, risk_p.shape[3]))
    for e, f, weight in moves:
        P[e, f] += np.broadcast_to(weight, (1, P.shape[2]))[0]
    return np.moveaxis(P, 2, 0), np.moveaxis(risk_p[:, :, 0], 2, 0)


@dataclass(frozen=True)
class Row:
    """What a cycle can do from one expanded state that is not absorbing: model state and
    cycles in it, its named moves (the remainder aside, in the row's order), remainder,
    events, the events that split each way (`split`: those that move a count or the
    treatment phase), and its entries (target expanded state, way, pattern). Way k <
    len(moves) is moves[k]; way len(moves) is the remainder, or staying put where there is
    none; bit q of the pattern says whether split[q] happened in the cycle. The numbers of
    a cycle do not change these: both evaluations of the products read them."""
    state: int
    duration: int
    counts: tuple[int, ...]
    moves: tuple[int, ...]
    remainder: int | None
    events: tuple[int, ...]
    split: tuple[int, ...]
    combined: bool
    entries: tuple[tuple[int, int, int], ...]


def occurs(risk: BoundRisk) -> bool:
    """True when the risk happening counts as an occurrence: an event, or a move to
    another state (staying put, named or not, is neither counted nor recorded)."""
    return risk.is_event or risk.target != risk.source


def expanded_rows(exp: Expansion) -> tuple[Row | None, ...]:
    """Each expanded state's `Row` (None for an absorbing one, which keeps its patients).
    Events that move no count and not the treatment phase are summed over; the others
    split each way by which of them happened in the same cycle (each independently of the
    way and of one another, as the engines draw them). One that moves the phase on sends
    the cycle's end state to its copy in the next phase."""
    model = exp.model
    out = []
    for i, d, counts in exp.expanded:
        if model.absorbing[i]:
            out.append(None)
            continue
        row = [r for r, risk in enumerate(model.risks) if risk.source == i]
        moves = tuple(r for r in row
                      if not model.risks[r].remainder and not model.risks[r].is_event)
        remainder = next((r for r in row if model.risks[r].remainder), None)
        events = tuple(r for r in row if model.risks[r].is_event)
        split = tuple(r for r in events
                      if model.risks[r].name in exp.tracked or moves_phase(model, r))
        stay = i if model.stay_to is None else int(model.stay_to[i])
        entries = []
        for way, r in enumerate((*moves, remainder)):
            risk = None if r is None or not occurs(model.risks[r]) else model.risks[r]
            j = stay if risk is None else risk.target
            for pattern in itertools.product((False, True), repeat=len(split)):
                to, occurred = j, [] if risk is None else [risk]
                for happened, event in zip(pattern, split):
                    if happened:
                        occurred.append(model.risks[event])
                        if model.phase_on is not None:
                            to = int(model.phase_on[event, to])
                bits = sum(1 << q for q, happened in enumerate(pattern) if happened)
                entries.append((exp.target(i, d, counts, to, tuple(occurred)), way, bits))
        out.append(Row(i, d, counts, moves, remainder, events, split,
                       model.probability_rule == COMPETING and len(moves) > 1, tuple(entries)))
    return tuple(out)


def cycle_moves(exp: Expansion, cycles: np.ndarray, mult: Multipliers):
    """The nonzero entries of the transition matrices of a block of cycles, as (from, to,
    weight (T, B): per cycle of the block and patient, or a scalar) with repeats summed by
    the user, and each risk's probability (E, R, T, B): a sparse form, since a row reaches
    few expanded states and a product with it then costs its entries only. The cycles of a
    block share one pass over the expanded states, whose Python work then does not grow
    with the horizon. Absorbing states keep their patients (weight 1.0). This is the
    reference evaluation of `expanded_rows`; `microsim.cohort.compiled_products` is the
    fast one."""
    model = exp.model
    times = model.cycle * np.asarray(cycles, float)[:, None]  # (T, 1)
    m_all = mult.over(times[:, 0])  # (T, B, R)
    batch = m_all.shape[1]
    ages = None if mult.entry_age is None else mult.entry_age + times
    bands = {}

    def band_at(table: TableSpec, duration: int):
        """`table_band` in each cycle of the block, once per table and time in state."""
        key = (id(table), duration if table.by == "time_in_state" else None)
        if key not in bands:
            bands[key] = table_band(table, times, ages, duration * model.cycle)
        return bands[key]

    # state-major, patients last, so each entry is one contiguous run of patients
    entries = []
    risk_p = np.zeros((exp.size, len(model.risks), len(cycles), batch))
    for e, row in enumerate(expanded_rows(exp)):
        if row is None:
            entries.append((e, e, 1.0))
            continue
        chances = {}
        weighed = []
        for r in (*row.moves, *row.events):
            risk = model.risks[r]
            m = m_all[:, :, r] * exp.memory_factor(risk, row.counts)
            p, log = risk_probability(risk, band_at, row.duration, mult.level_rows(r))
            if risk.is_event:
                chances[r] = on_rate_scale(p, log, m)
            else:
                weighed.append((p, log, m))
        ways = (competing(weighed) if row.combined
                else [on_rate_scale(p, log, m) for p, log, m in weighed])
        total = 0.0
        for p in ways:
            total = total + p
        stay = 1.0 - total
        if not np.min(stay) >= 1.0 - LIMIT:
            t, k = np.unravel_index(np.argmin(stay), np.shape(stay))
            raise overflow(f"transitions.{model.states[row.state]}->*",
                           float(1.0 - stay[t, k]), f"the cohort's patient row {k}", int(cycles[t]))
        ways.append(np.maximum(stay, 0.0))
        chances.update(zip((*row.moves, row.remainder), ways))
        for r, p in chances.items():
            if r is not None and occurs(model.risks[r]):
                risk_p[e, r] = p
        for f, way, pattern in row.entries:
            weight = ways[way]
            for q, r in enumerate(row.split):
                weight = weight * (chances[r] if pattern >> q & 1 else 1.0 - chances[r])
            entries.append((e, f, weight))
    return entries, risk_p
