"""Second pass: cross-references and whole-model rules, on the specs the first pass built.

Refusals raise `ScenarioError`; softer findings come back as one-line warnings that start
with a field path. The checks run in an order where each may rely on the ones before
(every state, parameter and table name resolves before rows are summed).
"""
from __future__ import annotations

import itertools
import math
from dataclasses import replace
from typing import Iterable, Sequence

import numpy as np

from .errors import ScenarioError
from .fields import (AGE, TOLERANCE, Reading, Reference, closest, describe, did_you_mean,
                     listing, show, undefined)
from .formulas import settings
from .read_parameters import support
from .read_population import lowest_value, normal_mass
from .spec import (REMAINDER, AttributeSpec, EventSpec, Ref, Scenario, TableSpec,
                   TransitionSpec)

MAX_LISTED = 12  # levels named in one message
NO_AGE = 'no age is known; give start.age or a population attribute named "age"'
Occurrence = TransitionSpec | EventSpec


def check_scenario(s: Scenario, reading: Reading) -> list[str]:
    """Refuse what cannot be modelled; return warnings about what looks unintended."""
    check_states(s)
    check_names(s)
    for reference in reading.references:
        check_reference(s, reference)
    check_kind(s)
    check_memory(s)
    check_effects(s, reading)
    check_level_tables(s, reading)
    check_age_known(s, reading)
    if s.discrete:
        for state in s.states:
            check_row(s, state.name)
        check_correction(s)
    if s.time.horizon is None:
        check_lifetime(s)
    return warnings(s, reading)


def check_correction(s: Scenario) -> None:
    """Simpson's 1/3 rule weighs the cycle points in pairs: it needs an even number of
    cycles (Elbasha & Chhatwal 2016)."""
    n = s.time.n_cycles
    if s.outcomes.correction == "simpson" and n % 2:
        length = "horizon" if s.time.horizon is not None else "lifetime_cap"
        raise ScenarioError("outcomes.correction", f'"simpson" needs an even number of cycles, '
                            f"but time.{length} gives {n}; make it {n + 1} cycles "
                            f'({show((n + 1) * s.time.cycle)} {s.time.unit}) or use "trapezoidal"')


def occurrences(s: Scenario) -> list[tuple[str, Occurrence]]:
    """Every transition and event with its field path."""
    return ([(f"transitions.{t.where}", t) for t in s.transitions]
            + [(f"events.{e.name}", e) for e in s.events])


def unknown_state(name: str, state_names: Sequence[str]) -> str:
    return (f"unknown state {name!r}{did_you_mean(name, state_names)}; "
            f"states: {listing(state_names)}")


def unknown_attribute(s: Scenario, name: str, kinds: Sequence[str] | dict) -> str:
    """Why a patient attribute cannot be used: there is no population, or it lacks `name`."""
    if s.population is None:
        return (f"the scenario has no [population], so no attribute {name!r}; define it under "
                "[[population.attributes]]")
    return (f"the population has no attribute {name!r}{did_you_mean(name, kinds)}; "
            f"attributes: {listing(kinds)}")


def check_states(s: Scenario) -> None:
    absorbing = {st.name for st in s.states if st.absorbing}
    seen: dict[str, TransitionSpec] = {}
    for t in s.transitions:
        path = f"transitions.{t.where}"
        for end, key in ((t.source, "from"), (t.target, "to")):
            if end not in s.state_names:
                raise ScenarioError(f"{path}.{key}", unknown_state(end, s.state_names))
        if t.source in absorbing:
            raise ScenarioError(f"{path}.from", f"{t.source!r} is absorbing; an absorbing "
                                "state has no outgoing transitions (patients stay in it)")
        if t.key in seen and t.key in (t.name, seen[t.key].name):
            raise ScenarioError(path, f"a second transition from {t.source!r} to "
                                f"{t.target!r} without a name of its own; give each way "
                                'between the same two states a name (name = "...", e.g. '
                                "the cause), or merge them")
        seen[t.key] = t
    for e in s.events:
        kind = "probability" if e.probability is not None else "rate"
        for i, name in enumerate(e.states):
            path = f"events.{e.name}." + (f"{kind}.{name}" if e.by_state else f"states[{i}]")
            if name not in s.state_names:
                raise ScenarioError(path, unknown_state(name, s.state_names))
            if name in absorbing:
                raise ScenarioError(path, f"{name!r} is absorbing; events can only happen in "
                                          "non-absorbing states")


def check_names(s: Scenario, added: Iterable[tuple[str, TransitionSpec]] = ()) -> None:
    """Transition and event names are distinct and differ from state names, so that a
    memory's `after` means one thing. `added`: a strategy's added transitions with their
    paths, checked after the model's own."""
    taken: dict[str, str] = {}
    for path, occurrence in [*occurrences(s), *added]:
        name = occurrence.name
        if name in s.state_names:
            raise ScenarioError(f"{path}.name", f"{name!r} is a state name; give transitions "
                                "and events names that no state has")
        if name in taken:
            raise ScenarioError(f"{path}.name", f"{name!r} is already the name of "
                                f"{taken[name]}; transition and event names must be distinct")
        taken[name] = path


def check_reference(s: Scenario, ref: Reference) -> None:
    """A name in a number slot must be defined, and its values must suit the slot."""
    role = ref.role
    if ref.name in s.tables:
        if not ref.tables_allowed:
            raise ScenarioError(ref.path, f"{ref.name!r} is a table; a table can give a "
                                "probability or rate of a transition or event, or a cost or "
                                "a utility, but not this value")
        table = s.tables[ref.name]
        if ref.table_axes is not None and table.by not in ref.table_axes:
            raise ScenarioError(ref.path, f"table {ref.name!r} is by {table.by}; a cost or a "
                                "utility can read a table by level, by age or by time (since "
                                "the start); give values by time in state through tunnel "
                                "states instead")
        check_table_covers(s, table, ref)
        for where, value in table.entries():
            problem = None if isinstance(value, str) else role.problem(value)
            if problem:
                raise ScenarioError(where, f"{problem} (the table is used at {ref.path})")
        for use in entry_uses(s, [ref]):
            check_reference(s, use)
        return
    if ref.name not in s.parameters:
        what, known = "parameter", list(s.parameters)
        if ref.tables_allowed:
            what, known = "parameter or table", known + list(s.tables)
        raise ScenarioError(ref.path, undefined(what, ref.name, known,
                                                (REMAINDER,) if ref.remainder_allowed else ()))
    p = s.parameters[ref.name]
    where = f"parameters.{p.name}"
    if p.formula is not None:
        check_derived(s, ref)
        return
    for key, value in (("", p.value), (".low", p.low), (".high", p.high)):
        problem = None if value is None else role.problem(value)
        if problem:
            raise ScenarioError(where + key, f"{problem} (it is used as {role.noun} at "
                                             f"{ref.path})")
    if (p.distribution is not None and p.distribution.family != "fixed"
            and s.uncertainty.invalid_draws == "refuse"):  # else each draw is checked
        lowest, highest = support(p.distribution, p.value)
        if not role.holds_on(lowest, highest):
            raise ScenarioError(f"{where}.distribution",
                                f"a {p.distribution.family} distribution draws values from "
                                f"{show(lowest)} to {show(highest)}, but {p.name!r} is used as "
                                f"{role.noun} at {ref.path} ({role.rule}); choose a "
                                "distribution that stays in that range, or set "
                                'uncertainty.invalid_draws = "redraw" or "truncate"')


def entry_uses(s: Scenario, uses: Iterable[Reference]) -> list[Reference]:
    """The uses of the parameters that tables' entries name: each entry is used as whatever
    its table is used as, so its values (base, one-way, each PSA draw) are checked as a
    number typed in there would be."""
    found = []
    for use in uses:
        table = s.tables.get(use.name)
        for where, value in table.entries() if table is not None else ():
            if isinstance(value, str):
                found.append(Reference(value, f"{where} (the table is used at {use.path})",
                                       use.role))
    return list(dict.fromkeys(found))


def check_table_covers(s: Scenario, table: TableSpec, ref: Reference,
                       youngest: float | None = None) -> None:
    """A table by time or time in state must start at 0, and one by age at or below the
    youngest age a patient can have at time 0 (`youngest`, else `youngest_age`; a start at
    0 covers every age): every patient needs a value, a rate or a probability throughout,
    which the first value carried below the first start would only pretend to give. One
    rule for every use, a hazard's as a cost's."""
    if table.by is None:
        return
    first = table.starts[0]
    where = f"tables.{table.name}.starts"
    if table.by != AGE and first > 0:
        clock = "time 0" if table.by == "time" else "0 (entering the state)"
        raise ScenarioError(where, f"starts at {show(first)}, but {ref.path} needs a value "
                            f"from {clock}; make the first start 0")
    youngest = youngest_age(s) if youngest is None else youngest
    if youngest == -math.inf:
        return  # an untruncated normal's tail: a warning gives the share below (`warnings`)
    if table.by == AGE and youngest is not None and first > max(youngest, 0.0):
        raise ScenarioError(where, f"starts at age {show(first)}, but a patient can be "
                            f"{show(youngest)} at time 0 and {ref.path} needs a value at "
                            f"every age; make the first start at most {show(max(youngest, 0.0))} "
                            "(0 covers every age)")


def table_uses(s: Scenario) -> list[Reference]:
    """The uses of tables, as hazards, costs or utilities."""
    return [r for r in s.uses if r.name in s.tables]


def check_derived(s: Scenario, ref: Reference) -> None:
    """A derived parameter's values at the base case and every one-way setting must suit
    the slot (its PSA draws are checked draw by draw, `uncertainty.draw_checks`)."""
    for label, values in settings(s.parameters):
        problem = ref.role.problem(values[ref.name])
        if problem:
            raise ScenarioError(f"parameters.{ref.name}.formula",
                                f"gives {show(values[ref.name])}{label}, but it is used as "
                                f"{ref.role.noun} at {ref.path}: {problem}; change the "
                                "formula or the values it reads")


def check_kind(s: Scenario) -> None:
    """All per-cycle probabilities (discrete time) or all rates/hazards (continuous)."""
    n_discrete = sum(t.probability is not None for t in s.transitions)
    n_continuous = len(s.transitions) - n_discrete
    discrete = n_discrete > n_continuous or (
        n_discrete == n_continuous and s.transitions[0].probability is not None)
    others = ("per-cycle probabilities (a discrete-time model)" if discrete
              else "rates or hazards (a continuous-time model)")
    for path, occurrence in occurrences(s):
        if (occurrence.probability is not None) != discrete:
            uses = "a rate or hazard" if discrete else "a per-cycle probability"
            whose = "other transitions" if isinstance(occurrence, TransitionSpec) else \
                "transitions"
            raise ScenarioError(path, f"uses {uses}, but the {whose} use {others}; a scenario "
                                "uses one kind throughout")
    for t in s.transitions:
        if not discrete and t.source == t.target:
            raise ScenarioError(f"transitions.{t.where}.to", f"a rate from {t.source!r} to "
                                "itself changes nothing; use [[events]] for something that "
                                "happens without a change of state")


def check_memory(s: Scenario) -> None:
    known = list(s.state_names) + [o.name for _, o in occurrences(s)]
    for path, occurrence in occurrences(s):
        for i, memory in enumerate(occurrence.memory):
            if memory.after not in known:
                raise ScenarioError(f"{path}.memory[{i}].after",
                                    f"{memory.after!r} is not a transition, event or state "
                                    f"name{did_you_mean(memory.after, known)}; choose one "
                                    f"of: {listing(known)}")


def attribute_kinds(s: Scenario, reading: Reading) -> dict[str, tuple[str, tuple[str, ...]]]:
    """Attribute name -> (continuous | categorical | yesno | column, levels); `age` is
    known from start.age too."""
    kinds: dict[str, tuple[str, tuple[str, ...]]] = {}
    if s.start.age is not None:
        kinds[AGE] = ("continuous", ())
    kinds.update(population_kinds(s, reading))
    return kinds


def population_kinds(s: Scenario, reading: Reading) -> dict[str, tuple[str, tuple[str, ...]]]:
    """The attributes each simulated patient carries (drawn, file columns, bands), as in
    `attribute_kinds`."""
    kinds: dict[str, tuple[str, tuple[str, ...]]] = {}
    population = s.population
    if population is not None:
        kinds.update(reading.file_columns or {})
        for a in population.attributes:
            kinds[a.name] = ("continuous", ()) if a.continuous else \
                (a.distribution, tuple(a.params.get("levels", ())))
        kinds.update((d.name, ("categorical", d.labels)) for d in population.derived)
    return kinds


def level_listing(levels: Sequence) -> str:
    """Levels for a message, cut after MAX_LISTED (a file column may have thousands)."""
    shown = listing(describe(level) for level in levels[:MAX_LISTED])
    more = len(levels) - MAX_LISTED
    return shown + (f" and {more} more" if more > 0 else "")


def not_a_level(value, name: str, levels: Sequence, reading: Reading) -> str:
    """Why a level given for a categorical attribute (or file column) cannot be used."""
    called = f"column {name!r}" if name in (reading.file_columns or {}) else repr(name)
    close = closest(value, levels) if isinstance(value, str) else None
    hint = f"; did you mean {close!r}?" if close else ""
    return f"{describe(value)} is not a level of {called} (levels: {level_listing(levels)}{hint})"


def check_effects(s: Scenario, reading: Reading) -> None:
    kinds = attribute_kinds(s, reading)
    for path, effects in [("start", s.start.effects)] + [
            (path, o.effects) for path, o in occurrences(s)]:
        for i, effect in enumerate(effects):
            here, name = f"{path}.effects[{i}]", effect.attribute
            if name not in kinds:
                raise ScenarioError(f"{here}.attribute", unknown_attribute(s, name, kinds))
            kind, levels = kinds[name]
            if kind == "categorical" and effect.level is None:
                raise ScenarioError(f"{here}.level", f"is required: {name!r} is categorical; "
                                    f"give the level the hazard ratio applies to, one of "
                                    f"{level_listing(levels)}")
            if kind == "categorical" and effect.level not in levels:
                raise ScenarioError(f"{here}.level",
                                    not_a_level(effect.level, name, levels, reading))
            if kind == "yesno" and effect.level is not None:
                raise ScenarioError(f"{here}.level", f"{name!r} is a yes/no attribute: the "
                                    "hazard ratio applies when yes; remove level")
            if kind in ("categorical", "yesno") and effect.centre != 0.0:
                what = "categorical" if kind == "categorical" else "a yes/no attribute"
                raise ScenarioError(f"{here}.centre", f"is only used with continuous "
                                    f"attributes; {name!r} is {what}")
            if kind == "continuous" and effect.level is not None:
                raise ScenarioError(f"{here}.level", f"{name!r} is continuous: the hazard "
                                    "ratio applies per unit (HR^(x - centre)); level is only "
                                    "for categorical attributes")


def check_level_tables(s: Scenario, reading: Reading) -> None:
    """A table by an attribute's levels needs a categorical attribute of the population and
    gives values for exactly its levels."""
    kinds = population_kinds(s, reading)
    for table in s.tables.values():
        name = table.attribute
        if name is None:
            continue
        here = f"tables.{table.name}"
        if name not in kinds:
            raise ScenarioError(f"{here}.attribute", unknown_attribute(s, name, kinds))
        kind, levels = kinds[name]
        if kind == "column":
            continue  # a file's column: checked when the file is read
        if kind != "categorical":
            what = "yes/no" if kind == "yesno" else kind
            raise ScenarioError(f"{here}.attribute", f"{name!r} is {what}; a table by level "
                                "needs a categorical attribute (or a band of a continuous one, "
                                "[[population.derived]])")
        for level in table.levels:
            if level not in levels:
                raise ScenarioError(f"{here}.values.{level}",
                                    not_a_level(level, name, levels, reading))
        missing = [level for level in levels if level not in table.levels]
        if missing:
            raise ScenarioError(f"{here}.values", f"gives no values for {level_listing(missing)} "
                                f"of {name!r}; give values for every level "
                                f"({level_listing(levels)})")


def level_choices(tables: Iterable[TableSpec]) -> list[dict[str, int]]:
    """Every combination of levels a patient can have, as {attribute: row}, over the
    attributes by which `tables` are (one empty choice when none is by level)."""
    levels = {t.attribute: len(t.levels) for t in tables if t.attribute is not None}
    return [dict(zip(levels, rows)) for rows in itertools.product(*map(range, levels.values()))]


def age_known(s: Scenario, reading: Reading) -> bool:
    population = s.population
    return (s.start.age is not None
            or (population is not None and any(a.name == AGE for a in population.attributes))
            or AGE in (reading.file_columns or ()))


def check_age_known(s: Scenario, reading: Reading) -> None:
    if age_known(s, reading):
        return
    for table in s.tables.values():
        if table.by == AGE:
            raise ScenarioError(f"tables.{table.name}.by", f'is "age", but {NO_AGE}')
    for path, occurrence in occurrences(s):
        if occurrence.clock == AGE:
            raise ScenarioError(f"{path}.clock", f'is "age", but {NO_AGE}')


def table_at(table: TableSpec, points: np.ndarray, choice: dict[str, int] | None = None,
             value=float) -> np.ndarray:
    """The step function at `points` (of the row of the level `choice` picks, for a table
    by level); the first value holds before the first start. `value` gives each entry's
    number, or (D,) numbers for D parameter sets: the result is then (D, points)."""
    index = np.searchsorted(np.asarray(table.starts), points, side="right") - 1
    row = table.rows[(choice or {}).get(table.attribute, 0)]
    bands = np.stack(np.broadcast_arrays(*map(value, row)), axis=-1)
    return bands[..., np.clip(index, 0, None)]


def check_row(s: Scenario, state: str) -> None:
    """A non-absorbing state's row has at most one remainder, and without one its
    probabilities sum to 1 at base-case values, in every band of every table (and for every
    level of tables by level). (Beside a remainder, the largest sum a row can reach is
    bounded in `rows.check_row_bounds`.)"""
    row = [t for t in s.transitions if t.source == state]
    constant, remainder = 0.0, None
    tables_by_axis: dict[str | None, list[TableSpec]] = {}
    for t in row:
        if t.probability == REMAINDER:
            if remainder is not None:
                raise ScenarioError(f"transitions.{t.where}.probability", f'a second "remainder" '
                                    f"from {state!r} (the first is {remainder.key}); at most "
                                    "one transition per state takes the remainder")
            remainder = t
        elif isinstance(t.probability, str) and t.probability in s.tables:
            table = s.tables[t.probability].at(base_values(s))
            tables_by_axis.setdefault(table.by, []).append(table)
        elif isinstance(t.probability, str):
            constant += s.parameters[t.probability].value
        else:
            constant += t.probability
    if not row:
        return  # no way out: the state keeps everyone (an implicit self-loop)
    if remainder is not None:
        return  # the largest sum beside it is bounded in rows.py
    low = high = constant
    for tables in tables_by_axis.values():  # different axes vary independently
        points = np.unique(np.concatenate([t.starts for t in tables]))
        total = np.array([sum(table_at(t, points, choice) for t in tables)
                          for choice in level_choices(tables)])
        low, high = low + float(total.min()), high + float(total.max())
    if abs(low - 1.0) > TOLERANCE or abs(high - 1.0) > TOLERANCE:
        total = show(low) if low == high else \
            f"between {show(low)} and {show(high)} across the table bands"
        raise ScenarioError(f"transitions.{state}->*", f"probabilities from {state!r} sum to "
                            f"{total}, not 1; add a transition with probability = "
                            '"remainder" or fix the values')


def base_values(s: Scenario) -> dict[str, float]:
    """Every parameter at its base-case value (derived ones computed)."""
    return {name: p.value for name, p in s.parameters.items()}


def may_be_positive(s: Scenario, value: Ref) -> bool:
    """False only for values that are zero in every binding (literal 0, all-zero table,
    parameter fixed at 0)."""
    if value == REMAINDER:
        return True
    if isinstance(value, str) and value in s.tables:
        return any(may_be_positive(s, v) for v in s.tables[value].values)
    if isinstance(value, str):
        p = s.parameters[value]
        return p.value != 0 or (p.distribution is not None and p.distribution.family != "fixed")
    return value != 0


def can_happen(s: Scenario, t: TransitionSpec) -> bool:
    if t.probability is not None:
        return may_be_positive(s, t.probability)
    if t.hazard.family in ("constant", "table"):
        return may_be_positive(s, next(iter(t.hazard.params.values())))
    return True


def closure(starts: Iterable[str], edges: dict[str, set[str]]) -> set[str]:
    seen, stack = set(starts), list(starts)
    while stack:
        for nxt in edges.get(stack.pop(), ()):
            if nxt not in seen:
                seen.add(nxt)
                stack.append(nxt)
    return seen


def capacity_moves(s: Scenario) -> list[tuple[str, str]]:
    """The moves shared resources add: a patient who would enter a state that holds a unit
    may wait (or be turned away) instead, and waiting patients are admitted (or give up)."""
    moves = []
    for r in s.capacity.resources if s.capacity is not None else ():
        moves += [(r.state, r.waiting[0])] + [(w, r.state) for w in r.waiting]
        moves += [(r.state, r.turned_away)] if r.turned_away else []
        moves += [(w, r.leave_to) for w in r.waiting] if r.leave_to else []
    return moves


def reachable_from_start(s: Scenario) -> tuple[set[str], list[tuple[str, str]]]:
    """The states patients can reach, and the moves (from, to) that can happen."""
    moves = [(t.source, t.target) for t in s.transitions
             if t.source != t.target and can_happen(s, t)] + capacity_moves(s)
    forward: dict[str, set[str]] = {}
    for source, target in moves:
        forward.setdefault(source, set()).add(target)
    starts = [name for name, share in s.start.shares.items() if share > 0]
    return closure(starts, forward), moves


def check_lifetime(s: Scenario) -> None:
    """A lifetime horizon ends when everyone is absorbed: from every state a patient can
    reach, some absorbing state must be reachable."""
    if not any(st.absorbing for st in s.states):
        raise ScenarioError("time.horizon", 'is "lifetime", but no state is absorbing '
                            f"(absorbing = true); give a number of {s.time.unit} or mark the "
                            "state(s) patients end in as absorbing")
    reachable, moves = reachable_from_start(s)
    backward: dict[str, set[str]] = {}
    for source, target in moves:
        backward.setdefault(target, set()).add(source)
    can_end = closure([st.name for st in s.states if st.absorbing], backward)
    for name in s.state_names:
        if name in reachable and name not in can_end:
            raise ScenarioError("time.horizon", f'is "lifetime", but patients in {name!r} '
                                "(reachable from the start) can never reach an absorbing "
                                f"state; give a number of {s.time.unit} or add a transition "
                                "to an absorbing state")


def age_attribute(s: Scenario) -> AttributeSpec | None:
    """The population attribute named age (the age at time 0), if there is one."""
    attributes = s.population.attributes if s.population else ()
    return next((a for a in attributes if a.name == AGE), None)


def youngest_age(s: Scenario) -> float | None:
    """The lowest age anyone can have at time 0, when it is known."""
    age = age_attribute(s)
    ages = [x for x in (s.start.age, None if age is None else lowest_value(age)) if x is not None]
    return min(ages) if ages else None


def younger_share(s: Scenario, age: float) -> float:
    """The share of patients younger than `age` at time 0 under the age attribute's
    distribution, for the families that can start below 0: a normal truncated to
    [lower, upper], P(lower < X < age) / P(lower < X < upper) through the error function,
    and a uniform."""
    a = age_attribute(s)
    p = a.params
    if a.distribution == "normal":
        below = min(max(age, p["lower"]), p["upper"])
        return min(normal_mass(p["mean"], p["sd"], p["lower"], below)
                   / normal_mass(p["mean"], p["sd"], p["lower"], p["upper"]), 1.0)
    if a.distribution == "uniform":
        return min(max((age - p["lower"]) / (p["upper"] - p["lower"]), 0.0), 1.0)
    raise ValueError(f"a {a.distribution} attribute starts at 0")


def age_readers(s: Scenario, used: set[str]) -> list[str]:
    """The field paths that need a patient's age (docs/scenario-format.md, *[start]*):
    tables by age the model uses (`used`: the names the file uses), hazards on the age
    clock and effects of age, in the model, its start and every strategy's treatments."""
    found = [f"tables.{name}" for name, t in s.tables.items() if t.by == AGE and name in used]
    found += [f"start.effects[{i}]" for i, e in enumerate(s.start.effects) if e.attribute == AGE]
    models = [("", s)] + [(f"strategies.{x.name}{'' if line is x else f'.then.{line.name}'}.",
                           replace(s, transitions=line.transitions, events=line.events))
                          for x in s.strategies for line in (x, *x.then)]
    for prefix, model in models:
        for path, o in occurrences(model):
            from_table = o.hazard is not None and o.hazard.family == "table"  # named above
            found += [f"{prefix}{path}.clock"] if o.clock == AGE and not from_table else []
            found += [f"{prefix}{path}.effects[{i}]" for i, e in enumerate(o.effects)
                      if e.attribute == AGE]
    return found


def negative_ages(s: Scenario, used: set[str]) -> str | None:
    """A warning where the model reads age and the age attribute's distribution can give
    ages below 0 (a normal without lower >= 0, a uniform from below 0; lognormal, gamma and
    beta start at 0): the share of patients who start below 0, and the fix."""
    age = age_attribute(s)
    readers = age_readers(s, used) if age is not None and lowest_value(age) < 0 else []
    if not readers:
        return None
    lower = lowest_value(age)
    bound = f"lower = {show(lower)}" if math.isfinite(lower) else "no lower"
    more = f" (and {len(readers) - 1} more)" if len(readers) > 1 else ""
    return (f"population.attributes.{AGE}: a share of {younger_share(s, 0.0):.3g} of the "
            f"patients start at a negative age (a {age.distribution} with {bound}), which "
            f"{readers[0]}{more} reads; give lower = 0")


def warnings(s: Scenario, reading: Reading) -> list[str]:
    used = {r.name for r in reading.references + entry_uses(s, reading.references)}
    used |= {n.name for p in s.parameters.values() if p.formula for n in p.formula.names}
    found = [f"parameters.{n}: defined but not used" for n in s.parameters if n not in used]
    found += [f"tables.{n}: defined but not used" for n in s.tables if n not in used]
    reachable, _ = reachable_from_start(s)
    found += [f"states.{n}: not reachable from the start (no start share, and no transition "
              "that can happen leads to it)" for n in s.state_names if n not in reachable]
    for key in ("discount_costs", "discount_effects"):
        rate = getattr(s.outcomes, key)
        if rate > 0.2:
            found.append(f"outcomes.{key}: {show(rate)} a year is {show(100 * rate)}%; discount "
                         f"rates are fractions (0.035 for 3.5%)")
    found += [warning] if (warning := negative_ages(s, used)) else []
    if s.start.age is not None and age_attribute(s) is not None:
        found.append(f"start.age: {show(s.start.age)} is not used: the population's attribute "
                     "'age' gives every patient's age, and the average patient and the cohort "
                     "trace take its mean; remove start.age")
    youngest = youngest_age(s)
    for table in s.tables.values():
        first = table.starts[0]
        if table.by == AGE and youngest == -math.inf:
            found.append(f"tables.{table.name}.starts: the age at time 0 is an untruncated "
                         f"normal, so a share of {younger_share(s, first):.3g} of the patients "
                         f"are younger than the first start ({show(first)}); the first value "
                         "is used below it (give the age attribute a lower bound to rule "
                         "that out)")
    return found
