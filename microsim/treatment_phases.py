"""Treatment that starts and stops when patients enter states or have an event, and sequences
of treatments, as a bound model whose states carry the treatment phase.

A strategy with `start_on`, `stop_on` or `then` is bound to a model in which every living
state has one copy per phase: before treatment (when it starts on entering a state), on each
treatment of the sequence in turn, and after the last has stopped. A move into a state that
starts or stops the current phase's treatment goes to that state's copy in the next phase;
so does an event that starts or stops it. In rate models the event, in the phase it acts
on, is a move from the state's copy to the same state's copy in the next phase, with the
event's name, cost and disutility, so it is counted and costed once as before. In cycle
models an event is drawn beside the cycle's move, so it stays an event, and
`BoundModel.phase_on` says where it sends the cycle's end state: to that state's copy in
the next phase, unless the move changed the phase already or ended in an absorbing state
(the phase moves at most once a cycle). Every other move keeps the phase. A transition or
event a treatment adds for its time on treatment exists in the copies of that treatment's
phase only (elsewhere it is left out, not given a hazard of 0, which an engine would read
as a treatment that changes nothing). Because the phase changes only with a move or at a
cycle end, the model stays a plain Markov model (with the same memory, tables and hazards
as before): every engine simulates it as it is (the cycle engines and matrices follow
`stay_to` and `phase_on` at a cycle end), and its analytic counterpart is exact by the same
expanded chain as any other model (common practice: a treatment history as states, e.g.
tunnel-like copies of health states by line of therapy). The strategy's time window
(start, stop, eligibility, uptake) still applies on top: a treatment acts while the patient
is in its phase and inside the window.

Copies are named `<state>+<treatment>` (and `<state>+stopped` after the last), the first
treatment's after the strategy (`binding.bind` names its `Line` so); the copies of
the phase before treatment keep the states' own names, absorbing states have one copy,
copies no patient can reach are left out, and each state's copies follow one another in the
order of the states.
Memory counts an entry into a copy of another state as an entry into that state
(`BoundModel.entered`); a move between copies of the same state is no entry. A treatment
never begins in a state that stops it: a patient who comes to a treatment's phase in such a
state (an event or a delay's end moves the phase on, an entry stops the treatment before)
passes on to the next phase at once.

A delay from the start trigger to the first treatment is a waiting phase. In cycle models
it is a countdown of whole cycles, one phase a cycle (`<state>+<treatment>-wait<k>`, k
cycles to go), which a patient leaves for the next at every cycle end (`BoundModel.stay_to`):
still a Markov chain. In rate models it is one phase (`<state>+<treatment>-wait`) whose moves
keep it, left for the treated copy of the state the patient is in exactly `delay` after
entering it (`BoundModel.delay`, `BoundModel.delay_to`): the engines carry each patient's
deadline, and the chain is Markov no more (a fixed delay has no finite Markov form).
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from microsim.binding import BoundModel, ValueTable

STOPPED = "stopped"


@dataclass(frozen=True)
class Line:
    """One treatment of a sequence in numbers: what stops it, its hazard multipliers per
    risk of the model, its cost and utility per state, and the risks it adds for its time
    on treatment, which exist in its own phase only."""
    name: str
    stop_on: tuple[str, ...]
    on_factor: np.ndarray  # (R,)
    cost: np.ndarray  # (S,)
    utility: np.ndarray  # (S,)
    adds: tuple[int, ...] = ()  # risks of the model that act only while this treatment is on
    tables: tuple[ValueTable, ...] = ()  # costs and utilities read from tables


def with_phases(model: BoundModel, start_on: tuple[str, ...], lines: list[Line],
                delay: float = 0.0) -> BoundModel:
    """`model` (bound with the first treatment's window and factors) with a treatment phase
    in every living state. `start_on` and each line's `stop_on` name states and events;
    `delay` is the time from the start trigger to the first treatment (in cycle models a
    whole number of cycles)."""
    t = model.treatment
    delay = delay if start_on else 0.0
    countdown = model.discrete  # cycle models: a phase a cycle; rate models: one, timed
    waits = round(delay / model.cycle) if countdown else int(delay > 0)
    phases: list[Line | None] = ([None] * (1 + waits) if start_on else []) + list(lines)
    if lines[-1].stop_on:
        phases.append(None)
    triggers = [start_on] + [()] * waits if start_on else []
    triggers += [line.stop_on for line in lines] + ([()] if lines[-1].stop_on else [])
    first = lines[0]
    waiting_names = ([f"+{first.name}-wait{j}" for j in range(waits, 0, -1)] if countdown
                     else [f"+{first.name}-wait"] * waits)
    suffix = ([""] + waiting_names if start_on
              else []) + [f"+{line.name}" for line in lines] + (
        [f"+{STOPPED}"] if lines[-1].stop_on else [])

    names, entered, copy = [], [], {}
    for k in range(len(phases)):
        for i, name in enumerate(model.states):
            if model.absorbing[i] and k > 0:
                copy[k, i] = copy[0, i]
                continue
            copy[k, i] = len(names)
            names.append(name + ("" if model.absorbing[i] else suffix[k]))
            entered.append(name)
    base = np.array([model.states.index(n) for n in entered])  # the state of each copy

    def waiting(k: int) -> bool:
        return 1 <= k <= waits

    def settled(k: int, i: int) -> int:
        """The phase of a patient who comes to phase k in state i without entering i (a
        countdown or a wait ends, an event moves the phase on, an entry stops the treatment
        before): a treatment never begins in a state that stops it, so the patient passes on
        to the next phase, as far as a phase that state does not stop."""
        while phases[k] is not None and model.states[i] in triggers[k]:
            k += 1
        return k

    def phase_after(k: int, state: int) -> int:
        """The phase a patient in phase k is in after entering `state` at a cycle end (a
        cycle of the countdown to treatment passes first; a timed wait keeps its phase);
        entering the start trigger goes to the wait, or straight to treatment without a
        delay."""
        if waiting(k):
            if not countdown:
                return k
            k += 1
            return k if waiting(k) else settled(k, state)  # the countdown's end
        return settled(k + 1, state) if model.states[state] in triggers[k] else k

    def next_copy(k: int, e: int) -> int:
        """Where a cycle that ended in copy e goes when an event of phase k moves the phase
        on: e's state in the next phase, if e is a living copy of phase k (else e)."""
        i = base[e]
        return copy[settled(k + 1, i), i] if not model.absorbing[i] and copy[k, i] == e else e

    owner = {r: line for line in lines for r in line.adds}
    risks, on, off = [], [], []
    moving = {}  # cycle models: a risk (of `risks`) that moves the phase on -> its phase
    for k, line in enumerate(phases):
        for r, risk in enumerate(model.risks):
            if owner.get(r, line) is not line:
                continue  # added by another treatment (or before one starts): not here
            moves = risk.target is not None and risk.target != risk.source  # staying: no tick
            trigger = risk.is_event and risk.name in triggers[k]
            if trigger and model.discrete:  # drawn beside the move: on at the cycle's end
                moving[len(risks)] = k
                target = None
            elif trigger:  # the event is the move to the next phase
                target = copy[settled(k + 1, risk.source), risk.source]
            else:
                target = None if risk.target is None else copy[
                    phase_after(k, risk.target) if moves else k, risk.target]
            risks.append(replace(risk, source=copy[k, risk.source], target=target))
            off.append(t.off_factor[r])
            on.append(t.off_factor[r] if line is None else line.on_factor[r])
    start = np.zeros(len(names))
    for i, share in enumerate(model.start):
        start[copy[phase_after(0, i), i]] += share
    start_effects = tuple((copy[phase_after(0, i), i], effect)
                          for i, effect in model.start_effects)
    cost, utility = np.zeros(len(names)), np.zeros(len(names))
    treated = np.zeros(len(names), bool)
    for k, line in enumerate(phases):
        for i in range(model.n_states):
            treated[copy[k, i]] |= line is not None and not model.absorbing[i]
    for k, line in enumerate(phases):
        for i in range(model.n_states):
            if line is not None and not model.absorbing[i]:
                cost[copy[k, i]], utility[copy[k, i]] = line.cost[i], line.utility[i]
    # a cycle of the countdown passes for a patient who stays in its state; a timed wait
    # ends in the treated copy of the state the patient is in
    stay = np.arange(len(names))
    for k in range(1, waits + 1):
        for i in range(model.n_states):
            stay[copy[k, i]] = copy[settled(k + 1, i), i]
    # keep the copies patients can reach (from where they start, by any risk, a countdown
    # or a timed wait, or an event that moves the phase on at the end of a cycle from there)
    kept, stack = set(np.flatnonzero(start)), list(np.flatnonzero(start))
    while stack:
        e = stack.pop()
        ends = [risk.target for risk in risks if risk.source == e and risk.target is not None]
        ends.append(stay[e])
        phases_on = {k for r, k in moving.items() if risks[r].source == e}
        for f in ends + [next_copy(k, f) for k in phases_on for f in ends]:
            if f not in kept:
                kept.add(f)
                stack.append(f)
    kept = sorted(kept, key=lambda e: (base[e], e))  # each state's copies together, in order
    new = {e: j for j, e in enumerate(kept)}
    live = [r for r, risk in enumerate(risks) if risk.source in new]
    # costs and utilities from tables: a state's in each of its copies, a treatment's in
    # the copies of its phase
    state_tables = tuple(replace(v, state=j) for v in model.state_tables
                         for j, e in enumerate(kept) if base[e] == v.state)
    line_tables = tuple(replace(v, state=new[copy[k, v.state]])
                        for k, line in enumerate(phases) if line is not None
                        for v in line.tables
                        if not model.absorbing[v.state] and copy[k, v.state] in new)
    phase_on = None
    if moving:
        phase_on = np.tile(np.arange(len(kept)), (len(live), 1))
        for j, r in enumerate(live):
            if r in moving:
                phase_on[j] = [new.get(next_copy(moving[r], e), f) for f, e in enumerate(kept)]
    treatment = replace(t, on_factor=np.array(on)[live], off_factor=np.array(off)[live],
                        extra_cost=cost[kept], extra_utility=utility[kept], tables=line_tables)
    return replace(
        model, states=tuple(names[e] for e in kept), absorbing=model.absorbing[base[kept]],
        start=start[kept], state_cost=model.state_cost[base[kept]],
        state_utility=model.state_utility[base[kept]],
        risks=tuple(replace(risks[r], source=new[risks[r].source],
                            target=None if risks[r].target is None else new[risks[r].target])
                    for r in live),
        treatment=treatment, start_effects=tuple((new[e], x) for e, x in start_effects),
        entered_names=tuple(entered[e] for e in kept),
        stay_to=None if not waits or not countdown else np.array([new[stay[e]] for e in kept]),
        phase_on=phase_on,
        delay=0.0 if countdown or not waits else float(delay),
        delay_to=None if countdown or not waits else np.array([new[stay[e]] for e in kept]),
        treated_states=treated[kept], state_tables=state_tables)
