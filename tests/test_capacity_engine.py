"""The capacity engine: where no resource ever runs out its histories are the event engine's,
draw for draw; replications depend only on (seed, replication); and the resources keep the
rules they are defined by.

References outside the capacity engine: `microsim.engines.event_engine.simulate_events`
(the independent model, run on the same patients and seed); the definitions of the queue
disciplines (first come first served, priority classes, pre-emption, a finite waiting room,
patience, a capacity by period: common practice, e.g. Gross, Shortle, Thompson & Harris 2008,
ch. 1, from memory), checked on every event of a run; and the patients' own histories,
whose time in the waiting states must equal the ledger's area under the queue length.
"""
from __future__ import annotations

import numpy as np
import pytest

from microsim.capacity import engine
from microsim.capacity.binding import bind_capacity
from microsim.capacity.engine import ADMITTED, GAVE_UP, LEFT, PREEMPTED, SERVED, TURNED
from microsim.capacity.run import replication, run_replications
from microsim.capacity.statistics import area, count_at
from microsim.engines.event_engine import simulate_events
from microsim.patients.population import patients_for
from microsim.patients.treatment import patient_multipliers
from microsim.scenario import parse_scenario
from support import (after, arrivals, attribute, effect, event, horizon, nested, population,
                     rate, replications, resource, scenario_text, start, state, strategy,
                     transition)

SEED = 11

RICH = scenario_text(
    horizon(60, unit="days"), start(ward=0.7, clinic=0.3),
    state("clinic", cost=10), state("ward", cost=100, utility=0.6), state("waiting", cost=5),
    state("home", utility=0.9), state("dead", absorbing=True),
    rate("clinic", "ward", 0.05, effects=[effect("age", 1.03, centre=60)]),
    transition("ward", "home", hazard={"family": "weibull", "shape": 1.4, "scale": 6},
               memory=[after("flare", multipliers=[1.0, 0.8])]),
    rate("ward", "dead", 0.004, effects=[effect("frail", 2.0)]),
    transition("home", "clinic", hazard={"family": "gompertz", "rate": 0.01, "shape": 0.02},
               clock="since_start"),
    rate("home", "dead", 0.001, memory=[after("ward", within=10, multiplier=3.0)]),
    rate("waiting", "dead", 0.01),
    event("flare", ["ward", "home"], rate=0.05),
    population(300, attribute("age", "normal", mean=60, sd=10),
               attribute("frail", "yesno", prevalence=0.3)),
    resource("beds", capacity=1000, state="ward", waiting=["waiting"]),
    replications(count=2),
    strategy("usual", comparator=True),
    strategy("drug", uptake=0.6, start=5, stop=40,
             changes=[nested(transition="ward->home", hazard_ratio=1.3)]))

FIELDS = ("patient", "time", "source", "target", "risk")


def assert_same_histories(a, b):
    for name in FIELDS:
        assert np.array_equal(getattr(a, name), getattr(b, name)), name


@pytest.mark.parametrize("name", [None, "drug"])
def test_a_capacity_that_never_binds_gives_the_event_engines_histories(name, monkeypatch):
    monkeypatch.setattr(engine, "CHUNK", 7)  # draws prepared in many small batches
    s = parse_scenario(RICH)
    cm = bind_capacity(s, name)
    run = replication(s, cm, SEED, 0, 300)
    assert (run.logs[0].outcome == SERVED).all() and np.all(run.logs[0].ended == run.logs[0].asked)
    people = patients_for(s, 300, SEED)
    mult = patient_multipliers(cm.model, people, SEED)
    reference = simulate_events(cm.model, mult, people.patient.to_numpy(), SEED)
    assert reference.n_patients == run.histories.n_patients == 300
    assert_same_histories(run.histories, reference)


def test_arrivals_that_never_wait_live_the_event_engines_lives_on_their_own_clocks():
    s = parse_scenario(RICH.replace("[population]\npatients = 300\n",
                                    "[arrivals]\nrate = 4\n\n[population]\n"))
    cm = bind_capacity(s)
    run = replication(s, cm, SEED, 0, None)
    ids = run.patients.patient.to_numpy()
    assert len(ids) > 100 and np.all(np.diff(run.arrival) >= 0)
    reference = simulate_events(cm.model, run.mult, ids, SEED)
    for b in range(len(ids)):
        local_end = cm.end - run.arrival[b]
        mine = run.histories.patient == b
        theirs = (reference.patient == b) & (reference.time < local_end)
        for name in FIELDS[1:]:
            assert np.array_equal(getattr(run.histories, name)[mine],
                                  getattr(reference, name)[theirs]), (b, name)


def test_replications_depend_only_on_the_seed_and_their_number():
    s = parse_scenario(service(capacity=2) + "\n" + strategy("usual", comparator=True) + "\n"
                       + strategy("busier", arrivals={"rate": 2.5}))
    cm = bind_capacity(s, "usual")
    together = run_replications(s, {"usual": cm, "busier": bind_capacity(s, "busier")}, SEED, 3,
                            None)["usual"]  # patients drawn once, for the busier arrivals
    alone = replication(s, cm, SEED, 2, None)
    assert_same_histories(together[2].histories, alone.histories)
    assert np.array_equal(together[2].logs[0].ended, alone.logs[0].ended)
    assert not np.array_equal(together[1].arrival[:50], together[2].arrival[:50])
    again = replication(s, cm, SEED, 2, None)
    assert_same_histories(again.histories, alone.histories)
    other = replication(s, cm, SEED + 1, 2, None)
    assert not np.array_equal(other.arrival[:50], alone.arrival[:50])


# ---------------------------------------------------------------- the rules of the queue

def service(capacity=2, population_fields=None, **fields) -> str:
    """Arrivals needing one of `capacity` chairs at once; waiting patients may get worse."""
    return scenario_text(
        horizon(300, unit="days"), start(treatment=1.0),
        state("treatment"), state("waiting"), state("worse"), state("elsewhere"),
        state("gone", absorbing=True),
        rate("treatment", "gone", 1.0), rate("waiting", "worse", 0.3),
        rate("elsewhere", "gone", 0.5),
        population(None, attribute("urgent", "yesno", prevalence=0.3)),
        arrivals(rate=1.8),
        resource("chairs", capacity=capacity, state="treatment", waiting=["waiting", "worse"],
                 **fields),
        replications(count=2, warm_up=0), title="queue rules")


def run_of(text: str, seed: int = SEED):
    s = parse_scenario(text)
    cm = bind_capacity(s)
    return cm, replication(s, cm, seed, 0, None)


def moments(log) -> np.ndarray:
    """Every time something happens at the resource."""
    times = np.concatenate([log.asked, log.ended, log.held_from, log.held_to])
    return np.unique(times[np.isfinite(times)])


def in_use(log, t):
    return count_at(log.held_from, log.held_to, t)


def waiting_at(log, t):
    return count_at(log.asked, log.ended, t)


def test_first_come_first_served_and_no_unit_idle_while_someone_waits():
    cm, run = run_of(service(capacity=2))
    log = run.logs[0]
    t = moments(log)
    assert in_use(log, t).max() == 2
    busy = waiting_at(log, t) > 0
    assert busy.any() and np.all(in_use(log, t)[busy] == 2)
    waited = (log.outcome == SERVED) & (log.ended > log.asked)
    assert waited.sum() > 50
    order = np.argsort(log.asked[waited], kind="stable")
    assert np.all(np.diff(log.ended[waited][order]) >= 0)  # admitted in the order they asked
    assert np.all(in_use(log, log.asked[waited]) == 2)


def test_time_in_the_waiting_states_is_the_area_under_the_queue():
    cm, run = run_of(service(capacity=2))
    h, log = run.histories, run.logs[0]
    shift = run.arrival[h.patient]
    start = h.time + shift
    following = np.append(h.time[1:], np.inf) + shift
    following[np.append(h.patient[1:] != h.patient[:-1], True)] = cm.end
    queue_states = np.isin(h.target, [cm.model.states.index(s) for s in ("waiting", "worse")])
    from_histories = np.sum((np.minimum(following, cm.end) - start)[queue_states])
    from_ledger = area(log.asked, np.minimum(log.ended, cm.end), [cm.end])[0]
    assert from_histories == pytest.approx(from_ledger, rel=1e-9)
    assert np.sum(h.risk == ADMITTED) == np.sum((log.outcome == SERVED) & (log.ended > log.asked))


def test_priority_by_attribute_serves_the_first_class_first():
    cm, run = run_of(service(capacity=2, priority={"attribute": "urgent", "levels": ["yes", "no"]}))
    log = run.logs[0]
    urgent = run.patients.urgent.to_numpy()[log.patient]
    assert np.array_equal(log.klass, np.where(urgent, 0, 1))
    admitted = np.flatnonzero((log.outcome == SERVED) & (log.ended > log.asked))
    assert admitted.size > 50
    for i in admitted:
        t = log.ended[i]
        others = (log.asked < t) & (log.ended > t)  # still waiting when i was admitted
        assert np.all(log.klass[others] >= log.klass[i])
        same = others & (log.klass == log.klass[i])
        assert np.all(log.asked[same] >= log.asked[i])
    first, second = (log.klass == 0) & (log.outcome == SERVED), (log.klass == 1) & (log.outcome == SERVED)
    assert (log.ended - log.asked)[first].mean() < (log.ended - log.asked)[second].mean()


def test_priority_by_waiting_state_serves_the_deteriorated_first():
    cm, run = run_of(service(capacity=2, priority={"states": ["worse", "waiting"]}))
    h = run.histories
    worse = cm.model.states.index("worse")
    calendar = h.time + run.arrival[h.patient]
    following = np.append(calendar[1:], np.inf)
    following[np.append(h.patient[1:] != h.patient[:-1], True)] = np.inf
    in_worse = h.target == worse
    admitted_from_waiting = (h.risk == ADMITTED) & (h.source == cm.model.states.index("waiting"))
    assert admitted_from_waiting.sum() > 20 and in_worse.sum() > 20
    for t in calendar[admitted_from_waiting]:
        # nobody was in the deteriorated queue at that moment (a move at t counts as after)
        assert not np.any(in_worse & (calendar < t) & (following > t))


def test_pre_emption_gives_the_first_class_a_unit_at_once():
    cm, run = run_of(service(capacity=2, priority={"attribute": "urgent", "levels": ["yes", "no"],
                                                   "preemptive": True}))
    log, h = run.logs[0], run.histories
    urgent = log.klass == 0
    assert np.sum(h.risk == PREEMPTED) > 5
    treatment, waiting = cm.model.states.index("treatment"), cm.model.states.index("waiting")
    assert np.all(h.source[h.risk == PREEMPTED] == treatment)
    assert np.all(h.target[h.risk == PREEMPTED] == waiting)
    # an urgent patient waits only while every unit serves an urgent patient
    urgent_holds = np.isin(log.holder, log.patient[urgent])
    urgent_waits = np.flatnonzero(urgent & (log.ended > log.asked))
    assert urgent_waits.size > 5
    for i in urgent_waits:
        t = log.asked[i]
        assert count_at(log.held_from[urgent_holds], log.held_to[urgent_holds], t) == 2


def test_a_full_waiting_room_turns_patients_away():
    cm, run = run_of(service(capacity=2, queue_limit=3, turned_away="elsewhere"))
    log, h = run.logs[0], run.histories
    turned = log.outcome == TURNED
    assert turned.sum() > 10
    t = moments(log)
    assert waiting_at(log, t).max() == 3
    assert np.all(waiting_at(log, log.asked[turned]) == 3)  # full at that moment
    assert np.all(in_use(log, log.asked[turned]) == 2)
    elsewhere = cm.model.states.index("elsewhere")
    assert np.sum(h.target == elsewhere) == turned.sum()


def test_patience_runs_out():
    cm, run = run_of(service(capacity=2, patience=2.0, leave_to="elsewhere"))
    log, h = run.logs[0], run.histories
    left = log.outcome == LEFT
    waits = log.ended - log.asked
    assert left.sum() > 10
    assert np.all(waits[np.isfinite(waits)] <= 2.0 + 1e-9)
    assert waits[left] == pytest.approx(np.full(left.sum(), 2.0))
    assert np.sum(h.risk == GAVE_UP) == left.sum()
    assert np.all(h.target[h.risk == GAVE_UP] == cm.model.states.index("elsewhere"))


def test_a_capacity_by_period_admits_nobody_beyond_it():
    periods = "[tables.chairs_by_period]\nby = \"time\"\nstarts = [0, 100, 200]\nvalues = [3, 1, 2]\n"
    text = service(capacity="chairs_by_period") + "\n" + periods
    cm, run = run_of(text)
    log = run.logs[0]
    units = np.array([3, 1, 2])[np.searchsorted([0, 100, 200], log.held_from, side="right") - 1]
    before = count_at(log.held_from, log.held_to, log.held_from) - 1  # the others holding then
    assert np.all(before < units)
    late = np.linspace(110, 199, 50)  # well after the cut: patients in service have left
    assert in_use(log, late).max() <= 1
    assert in_use(log, np.linspace(0, 99, 50)).max() == 3


def test_a_falling_capacity_never_pre_empts_a_patient():
    """With everyone in one class no patient can pre-empt another, so any pre-emption would
    be the units held back for a lower capacity taking a unit in use."""
    periods = "[tables.chairs_by_period]\nby = \"time\"\nstarts = [0, 100]\nvalues = [3, 1]\n"
    text = service(capacity="chairs_by_period",
                   priority={"attribute": "urgent", "levels": ["yes", "no"], "preemptive": True})
    busy = text.replace("prevalence = 0.3", "prevalence = 1.0").replace("rate = 1.8", "rate = 3.5")
    cm, run = run_of(busy + "\n" + periods)
    log = run.logs[0]
    assert in_use(log, 100 - 1e-9) == 3  # every unit in use when the capacity falls to 1 ...
    assert in_use(log, 100 + 1e-9) == 3  # ... and still in use just after
    assert not np.any(run.histories.risk == PREEMPTED)
