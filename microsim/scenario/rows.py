"""Rows of per-cycle probabilities: the moves out of each state as the model and each
strategy run them, the largest sum a row can reach, and the refusals of rows that could
stop being a distribution.

Under the separate rule each move takes its multiplier on its own, p' = 1 - (1 - p)^m, so
a row of two or more moves beside a remainder can sum above 1 for some patient at some
time. `row_bounds` bounds that sum from above: each base probability at its highest table
band (tables on the same axis band by band, as they are read together), each multiplier at
its highest over the attributes' ranges (HR^(x - centre) at an end of the range; levels
and yes/no as 0/1; attained age from the youngest age at time 0 to the oldest plus the
last cycle), each memory at its largest multiplier and a strategy's treatment at its
hazard ratio (a treated probability's, from its own base value). Every term is at least
any patient's own at any time, so a bound of at most 1 proves that every patient's row is
a distribution. It is vectorised over parameter sets: the base case and the one-way
settings when the file is read (and again when a population file is read), and the PSA
draws before any is simulated. Under the competing rule a row
never exceeds 1, so no bound is needed.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterator, Mapping

import numpy as np

from .checks import check_reference, level_choices, table_at
from .errors import ScenarioError
from .fields import AGE, COMPETING_PROBABILITY, TOLERANCE, Reference, listing, show
from .formulas import settings, with_derived
from .risk_changes import hazard_ratio, treated_ref
from .spec import (COMPETING, REMAINDER, SEPARATE, ChangeSpec, LineSpec, Ref, Scenario,
                   StrategySpec, TransitionSpec)

Ranges = Mapping[str, tuple[float, float]]
"""Numeric attribute -> (lowest, highest) value a patient can have at time 0."""
COMPETING_FIX = ('set time.probability_rule = "competing" (each probability then counts as '
                 "the move's probability were the others absent)")


@dataclass(frozen=True)
class Move:
    """A move of a row besides its remainder, as one strategy (or the model) runs it."""
    spec: TransitionSpec
    path: str  # transitions.<from>-><to>, under the path of the treatment that adds it
    changes: tuple[tuple[int, ChangeSpec], ...] = ()  # the treatment's changes on it, by index
    gated: bool = False  # added by the treatment for patients on treatment only


@dataclass(frozen=True)
class Row:
    """The transitions out of one non-absorbing state."""
    path: str  # transitions.<state>->*, under the treatment's path for a treatment's own
    state: str
    moves: tuple[Move, ...]  # besides the remainder, in file order
    remainder: TransitionSpec | None
    remainder_path: str | None
    treatment: str | None  # the path of the treatment (None: the model as written)


def rows(s: Scenario) -> Iterator[Row]:
    """The model's rows, then each treatment's rows that differ from them: a strategy's
    (its first treatment), and a sequence's later treatments', each with its own changes
    and added transitions (those added for a time on treatment counted as possibly on: an
    upper bound)."""
    yield from strategy_rows(s, None)
    for strategy in s.strategies:
        if strategy.changes or strategy.transitions:
            yield from strategy_rows(s, strategy)
        for line in strategy.then:
            yield from strategy_rows(s, strategy, line)


def strategy_rows(s: Scenario, strategy: StrategySpec | None, line: LineSpec | None = None
                  ) -> Iterator[Row]:
    """The rows of the model as written (`strategy` None), of a strategy's first treatment,
    or of one later treatment `line` of its sequence: the strategy's added transitions
    that act whatever the treatment, and the line's own (the first treatment's that act
    only while it is on do not exist then)."""
    if strategy is None:
        added, treatment, changes = [], None, ()
    else:
        prefix = f"strategies.{strategy.name}"
        gated = strategy.on_treatment_only
        added = [(t, prefix, t.name in gated) for t in strategy.transitions
                 if line is None or t.name not in gated]
        treatment, changes = prefix, strategy.changes
        if line is not None:
            treatment, changes = f"{prefix}.then.{line.name}", line.changes
            added += [(t, treatment, True) for t in line.transitions]
    transitions = [(t, "", False) for t in s.transitions] + added
    states = s.states + (() if strategy is None else strategy.states)
    for state in states:
        if state.absorbing:
            continue
        moves, remainder, remainder_path, changed = [], None, None, strategy is None
        for t, owner, gated in transitions:
            if t.source != state.name:
                continue
            path = f"{owner}{'.' if owner else ''}transitions.{t.where}"
            changed = changed or bool(owner)
            if t.probability == REMAINDER:
                remainder, remainder_path = t, path
                continue
            hits = tuple((i, c) for i, c in enumerate(changes)
                         if c.risk in (t.name, t.key))
            changed = changed or bool(hits)
            moves.append(Move(t, path, hits, gated))
        if (moves or remainder) and changed:
            own = "" if treatment is None else f"{treatment}."
            yield Row(f"{own}transitions.{state.name}->*", state.name, tuple(moves),
                      remainder, remainder_path, treatment)


def row_names(s: Scenario, row: Row) -> list[str]:
    """The parameters the row's moves read: probabilities (and their tables' entries),
    hazard ratios, memory, treatment."""
    refs = []
    for move in row.moves:
        p = move.spec.probability
        refs += list(s.tables[p].names) if p in s.tables else [p]
        refs += [e.hazard_ratio for e in move.spec.effects]
        for m in move.spec.memory:
            refs += m.multipliers if m.multipliers is not None else [m.multiplier]
        refs += [treated_ref(c) for _, c in move.changes]
    return list(dict.fromkeys(r for r in refs if isinstance(r, str)))


# -- structure: what every rule needs ------------------------------------------------------

def check_row_structure(s: Scenario) -> list[Reference]:
    """Refuse rows that cannot stay a distribution whatever the numbers; return the uses
    the competing rule adds (probabilities beside other moves must be below 1), checked."""
    rule = s.time.probability_rule
    if not s.discrete:
        if rule == COMPETING:
            raise ScenarioError("time.probability_rule", 'is "competing", which combines '
                                "per-cycle probabilities, but this is a rate model (its "
                                "competing risks are exact already); remove it")
        return []
    uses = []
    for row in rows(s):
        if row.remainder is not None:
            refuse_remainder_effects(row)
        else:
            refuse_effects_without_remainder(row)
        if rule == COMPETING and len(row.moves) > 1:
            if row.remainder is None:
                raise ScenarioError(row.path, f'under probability_rule = "competing" the moves '
                                    f"from {row.state!r} combine to less than 1, and the rest "
                                    'needs a transition with probability = "remainder" to go '
                                    f"to; add one (often from {row.state!r} to itself)")
            uses += competing_uses(s, row)
    return list(dict.fromkeys(uses))  # a strategy's rows repeat the model's moves


def refuse_remainder_effects(row: Row) -> None:
    for key in ("effects", "memory"):
        if getattr(row.remainder, key):
            raise ScenarioError(f"{row.remainder_path}.{key}[0]", "the remainder takes what "
                                "the other transitions of its row leave, so effects and memory "
                                "on it change nothing; put them on the other transitions")


def refuse_effects_without_remainder(row: Row) -> None:
    """A row without a remainder sums to 1 as written; any multiplier would break that."""
    why = (f"{row.state!r} has no transition with probability = \"remainder\", so a multiplier "
           "on its moves would leave the row summing to other than 1; add one to the row "
           f"(often from {row.state!r} to itself)")
    for move in row.moves:
        for key in ("effects", "memory"):
            if getattr(move.spec, key):
                raise ScenarioError(f"{move.path}.{key}[0]", why)
        if move.changes:
            raise ScenarioError(f"{row.treatment}.changes[{move.changes[0][0]}].transition", why)
        if move.gated:
            raise ScenarioError(f"{move.path}.while_treated", f"is true (the default), but {why}")


def competing_uses(s: Scenario, row: Row) -> list[Reference]:
    uses = []
    for move in row.moves:
        path, value = f"{move.path}.probability", move.spec.probability
        if isinstance(value, str):
            use = Reference(value, path, COMPETING_PROBABILITY, tables_allowed=True)
            check_reference(s, use)
            uses.append(use)
        elif COMPETING_PROBABILITY.problem(value):
            raise ScenarioError(path, f"{COMPETING_PROBABILITY.problem(value)}: a certain move "
                                "leaves the others nothing to compete for; make it the only "
                                "move of its row, or give a value below 1")
    return uses


# -- the bound under the separate rule ------------------------------------------------------

@dataclass(frozen=True)
class RowBound:
    row: Row
    bound: np.ndarray  # (D,) the largest sum the row's moves can reach, per parameter set
    base: np.ndarray  # (D,) the same without multipliers (every patient at hazard ratio 1)
    drivers: tuple[tuple[str, bool, np.ndarray], ...]  # (what, an attribute?, log multiplier (D,))
    tables: bool  # some move reads a table (its highest band counts)


def attribute_ranges(s: Scenario, columns: Ranges | None = None) -> dict[str, tuple[float, float]]:
    """The values each numeric attribute can take at time 0: from the population spec
    (normal: lower..upper, infinite when not truncated; lognormal and gamma 0..inf; uniform
    lower..upper; beta 0..1; yes/no 0..1), from a population file's `columns` once it is
    read, and `age` from start.age when no attribute gives it. Attributes missing here (file
    columns before the file is read) add nothing to a bound."""
    ranges = {} if s.start.age is None else {AGE: (s.start.age, s.start.age)}
    ranges.update(columns or {})
    for a in s.population.attributes if s.population else ():
        p = a.params
        support = {"normal": (p.get("lower"), p.get("upper")), "uniform": (p.get("lower"),
                   p.get("upper")), "lognormal": (0.0, math.inf), "gamma": (0.0, math.inf),
                   "beta": (0.0, 1.0), "yesno": (0.0, 1.0)}
        if a.distribution in support:
            ranges[a.name] = support[a.distribution]
    return ranges


def row_bounds(s: Scenario, values: Mapping[str, np.ndarray], ranges: Ranges) -> list[RowBound]:
    """Under the separate rule, the bound of every row with two or more moves besides its
    remainder, for each parameter set (`values`: every parameter -> (D,) values)."""
    if not s.discrete or s.time.probability_rule != SEPARATE:
        return []
    span = (s.time.n_cycles - 1) * s.time.cycle  # attained age grows until the last cycle
    size = len(next(iter(values.values()))) if values else 1
    values = with_derived(s.parameters, values)

    def value(ref: Ref) -> np.ndarray:
        return np.asarray(values[ref] if isinstance(ref, str) else ref, float)

    found, model = [], {}
    for row in rows(s):
        if len(row.moves) < 2:
            continue
        drivers, terms = [], []
        for move in row.moves:
            found_terms = move_multiplier(move, row.treatment, value, ranges, span)
            drivers += [(what, attribute, np.broadcast_to(log, (size,)))
                        for what, attribute, log in found_terms]
            terms.append(np.exp(sum(log for *_, log in found_terms)) if found_terms else 1.0)
        bound = np.broadcast_to(row_sum(s, row, value, terms), (size,))
        if row.treatment is None:
            model[row.state] = bound
        elif row.state in model and np.array_equal(bound, model[row.state]):
            continue  # the strategy cannot raise this row: its verdicts are the model's
        base = np.broadcast_to(row_sum(s, row, value, [1.0] * len(terms)), (size,))
        tables = any(isinstance(m.spec.probability, str) and m.spec.probability in s.tables
                     for m in row.moves)
        found.append(RowBound(row, bound, base, tuple(drivers), tables))
    return found


def row_sum(s: Scenario, row: Row, value, multipliers) -> np.ndarray:
    """The largest sum of the row's moves, each move's probability taking its multiplier
    (D,) on the rate scale, tables at their highest band (band by band on one axis, level by
    level for tables by level, the largest over the levels a patient can have)."""
    total, by_axis = 0.0, {}
    for move, m in zip(row.moves, multipliers):
        p = move.spec.probability
        if isinstance(p, str) and p in s.tables:
            by_axis.setdefault(s.tables[p].by, []).append((s.tables[p], np.asarray(m)))
        else:
            total = total + on_rate_scale(value(p), m)
    for tables in by_axis.values():  # tables on the same axis are read at the same point
        points = np.unique(np.concatenate([t.starts for t, _ in tables]))
        bands = [sum(on_rate_scale(table_at(t, points, choice, value), m[..., None])
                     for t, m in tables)
                 for choice in level_choices([t for t, _ in tables])]
        total = total + np.max(np.broadcast_arrays(*bands), axis=(0, -1))  # levels may differ in D
    return total


def on_rate_scale(p, m):
    """1 - (1 - p)^m: p = 0 stays 0 and p = 1 stays 1 for any m > 0, m = inf takes p > 0 to 1."""
    with np.errstate(over="ignore"):
        return 1.0 - np.power(1.0 - p, m)


def move_multiplier(move: Move, treatment: str | None, value, ranges: Ranges, span: float
                    ) -> list[tuple[str, bool, np.ndarray]]:
    """The largest log multiplier each effect, memory and treatment can give the move:
    (what, whether it is an attribute, log multiplier (D,))."""
    terms, levels = [], {}
    for e in move.spec.effects:
        log_hr = value(e.hazard_ratio) if e.coefficient else np.log(value(e.hazard_ratio))
        if e.level is not None:  # an indicator: 0 or 1, and one level per patient
            levels[e.attribute] = np.maximum(levels.get(e.attribute, 0.0), log_hr)
        elif e.attribute in ranges:
            low, high = ranges[e.attribute]
            high = high + span if e.attribute == AGE else high
            with np.errstate(invalid="ignore"):
                ends = np.maximum(log_hr * (low - e.centre), log_hr * (high - e.centre))
            terms.append((e.attribute, True, np.where(log_hr == 0, 0.0, ends)))
    terms += [(name, True, log) for name, log in levels.items()]
    for m in move.spec.memory:
        most = (np.max(np.stack(np.broadcast_arrays(*map(value, m.multipliers))), axis=0)
                if m.multipliers is not None else np.maximum(value(m.multiplier), 1.0))
        terms.append((f"memory of {m.after}", False, np.log(most)))
    if move.changes or move.gated:
        on = np.prod(np.stack(np.broadcast_arrays(
            *(hazard_ratio(c, value, move.spec.probability) for _, c in move.changes),
            np.asarray(1.0))), axis=0)
        terms.append((f"the hazard ratio of {treatment}", False,
                      np.log(np.maximum(on, 0.0 if move.gated else 1.0))))
    return terms


def parameter_settings(s: Scenario) -> tuple[dict[str, np.ndarray], list[str]]:
    """The base case and every one-way setting (each ranged parameter at low, then high),
    as (D,) values per parameter, with the words that name each setting."""
    labels, found = zip(*settings(s.parameters))
    return {name: np.array([v[name] for v in found], float) for name in s.parameters}, \
        list(labels)


def check_row_bounds(s: Scenario, columns: Ranges | None = None) -> None:
    """Refuse, under the separate rule, a row whose bound exceeds 1 at the base case or a
    one-way setting. `columns`: a population file's numeric ranges, once it is read."""
    values, labels = parameter_settings(s)
    for found in row_bounds(s, values, attribute_ranges(s, columns)):
        above = np.flatnonzero(found.bound > 1.0 + TOLERANCE)
        if above.size:
            raise ScenarioError(found.row.path, too_high(found, above[0], labels[above[0]]))


def too_high(found: RowBound, k: int, setting: str = "") -> str:
    """Why row bound k exceeds 1, and the ways out."""
    state, total = found.row.state, show(float(found.bound[k]))
    band = " (in the highest table band)" if found.tables else ""
    if found.base[k] > 1.0 + TOLERANCE:
        return (f"probabilities from {state!r} other than the remainder sum to "
                f"{show(float(found.base[k]))}{band}{setting}, above 1; lower them so that the "
                f"remainder is not negative, or {COMPETING_FIX}")
    drivers = [(what, attribute, np.isinf(log[k])) for what, attribute, log in found.drivers
               if log[k] > 0]
    names = dict.fromkeys(what + (" (unbounded)" if inf else "") for what, _, inf in drivers)
    unbounded = dict.fromkeys(what for what, attribute, inf in drivers if attribute and inf)
    fixes = [COMPETING_FIX] + ([f"bound {listing(unbounded)} (a normal attribute takes "
                                "upper; a lognormal or gamma one has no bound, so draw it "
                                "as a normal with upper, or a uniform)"] if unbounded else [])
    return (f"under the separate probability rule the probabilities from {state!r} other than "
            f"the remainder can sum to {total}{setting} (each at its highest over patients and "
            f"time{band and ', tables at their highest band'}), above 1, driven by "
            f"{listing(names)}; {', or '.join(fixes + ['lower the effects'])}")
