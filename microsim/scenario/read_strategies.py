"""Reading [[strategies]]: what is compared, who is eligible, and what treatment changes.

A strategy's added states, transitions and events, and those a later treatment of its
sequence adds, are read and checked by the base model's own readers and checks, run on the
merged model (base + added) with their paths moved under the treatment
(`strategies.<name>.transitions.<from>-><to>...`,
`strategies.<name>.then.<treatment>.events.<event>...`), so an added transition obeys
exactly the rules of [[transitions]], and an added event those of [[events]].
"""
from __future__ import annotations

import math
from contextlib import contextmanager
from dataclasses import replace
from typing import Callable, Iterable, Iterator

from .checks import (can_happen, check_age_known, check_effects, check_kind, check_lifetime,
                     check_memory, check_reference, check_names, check_row, check_states, level_listing,
                     may_be_positive, not_a_level, occurrences, population_kinds,
                     reachable_from_start, unknown_attribute, unknown_state)
from .errors import ScenarioError
from .fields import (ANY, HAZARD_RATIO, NON_NEGATIVE, RATE, TOLERANCE, VALUE_TABLE_AXES, Node,
                     Reading, Reference, Role, describe, did_you_mean, listing, show)
from .read_transitions import read_events, read_transitions
from .risk_changes import TREATED_KEYS, treated_key
from .spec import (REMAINDER, AttributeSpec, ChangeSpec, ConditionSpec, EligibilitySpec,
                   EventSpec, LineSpec, Scenario, StateSpec, StrategySpec, TableSpec, TimeSpec,
                   TransitionSpec)

STRATEGY_KEYS = ("name", "label", "comparator", "eligible", "uptake", "start", "stop",
                 "discontinuation", "changes", "states", "transitions", "events", "start_on",
                 "stop_on", "start_delay", "then", "arrivals", "resources")  # the last two: read by read_capacity
LINE_KEYS = ("name", "stop_on", "changes", "transitions", "events")
ELIGIBLE_KEYS = ("all", "any")
NUMBER_TESTS = ("above", "at_least", "below", "at_most")
LEVEL_TESTS = ("equals", "one_of")
CONDITION_KEYS = ("attribute",) + NUMBER_TESTS + LEVEL_TESTS
TEST_WORDS = {"above": "above", "at_least": "at least", "below": "below", "at_most": "at most",
              "equals": "equal to"}
RISK_KEYS = ("transition",) + TREATED_KEYS
ON_TREATMENT_KEYS = ("state", "cost", "utility")
CHANGE_KEYS = RISK_KEYS + ON_TREATMENT_KEYS
WHILE_TREATED = "while_treated"
MOVED_PATHS = ("states.", "transitions.", "events.")  # where the base readers and checks report

UPTAKE = Role("an uptake share", 0.0, 1.0)
TREATMENT_COST = Role("a treatment cost", 0.0)
TREATED_ROLES = {  # what a change of a risk may give; a ratio of 0 would switch the risk off
    "hazard_ratio": HAZARD_RATIO,
    "rate": Role("a rate on treatment", 0.0, lower_open=True),
    "probability": Role("a per-cycle probability on treatment", 0.0, 1.0, lower_open=True,
                        upper_open=True)}
BASE_ROLES = {  # what the risk's own value must be for a treated value to have a ratio to it
    "rate": Role("the base rate of a rate on treatment", 0.0, lower_open=True),
    "probability": Role("the base probability of a probability on treatment", 0.0, 1.0,
                        lower_open=True, upper_open=True)}


# -- paths of added states and transitions ----------------------------------------------

def moved(path: str, prefix: str) -> str:
    """A base-model path (`transitions.a->b.rate`) moved under a strategy's prefix."""
    return f"{prefix}.{path}" if path.startswith(MOVED_PATHS) else path


@contextmanager
def under(prefix: str, reading: Reading | None = None) -> Iterator[None]:
    """Run a base-model reader or check on a strategy's added states and transitions,
    moving the paths it reports, and the paths of the names it records, under `prefix`."""
    first = len(reading.references) if reading else 0
    try:
        yield
    except ScenarioError as error:
        raise ScenarioError(moved(error.path, prefix), error.message) from None
    if reading:
        reading.references[first:] = [replace(r, path=moved(r.path, prefix))
                                      for r in reading.references[first:]]


class Added(Node):
    """An entry of a treatment's added transitions or events: the keys of [[transitions]]
    or [[events]], plus while_treated for the first treatment's (`optional`), so the base
    readers refuse typos and list every allowed key."""

    def __init__(self, entry: Node, optional: bool):
        super().__init__(entry.data, entry.path, entry.reading)
        self.optional = optional

    def only(self, allowed: Iterable[str], where: str = "") -> None:
        if not self.optional and self.has(WHILE_TREATED):
            self.fail(WHILE_TREATED, "a later treatment's transitions and events act only "
                                     "while it is on; give one that acts whatever the "
                                     "treatment to the strategy itself ([[strategies.transitions]] "
                                     "or [[strategies.events]]) with while_treated = false")
        super().only(tuple(allowed) + ((WHILE_TREATED,) if self.optional else ()), where)


# -- first pass: [[strategies]] -----------------------------------------------------------

def read_strategies(nodes: list[Node], tables: dict[str, TableSpec], time: TimeSpec,
                    read_states: Callable[[list[Node]], tuple[StateSpec, ...]]
                    ) -> tuple[StrategySpec, ...]:
    """`read_states` is the reader of [[states]], reused for added states."""
    strategies: list[StrategySpec] = []
    for node in nodes:
        name = node.entry_name([s.name for s in strategies], "strategy", "strategies")
        node.only(STRATEGY_KEYS)
        strategies.append(read_strategy(node, name, tables, time, read_states))
    if strategies:
        check_comparator(strategies)
    return tuple(strategies)


def check_comparator(strategies: list[StrategySpec]) -> None:
    names = [s.name for s in strategies]
    if len(strategies) < 2:
        raise ScenarioError("strategies", f"has only {names[0]!r}; give at least two strategies: "
                            "a comparator (comparator = true) and one to compare with it")
    chosen = [s.name for s in strategies if s.comparator]
    if not chosen:
        raise ScenarioError("strategies", "no strategy has comparator = true; mark the one the "
                            f"others are compared with (strategies: {listing(names)})")
    if len(chosen) > 1:
        raise ScenarioError(f"strategies.{chosen[1]}.comparator",
                            f"{len(chosen)} strategies have comparator = true "
                            f"({listing(repr(n) for n in chosen)}); keep it on the one the "
                            "others are compared with and remove it from the rest")


def read_strategy(node: Node, name: str, tables: dict[str, TableSpec], time: TimeSpec,
                  read_states: Callable[[list[Node]], tuple[StateSpec, ...]]) -> StrategySpec:
    start = node.number("start", 0.0, role=NON_NEGATIVE)
    end = f"the end of the horizon ({show(time.end)} {time.unit})"
    if start >= time.end:
        node.fail("start", f"{show(start)} is at or beyond {end}; the treatment would never begin")
    stop = node.number("stop", None)
    if stop is not None:
        node.above("stop", stop, "start", start)
    if stop is not None and stop > time.end * (1 + TOLERANCE):
        node.fail("stop", f"{show(stop)} is beyond {end}; stop at or before it, or leave stop "
                          "out to treat until the end")
    with under(node.path, node.reading):
        states = read_states(node.nodes("states", None))
    transitions, gated = read_added(node, "transitions", tables)
    events, events_gated = read_added(node, "events", tables)
    return StrategySpec(
        name=name, label=node.text("label", name, nonempty=True),
        comparator=node.flag("comparator", False),
        eligible=read_eligible(node.node("eligible", ELIGIBLE_KEYS, default=None)),
        uptake=node.ref("uptake", UPTAKE, 1.0), start=start, stop=stop,
        discontinuation=node.ref("discontinuation", RATE, 0.0),
        changes=tuple(read_change(n) for n in node.nodes("changes", CHANGE_KEYS)),
        states=states, transitions=transitions, while_treated=gated, events=events,
        events_while_treated=events_gated, start_on=state_list(node, "start_on"), stop_on=state_list(node, "stop_on"),
        then=read_lines(node, tables), start_delay=node.number("start_delay", 0.0, role=NON_NEGATIVE))


def state_list(node: Node, key: str) -> tuple[str, ...]:
    """A state name or a list of them (`start_on`, `stop_on`); () when not given."""
    if not node.has(key):
        return ()
    return (node.name(key),) if isinstance(node.raw(key), str) else node.names(key)


def read_lines(node: Node, tables: dict[str, TableSpec]) -> tuple[LineSpec, ...]:
    """[[strategies.then]]: the later treatments of a sequence, in order."""
    lines: list[LineSpec] = []
    for entry in node.nodes("then", None):
        if entry.has("states"):
            entry.fail("states", "a later treatment cannot add states; add them to the "
                                 "strategy ([[strategies.states]]), which every treatment of "
                                 "the sequence shares, and lead to them with this "
                                 "treatment's transitions")
        entry.only(LINE_KEYS)
        name = entry.name("name")
        if name in (node.data.get("name"), *(line.name for line in lines)):
            entry.fail("name", f"{name!r} already names this strategy or one of its "
                               "treatments; give each treatment of a sequence its own name")
        entry.path = f"{node.path}.then.{name}"
        lines.append(LineSpec(
            name, state_list(entry, "stop_on"),
            tuple(read_change(n) for n in entry.nodes("changes", CHANGE_KEYS)),
            transitions=read_added(entry, "transitions", tables, optional=False)[0],
            events=read_added(entry, "events", tables, optional=False)[0]))
    return tuple(lines)


def read_added(node: Node, key: str, tables: dict[str, TableSpec], optional: bool = True
               ) -> tuple[tuple[TransitionSpec | EventSpec, ...], tuple[bool, ...]]:
    """A treatment's [[...transitions]] or [[...events]] (`key`) by the readers of
    [[transitions]] and [[events]], with their paths under the treatment's, and whether each
    acts only while the treatment is on: always for a later treatment's, by while_treated
    (default true) for the first's (`optional`)."""
    reader = read_transitions if key == "transitions" else read_events
    with under(node.path, node.reading):
        entries = [Added(entry, optional) for entry in node.nodes(key, None)]
        added = reader(entries, tables)
        gated = tuple(entry.flag(WHILE_TREATED, True) for entry in entries)
    return added, gated


def read_eligible(node: Node | None) -> EligibilitySpec | None:
    if node is None:
        return None
    groups = {key: tuple(read_condition(n) for n in node.nodes(key, CONDITION_KEYS))
              for key in ELIGIBLE_KEYS}
    if not any(groups.values()):
        node.fail(None, "needs all = [...] and/or any = [...] (conditions on patient "
                        "attributes); leave out eligible to make everyone eligible")
    return EligibilitySpec(**groups)


def read_condition(node: Node) -> ConditionSpec:
    attribute = node.name("attribute")
    test = node.one_of(NUMBER_TESTS + LEVEL_TESTS)
    if test in NUMBER_TESTS:
        value = node.number(test)
    elif test == "one_of":
        value = node.texts(test)
    elif isinstance(node.raw(test), bool):
        value = node.flag(test, False)
    elif isinstance(node.raw(test), str):
        value = node.text(test, nonempty=True)
    else:
        value = node.number(test, expect="a level (text), true or false, or a number")
    return ConditionSpec(attribute, test, value)


def read_change(node: Node) -> ChangeSpec:
    if any(node.has(k) for k in RISK_KEYS):
        for key in ON_TREATMENT_KEYS:
            if node.has(key):
                node.fail(key, "cannot be combined with transition and hazard_ratio, rate or "
                               "probability; a change either changes a risk (transition with "
                               "one of them) or adds cost and utility on treatment (cost, "
                               "utility, optionally state); give them as two changes")
        risk = node.text("transition", nonempty=True)
        key = node.one_of(TREATED_KEYS)
        return ChangeSpec(risk=risk, **{key: node.ref(key, TREATED_ROLES[key])})
    if not any(node.has(k) for k in ("cost", "utility")):
        node.fail(None, "needs transition with hazard_ratio, rate or probability, or cost "
                        "and/or utility (optionally for one state)")
    return ChangeSpec(state=node.name("state", None),
                      cost=node.ref("cost", TREATMENT_COST, 0.0, tables=VALUE_TABLE_AXES),
                      utility=node.ref("utility", ANY, 0.0, tables=VALUE_TABLE_AXES))


# -- second pass ------------------------------------------------------------------------------

def check_strategies(s: Scenario, reading: Reading) -> list[str]:
    """Cross-checks of the strategies (after the base model's own checks passed); returns
    their warnings."""
    found: list[str] = []
    for strategy in s.strategies:
        found += check_strategy(s, reading, strategy)
    return found


def check_strategy(s: Scenario, reading: Reading, strategy: StrategySpec) -> list[str]:
    prefix = f"strategies.{strategy.name}"
    found = []
    if strategy.eligible is not None:
        reason = check_eligible(s, reading, strategy.eligible, f"{prefix}.eligible")
        if reason:
            found.append(f"{prefix}.eligible: no patient can be eligible: {reason}; the "
                         "strategy treats no one")
    merged = merged_model(s, reading, strategy, prefix)
    check_changes(merged, reading, strategy, prefix)
    if not may_be_positive(s, strategy.uptake):
        found.append(f"{prefix}.uptake: is 0, so no one takes the treatment up; the strategy "
                     "runs the model as written")
    changes = strategy.changes_anything or strategy.capacity is not None
    if strategy.comparator and changes:
        found.append(f"{prefix}: is the comparator but has changes or added transitions; a "
                     "comparator normally runs the model as written (check that this is "
                     "intended)")
    if not strategy.comparator and not changes:
        found.append(f"{prefix}: changes nothing (no changes and no added transitions), so it "
                     "gives the same results as the comparator")
    reachable, _ = reachable_from_start(s.with_added(strategy, strategy.then))
    check_delay(s, strategy, f"{prefix}.start_delay")
    if strategy.phased:
        found += check_phases(s, reading, merged, strategy, prefix, reachable)
    found += [f"{prefix}.states.{st.name}: not reachable from the start (no transition that can "
              "happen leads to it)" for st in strategy.states if st.name not in reachable]
    return found


def check_phases(s: Scenario, reading: Reading, merged: Scenario, strategy: StrategySpec,
                 prefix: str, reachable) -> list[str]:
    """Treatment that starts and stops on entering states or on events, and sequences:
    known states that are not absorbing, events that can happen while the trigger is
    awaited, each treatment after the first following one that stops, no treatment stopped
    by the very entry that starts it, and each later treatment's changes and additions by
    the rules of the first's. Returns the warnings."""
    if s.capacity is not None:
        raise ScenarioError(f"{prefix}.{'start_on' if strategy.start_on else 'stop_on'}",
                            "treatment on entering states is not available with [arrivals] "
                            "or [[resources]]; give the strategy a start and stop time instead")
    if strategy.start_on and strategy.discontinuation != 0.0:
        raise ScenarioError(f"{prefix}.discontinuation", "runs from the strategy's start time, "
                            "not from the entry that starts treatment; leave it out with "
                            "start_on, and to stop at a rate while treated add an event at "
                            "that rate to the strategy's events and name it in stop_on")
    absorbing = {st.name for st in merged.states if st.absorbing}
    treatments = [(prefix, strategy, strategy.start_on, strategy.stop_on, merged)]
    for line, before in zip(strategy.then, [strategy.stop_on] + [x.stop_on for x in strategy.then]):
        treatments.append((f"{prefix}.then.{line.name}", line, before, line.stop_on,
                           merged_model(s, reading, strategy, prefix, line)))
    for path, during, starts, stops, model in treatments:
        for key, names, when in (("start_on", starts if during is strategy else (), None),
                                 ("stop_on", stops, during)):
            elsewhere = only_elsewhere(s, strategy, prefix, when)
            events = {e.name: e for e in model.events if e.name not in elsewhere}
            for i, name in enumerate(names):
                here = f"{path}.{key}" + (f"[{i}]" if len(names) > 1 else "")
                if name in events:
                    check_trigger_event(model, events[name], here)
                    continue
                if name in elsewhere:
                    verb = key.removesuffix("_on")
                    raise ScenarioError(here, f"{name!r} is an event that only "
                                        f"{elsewhere[name]} has, while it is on, so it cannot "
                                        f"{verb} this treatment; name a state, or an event "
                                        "that can happen " + ("before treatment starts"
                                                              if when is None else "during it"))
                if name not in model.state_names:
                    known = list(model.state_names) + list(events)
                    raise ScenarioError(here, f"{name!r} is not a state or event"
                                        f"{did_you_mean(name, known)}; name a state (entering "
                                        f"it) or an event: {listing(known)}")
                if name in absorbing:
                    raise ScenarioError(here, f"{name!r} is absorbing, where nothing happens "
                                        "any more; name a state patients can live in")
        if path != prefix and not starts:
            raise ScenarioError(f"{path}", "follows a treatment without stop_on, which never "
                                "stops; give the treatment before it a stop_on")
        both = sorted(set(starts) & set(stops))
        if both:
            raise ScenarioError(f"{path}.stop_on", f"{both[0]!r} also starts this treatment; "
                                "a treatment cannot stop on the entry that starts it")
        if during is not strategy:
            check_changes(model, reading, replace(strategy, changes=during.changes), path,
                          only_elsewhere(s, strategy, prefix, during))
    full = s.with_added(strategy, strategy.then)
    reached = reachable | {e.name for e in full.events
                           if any(can_happen(full, e.in_state(st)) for st in e.states
                                  if st in reachable)}
    if strategy.start_on and not set(strategy.start_on) & reached:
        return [f"{prefix}.start_on: no patient reaches {listing(strategy.start_on)} (a state "
                "no one enters, or an event whose probability or rate is 0), so the strategy "
                "treats no one"]
    if strategy.start_on and strategy.start_delay >= s.time.end:
        return [f"{prefix}.start_delay: {show(strategy.start_delay)} {s.time.unit} is not "
                f"shorter than the horizon ({show(s.time.end)} {s.time.unit}), so the "
                "strategy treats no one; shorten the delay or lengthen the horizon"]
    return []


def only_elsewhere(s: Scenario, strategy: StrategySpec, prefix: str, during) -> dict[str, str]:
    """The transitions and events (by name, and transitions by "from->to" pair too) that a
    treatment of the strategy other than `during` (the strategy for its first treatment, one
    of its later treatments, or None before treatment starts) adds for its time on treatment
    only, and which so do not exist while `during` is on; each with the treatment that adds
    it, in words."""
    def names(occurrences) -> set[str]:
        return {n for o in occurrences for n in (o.name, getattr(o, "key", o.name))}
    gated = strategy.on_treatment_only
    added = (*strategy.transitions, *strategy.events)
    present = names((*s.transitions, *s.events, *(o for o in added if o.name not in gated)))
    treatments = [(strategy, f"the first treatment ({prefix})",
                   [o for o in added if o.name in gated])]
    treatments += [(line, f"the treatment {prefix}.then.{line.name}",
                    (*line.transitions, *line.events)) for line in strategy.then]
    found: dict[str, str] = {}
    for owner, words, occurrences in treatments:
        if owner is during:
            present |= names(occurrences)
        else:
            for name in names(occurrences):
                found.setdefault(name, words)
    return {name: words for name, words in found.items() if name not in present}


def check_delay(s: Scenario, strategy: StrategySpec, here: str) -> None:
    """`start_delay`: needs start_on; in cycle models a whole number of cycles (a countdown
    of copies of the states), in rate models any length (each patient's deadline)."""
    delay, cycle, unit = strategy.start_delay, s.time.cycle, s.time.unit
    if not delay:
        return
    if not strategy.start_on:
        raise ScenarioError(here, "delays the start on start_on, which this strategy does not "
                            "have; give start_on, or use start for a fixed time")
    if s.discrete and abs(delay / cycle - round(delay / cycle)) > 1e-9:
        raise ScenarioError(here, f"{show(delay)} {unit} is not a whole number of cycles "
                            f"({show(cycle)} {unit} each); give a multiple of the cycle")


def check_trigger_event(merged: Scenario, event, here: str) -> None:
    """An event that starts or stops treatment passes the patient to the same state's copy
    in the next phase: in rate models by a move, exact where no clock restarts with it; in
    cycle models at the cycle's end, where time in state runs on across the copies (as
    through a countdown), so nothing restarts."""
    if merged.discrete:
        return
    for risk in (*merged.transitions, *merged.events):
        states = (risk.source,) if isinstance(risk, TransitionSpec) else risk.states
        varying = risk.hazard is not None and risk.hazard.family != "constant"
        if varying and risk.clock == "since_entry" and set(states) & set(event.states):
            raise ScenarioError(here, f"{event.name!r} happens in {listing(event.states)}, "
                                f"where {risk.name!r} has a {risk.hazard.family} hazard on the "
                                "time since entry, which the move to the treated copy would "
                                "restart; put that hazard on clock = \"since_start\" or "
                                "\"age\", or start treatment on a state")


def merged_model(s: Scenario, reading: Reading, strategy: StrategySpec, prefix: str,
                 line: LineSpec | None = None) -> Scenario:
    """The model with the strategy's added states, transitions and events (and with `line`,
    those of one later treatment of its sequence), checked by the rules of the base model.
    A later treatment's additions are checked after the strategy's own passed, so every
    refusal of the merged model is about them."""
    own = strategy if line is None else line
    if not (own.transitions or own.events or (line is None and strategy.states)):
        return s.with_added(strategy)
    here = prefix if line is None else f"{prefix}.then.{line.name}"
    if line is None:
        taken = {name: f"states.{name}" for name in s.state_names}
        taken.update((o.name, path) for path, o in occurrences(s))
        for state in strategy.states:
            if state.name in taken:
                raise ScenarioError(f"{prefix}.states.{state.name}.name", f"{state.name!r} is "
                                    f"already the name of {taken[state.name]}; give added "
                                    "states new names")
    merged = s.with_added(strategy, () if line is None else (line,))
    added = additions(strategy, prefix) + ([] if line is None else additions(line, here))
    mine = additions(own, here)
    for path, o in mine:
        if (o.probability is not None) != s.discrete:
            uses, others = (("a rate or hazard", "per-cycle probabilities") if s.discrete
                            else ("a per-cycle probability", "rates or hazards"))
            raise ScenarioError(path, f"uses {uses}, but the model's transitions use {others}; "
                                "added transitions and events use the model's kind")
    with under(here):
        check_states(merged)
    check_names(replace(s, states=merged.states), added)
    with under(here):
        check_kind(merged)
        check_memory(merged)
        check_effects(merged, reading)
        check_age_known(merged, reading)
    if s.discrete:
        with under(here):
            check_added_rows(merged, [(p, t) for p, t in mine if isinstance(t, TransitionSpec)],
                             s.state_names if line is None else merged.state_names)
    if s.time.horizon is None:
        try:
            check_lifetime(merged)
        except ScenarioError as error:
            raise ScenarioError(f"{here}.transitions", f"with them the horizon "
                                f"{error.message}") from None
    return merged


def additions(treatment: StrategySpec | LineSpec, here: str
              ) -> list[tuple[str, TransitionSpec | EventSpec]]:
    """A treatment's added transitions and events with their field paths (`here`: the
    treatment's own path)."""
    return ([(f"{here}.transitions.{t.where}", t) for t in treatment.transitions]
            + [(f"{here}.events.{e.name}", e) for e in treatment.events])


def check_added_rows(merged: Scenario, added: list[tuple[str, TransitionSpec]],
                     existing: tuple[str, ...]) -> None:
    """Rows of states with added transitions still sum properly; a row that exists without
    them (of a state in `existing`) needs a remainder, which makes room for the added
    probability on treatment and takes it back off treatment."""
    for path, t in added:
        row = [r for r in merged.transitions if r.source == t.source]
        if t.source in existing and not any(r.probability == REMAINDER for r in row):
            raise ScenarioError(path, f"{t.source!r} has no transition with probability = "
                                '"remainder"; a transition added from an existing state needs '
                                "one in its row to make room for the added probability; add "
                                f"one (often from {t.source!r} to itself)")
    for source in dict.fromkeys(t.source for _, t in added):
        check_row(merged, source)


def check_changes(merged: Scenario, reading: Reading, strategy: StrategySpec, prefix: str,
                  absent: dict[str, str] | None = None) -> None:
    """The strategy's changes name transitions and events that exist while its treatment is
    on (`absent`: those another treatment of its sequence adds for its own time on
    treatment, with that treatment's path), risks that a rate or probability on treatment
    can replace, and states that are not absorbing."""
    absent = absent or {}
    risks = {o.name: o for _, o in occurrences(merged)}
    risks.update((t.key, t) for t in merged.transitions)
    names = list(dict.fromkeys(o.name for _, o in occurrences(merged)))
    absorbing = {st.name for st in merged.states if st.absorbing}
    for i, change in enumerate(strategy.changes):
        here = f"{prefix}.changes[{i}]"
        if change.risk in absent:
            raise ScenarioError(f"{here}.transition", f"{change.risk!r} exists only while "
                                f"{absent[change.risk]} is on, not during this treatment; "
                                "change a transition or event of the model or of this "
                                "treatment")
        if change.risk is not None and change.risk not in risks:
            raise ScenarioError(f"{here}.transition", f"{change.risk!r} is not a transition or "
                                f"event{did_you_mean(change.risk, names)}; give a transition "
                                f'name or "from->to" pair, or an event name: {listing(names)}')
        if change.risk is not None and risks[change.risk].probability == REMAINDER:
            raise ScenarioError(f"{here}.transition", f"{change.risk!r} takes the remainder of "
                                "its row (what the other transitions leave), so a hazard ratio "
                                "cannot act on it; change the other transitions of the row")
        if change.risk is not None and treated_key(change) != "hazard_ratio":
            check_treated_risk(merged, reading, strategy.changes, i, risks[change.risk], here)
        if change.state is not None and change.state not in merged.state_names:
            raise ScenarioError(f"{here}.state", unknown_state(change.state, merged.state_names))
        if change.state in absorbing:
            raise ScenarioError(f"{here}.state", f"{change.state!r} is absorbing; treatment "
                                "costs and utilities apply in non-absorbing states")


def check_treated_risk(merged: Scenario, reading: Reading, changes: tuple[ChangeSpec, ...],
                       i: int, risk: TransitionSpec | EventSpec, here: str) -> None:
    """A change that gives the rate or probability on treatment (`changes[i]`, at `here`)
    needs a risk of that kind with one constant base value (per state, for an event by
    state) above 0, and a probability below 1, which it alone changes: the hazard ratio it
    amounts to is its ratio to that value."""
    change = changes[i]
    key, name = treated_key(change), change.risk
    at = f"{here}.{key}"
    kind = "rate" if risk.probability is None else "probability"
    if key != kind:
        words = "a per-cycle probability" if kind == "probability" else "a rate or hazard"
        raise ScenarioError(at, f"{name!r} has {words}; give its value on treatment as "
                            f"{kind} = <number or parameter>, or give a hazard_ratio")
    pair = [t.name for t in merged.transitions if t.key == name]
    if len(pair) > 1:
        raise ScenarioError(f"{here}.transition", f"{name!r} is {len(pair)} transitions "
                            f"({listing(repr(n) for n in pair)}); a {key} on treatment is one "
                            "transition's, so name the one it replaces")
    own = {risk.name, getattr(risk, "key", risk.name)}
    other = next((j for j, c in enumerate(changes) if j != i and c.risk in own), None)
    if other is not None:
        raise ScenarioError(at, f"replaces the {kind} of {name!r}, which changes[{other}] also "
                            "changes; give one change of it (the rate or probability it has "
                            "on treatment)")
    table = risk.probability if kind == "probability" else risk.hazard.params.get("table")
    if isinstance(table, str) and table in merged.tables:
        raise ScenarioError(at, f"{name!r} reads its {kind} from table {table!r}, whose values "
                            f"change, so no single {kind} on treatment replaces it; give a "
                            "hazard_ratio")
    if kind == "rate" and risk.hazard.family != "constant":
        raise ScenarioError(at, f"{name!r} has a {risk.hazard.family} hazard, which changes "
                            "over time, so no single rate on treatment replaces it; give a "
                            "hazard_ratio")
    by_state = getattr(risk, "by_state", None)
    bases = by_state.items() if by_state else [
        ("", risk.probability if kind == "probability" else risk.hazard.params["rate"])]
    role = BASE_ROLES[key]
    for state, base in bases:
        if isinstance(base, str):
            use = Reference(base, at, role)
            check_reference(merged, use)
            reading.references.append(use)
            continue
        if role.problem(base):
            where = f" in {state!r}" if state else ""
            fix = ("a certain move stays certain under any hazard ratio; give the base "
                   "probability below 1" if base >= 1 else
                   f"no hazard ratio turns {show(base)} into it; give the base {kind} above "
                   "0, or give the risk on treatment as one of the strategy's own transitions "
                   "or events")
            raise ScenarioError(at, f"{name!r} has {kind} {show(base)}{where}; {fix}")


# -- eligibility --------------------------------------------------------------------------------

def check_eligible(s: Scenario, reading: Reading, eligible: EligibilitySpec, path: str
                   ) -> str | None:
    """Refuse conditions the population cannot answer; say why nobody can be eligible
    when the attribute distributions make the group certainly empty (else None)."""
    check_conditions(s, reading, eligible, path)
    if not eligible.any:
        return empty_reason(s, eligible.all)
    reasons = [empty_reason(s, eligible.all + (c,)) for c in eligible.any]
    return "; ".join(dict.fromkeys(reasons)) if all(reasons) else None


def check_conditions(s: Scenario, reading: Reading, eligible: EligibilitySpec, path: str
                     ) -> None:
    """Refuse conditions the population's attributes (or file columns) cannot answer."""
    for group in ELIGIBLE_KEYS:
        for i, condition in enumerate(getattr(eligible, group)):
            check_condition(s, reading, condition, f"{path}.{group}[{i}]")


def check_condition(s: Scenario, reading: Reading, condition: ConditionSpec, here: str) -> None:
    name, test, value = condition.attribute, condition.test, condition.value
    kinds = population_kinds(s, reading)
    if s.population is None or name not in kinds:
        raise ScenarioError(f"{here}.attribute", unknown_attribute(s, name, kinds))
    kind, levels = kinds[name]
    at = f"{here}.{test}"
    if kind == "categorical" and test in NUMBER_TESTS:
        raise ScenarioError(at, f"{name!r} is categorical; {test} compares numbers. Use equals "
                            f"or one_of with its levels: {level_listing(levels)}")
    if kind == "yesno" and test != "equals":
        raise ScenarioError(at, f"{name!r} is a yes/no attribute; use equals = true or "
                            "equals = false")
    if kind == "yesno" and not isinstance(value, bool):
        raise ScenarioError(at, f"{name!r} is a yes/no attribute; equals needs true or false, "
                            f"got {describe(value)}")
    if kind == "continuous" and test == "one_of":
        raise ScenarioError(at, f"{name!r} is continuous; one_of lists levels of a categorical "
                            "attribute. Use above, at_least, below or at_most")
    if kind == "continuous" and test == "equals" and not isinstance(value, float):
        raise ScenarioError(at, f"{name!r} is continuous; equals needs a number, got "
                            f"{describe(value)}")
    if kind == "categorical":
        for j, level in enumerate(value if test == "one_of" else (value,)):
            if level not in levels:
                where = f"{at}[{j}]" if test == "one_of" else at
                raise ScenarioError(where, not_a_level(level, name, levels, reading))


def empty_reason(s: Scenario, conditions: tuple[ConditionSpec, ...]) -> str | None:
    """Why no patient can meet every one of `conditions` (None when some can, as far as the
    attribute distributions tell; file columns are not read here)."""
    for name in dict.fromkeys(c.attribute for c in conditions):
        on = [c for c in conditions if c.attribute == name]
        attribute = next((a for a in s.population.attributes if a.name == name), None)
        if attribute is not None and attribute.continuous:
            distribution = marginal(attribute)
            reason = None if distribution is None else empty_range(name, distribution, on)
        else:
            shares = level_shares(s, name, attribute)
            reason = None if shares is None else empty_levels(name, shares, on)
        if reason:
            return reason
    return None


def marginal(attribute: AttributeSpec):
    """The scipy.stats distribution of a continuous attribute, or None when its parameters
    overflow (a lognormal meanlog above ~709). Imported on use, because microsim.patients.population
    itself imports this package."""
    from microsim.patients.population import marginal_distribution
    try:
        return marginal_distribution(attribute)
    except OverflowError:
        return None


def share_between(distribution, low: float, high: float) -> float:
    """P(low < X < high), from whichever tail keeps its precision."""
    if high <= low:
        return 0.0
    return max(float(distribution.cdf(high) - distribution.cdf(low)),
               float(distribution.sf(low) - distribution.sf(high)))


def empty_range(name: str, distribution, conditions: list[ConditionSpec]) -> str | None:
    for c in conditions:
        if c.test == "equals":
            return f"{name!r} is continuous, so it equals {show(c.value)} with probability 0"
    lowest, highest = distribution.support()
    low, high = lowest, highest
    for c in conditions:
        if c.test in ("above", "at_least"):
            low = max(low, c.value)
        else:
            high = min(high, c.value)
    if share_between(distribution, low, high) > 0:
        return None
    tests = " and ".join(f"{TEST_WORDS[c.test]} {show(c.value)}" for c in conditions)
    return f"{name!r} takes values from {show(lowest)} to {show(highest)}, none of them {tests}"


def level_shares(s: Scenario, name: str, attribute: AttributeSpec | None) -> dict | None:
    """The share of patients at each value of a categorical, yes/no or banded attribute
    (None for file columns and bands of them)."""
    if attribute is not None and attribute.distribution == "yesno":
        prevalence = attribute.params["prevalence"]
        return {True: prevalence, False: 1.0 - prevalence}
    if attribute is not None:
        return dict(zip(attribute.params["levels"], attribute.params["shares"]))
    band = next((d for d in s.population.derived if d.name == name), None)
    source = next((a for a in s.population.attributes if band and a.name == band.source), None)
    distribution = None if source is None else marginal(source)
    if distribution is None:
        return None
    edges = band.edges + (math.inf,)
    return {label: share_between(distribution, edges[i], edges[i + 1])
            for i, label in enumerate(band.labels)}


def empty_levels(name: str, shares: dict, conditions: list[ConditionSpec]) -> str | None:
    allowed = set(shares)
    for c in conditions:
        allowed &= set(c.value if c.test == "one_of" else (c.value,))
    if not allowed:
        return f"no value of {name!r} meets every condition on it"
    if sum(shares[v] for v in allowed) > 0:
        return None
    values = " or ".join(describe(v) for v in shares if v in allowed)
    return f"no patient has {name!r} = {values} (share 0)"
