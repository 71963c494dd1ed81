"""Reading [arrivals], [[resources]] and [replications]: values land in their fields, and a
catalogue of bad files is refused in one line naming the exact field path.

The rules checked are the scenario format's own (docs/scenario-format.md, "Capacity");
the arrival file is read back with Python's csv module as the reference.
"""
from __future__ import annotations

import csv
from pathlib import Path

import pytest

from microsim.scenario import parse_scenario, read_scenario
from support import (arrivals, assert_refused, attribute, edited, horizon, parameters,
                     population, probability, rate, replications, resource, scenario_text,
                     start, state, strategy, table, transition)

SCENARIOS = Path(__file__).resolve().parent.parent / "scenarios"

SERVICE = scenario_text(
    horizon(400, unit="days"), start(age=60, treatment=1.0),
    state("treatment", cost=300), state("waiting", cost=20, utility=0.5),
    state("worse", cost=40, utility=0.3), state("elsewhere", utility=0.7),
    state("home", utility=0.8), state("dead", absorbing=True),
    rate("treatment", "home", 0.5), rate("waiting", "worse", 0.02), rate("worse", "dead", 0.01),
    rate("home", "dead", 0.001), rate("elsewhere", "dead", 0.001),
    table("referrals", by="time", starts=[0, 200], values=[0.3, 0.4]),
    parameters(chair_cost=80),
    population(None, attribute("urgency", "categorical", levels=["high", "low"],
                               shares=[0.3, 0.7]),
               attribute("score", "normal", mean=5, sd=1)),
    arrivals(rate="referrals"),
    resource("chairs", label="Treatment chairs", capacity=3, cost="chair_cost",
             state="treatment", waiting=["waiting", "worse"], queue_limit=20,
             turned_away="elsewhere", patience=60, leave_to="elsewhere", wait_target=14,
             priority={"attribute": "urgency", "levels": ["high", "low"]}),
    replications(count=3, warm_up=30),
    strategy("usual", comparator=True),
    strategy("more", resources={"chairs": {"capacity": 4}}),
    title="Service", provenance="Invented for tests; not real data.")


def test_values_land_in_their_fields():
    s = parse_scenario(SERVICE)
    assert s.warnings == ()  # waiting states are reached by waiting; `more` changes something
    chairs = s.capacity.resource("chairs")
    assert (chairs.label, chairs.capacity, chairs.cost, chairs.state, chairs.waiting) == \
        ("Treatment chairs", 3.0, "chair_cost", "treatment", ("waiting", "worse"))
    assert (chairs.queue_limit, chairs.turned_away, chairs.patience, chairs.leave_to,
            chairs.wait_target) == (20, "elsewhere", 60.0, "elsewhere", 14.0)
    assert (chairs.priority.attribute, chairs.priority.levels, chairs.priority.preemptive) == \
        ("urgency", ("high", "low"), False)
    assert s.capacity.arrivals.rate == "referrals"
    assert (s.capacity.replications.count, s.capacity.replications.warm_up) == (3, 30.0)
    assert s.population.size is None  # an open population has no fixed size
    assert s.strategy("usual").capacity is None
    changed = s.strategy("more").capacity.resource("chairs")
    assert changed.capacity == 4.0 and changed.queue_limit == 20 and changed.priority is not None


def test_an_open_population_estimates_its_warm_up_unless_told_and_a_cohort_starts_at_0():
    s = parse_scenario(edited(SERVICE, ("warm_up = 30\n", "")))
    assert s.capacity.replications.warm_up is None  # MSER-5
    closed = parse_scenario(edited(SERVICE, ('[arrivals]\nrate = "referrals"\n', ""),
                                   ("[population]\n", "[population]\npatients = 50\n"),
                                   ("warm_up = 30\n", ""), ("[tables.referrals]", "[tables.unused]")))
    assert closed.capacity.arrivals is None and closed.capacity.replications.warm_up == 0.0
    assert closed.population.size == 50


def test_priority_by_waiting_states_and_pre_emption():
    s = parse_scenario(edited(SERVICE, ('priority = { attribute = "urgency", levels = ["high", "low"] }',
                                        'priority = { states = ["worse", "waiting"], preemptive = true }')))
    priority = s.capacity.resource("chairs").priority
    assert (priority.states, priority.preemptive, priority.attribute) == (("worse", "waiting"), True, None)


def test_an_arrival_file_is_read_and_sorted(tmp_path):
    times = ["12.5", "0", "3", "7.25"]
    (tmp_path / "referrals.csv").write_text("time,note\n" + "".join(f"{t},x\n\n" for t in times))
    path = tmp_path / "service.toml"
    path.write_text(edited(SERVICE, ('rate = "referrals"\n\n[[resources]]',
                                     'file = "referrals.csv"\n\n[[resources]]')))
    s = read_scenario(path)
    with open(tmp_path / "referrals.csv", newline="") as f:
        reference = sorted(float(row["time"]) for row in csv.DictReader(f) if row["time"])
    assert s.capacity.arrivals.times == tuple(reference)
    assert s.capacity.arrivals.file == tmp_path / "referrals.csv"


def test_the_demo_loads_without_warnings():
    s = read_scenario(SCENARIOS / "fenmoor_joint_waiting.toml")
    assert s.warnings == () and "invented" in s.provenance.lower()
    assert "INVENTED" in (SCENARIOS / "fenmoor_joint_waiting.toml").read_text().split("\n\n")[0]
    assert [st.capacity is not None for st in s.strategies] == [False, True, True]


CLOSED = scenario_text(
    horizon(100, unit="days"), start(treatment=1.0), state("treatment"), state("waiting"),
    state("home", absorbing=True), rate("treatment", "home", 0.5), rate("waiting", "home", 0.01),
    resource("beds", capacity=2, state="treatment", waiting=["waiting"]),
    title="Closed", provenance="Invented for tests; not real data.")

DISCRETE = scenario_text(
    horizon(10), start(treatment=1.0), state("treatment"), state("waiting"),
    state("home", absorbing=True), probability("treatment", "home", 0.5),
    probability("treatment", "treatment", "remainder"), probability("waiting", "home", 0.1),
    probability("waiting", "waiting", "remainder"),
    resource("beds", capacity=2, state="treatment", waiting=["waiting"]),
    title="Cycles", provenance="Invented for tests; not real data.")

BASES = {"service": SERVICE, "closed": CLOSED, "discrete": DISCRETE}
PRIORITY = 'priority = { attribute = "urgency", levels = ["high", "low"] }'
WAITING = 'waiting = ["waiting", "worse"]'

# (id, base, edits, exact path, phrase in the message)
CASES = [
    ("top-level typo", "service", [("[[resources]]", "[[resource]]")],
     "resource", "did you mean 'resources'"),
    ("resource without a name", "service", [('name = "chairs"\n', "")],
     "resources[0].name", "is required"),
    ("two resources of one name", "closed",
     [('waiting = ["waiting"]', 'waiting = ["waiting"]\n\n[[resources]]\nname = "beds"\n'
                                'capacity = 1\nstate = "home"\nwaiting = ["waiting"]')],
     "resources[1].name", "duplicate resource name 'beds'"),
    ("unknown resource key", "service", [("wait_target = 14", "wait_targt = 14")],
     "resources.chairs.wait_targt", "did you mean 'wait_target'"),
    ("capacity not whole", "service", [("capacity = 3", "capacity = 2.5")],
     "resources.chairs.capacity", "must be a whole number of units, at least 1, got 2.5"),
    ("capacity zero", "service", [("capacity = 3", "capacity = 0")],
     "resources.chairs.capacity", "at least 1, got 0"),
    ("capacity negative", "service", [("capacity = 3", "capacity = -1")],
     "resources.chairs.capacity", "a capacity must be at least 0"),
    ("capacity table by age", "service",
     [("capacity = 3", 'capacity = "by_age"'),
      ("[parameters]", '[tables.by_age]\nby = "age"\nstarts = [0]\nvalues = [2]\n\n[parameters]')],
     "resources.chairs.capacity", "a capacity by period needs a table by time"),
    ("capacity table not whole", "service",
     [("capacity = 3", 'capacity = "chairs_by_period"'),
      ("[parameters]", '[tables.chairs_by_period]\nby = "time"\nstarts = [0, 100]\n'
                       "values = [2, 1.5]\n\n[parameters]")],
     "tables.chairs_by_period.values[1]", "1.5 is not a whole number of units"),
    ("capacity table all zero", "service",
     [("capacity = 3", 'capacity = "closed"'),
      ("[parameters]", '[tables.closed]\nby = "time"\nstarts = [0]\nvalues = [0]\n\n[parameters]')],
     "tables.closed.values", "never has a unit"),
    ("capacity parameter with a distribution", "service",
     [("capacity = 3", 'capacity = "n_chairs"'),
      ("chair_cost = 80", 'chair_cost = 80\nn_chairs = { value = 3, distribution = { family = '
                          '"gamma", shape = 9, scale = 0.33 } }')],
     "parameters.n_chairs.distribution", "a count of units; give it without a distribution"),
    ("capacity parameter not whole", "service",
     [("capacity = 3", 'capacity = "n_chairs"'), ("chair_cost = 80", "chair_cost = 80\nn_chairs = 3.5")],
     "parameters.n_chairs.value", "whole number of units"),
    ("estimate misspelt", "service", [("warm_up = 30", 'warm_up = "estimat"')],
     "replications.warm_up", 'or "estimate", got \'estimat\' (did you mean \'estimate\'?)'),
    ("undefined capacity cost", "service", [('cost = "chair_cost"', 'cost = "chair_cots"')],
     "resources.chairs.cost", "no parameter named 'chair_cots' (did you mean 'chair_cost'?)"),
    ("negative capacity cost", "service", [('cost = "chair_cost"', "cost = -5")],
     "resources.chairs.cost", "a capacity cost must be at least 0"),
    ("unknown held state", "service", [('state = "treatment"', 'state = "treatmnt"')],
     "resources.chairs.state", "unknown state 'treatmnt' (did you mean 'treatment'?)"),
    ("held state absorbing", "closed", [('state = "treatment"', 'state = "home"')],
     "resources.beds.state", "patients never leave 'home'"),
    ("held state with no way out", "closed", [("rate = 0.5", "rate = 0")],
     "resources.beds.state", "its units are never freed"),
    ("unknown waiting state", "service", [(WAITING, 'waiting = ["waitng", "worse"]')],
     "resources.chairs.waiting[0]", "unknown state 'waitng' (did you mean 'waiting'?)"),
    ("waiting in the held state", "service", [(WAITING, 'waiting = ["treatment", "worse"]')],
     "resources.chairs.waiting[0]", "'treatment' holds units of a resource"),
    ("waiting state absorbing", "service", [(WAITING, 'waiting = ["waiting", "dead"]')],
     "resources.chairs.waiting[1]", "'dead' is absorbing"),
    ("waiting states repeat", "service", [(WAITING, 'waiting = ["waiting", "waiting"]')],
     "resources.chairs.waiting[1]", "appears twice"),
    ("starting in a waiting state", "service",
     [("shares = { treatment = 1.0 }", "shares = { treatment = 0.9, waiting = 0.1 }")],
     "start.shares.waiting", "nobody starts there"),
    ("a transition into the queue", "service",
     [("[[transitions]]\nfrom = \"home\"\nto = \"dead\"",
       "[[transitions]]\nfrom = \"home\"\nto = \"waiting\"\nrate = 0.01\n\n"
       "[[transitions]]\nfrom = \"home\"\nto = \"dead\"")],
     "transitions.home->waiting.to", "send this transition to 'treatment' instead"),
    ("a transition from the queue to the held state", "service",
     [("[[transitions]]\nfrom = \"home\"\nto = \"dead\"",
       "[[transitions]]\nfrom = \"waiting\"\nto = \"treatment\"\nrate = 0.01\n\n"
       "[[transitions]]\nfrom = \"home\"\nto = \"dead\"")],
     "transitions.waiting->treatment", "when 'chairs' has a free unit; remove this transition"),
    ("queue limit without where to go", "service", [('turned_away = "elsewhere"\n', "")],
     "resources.chairs.turned_away", "is required with queue_limit"),
    ("where to go without a queue limit", "service", [("queue_limit = 20\n", "")],
     "resources.chairs.queue_limit", "is required with turned_away"),
    ("turned away into the queue", "service",
     [('turned_away = "elsewhere"', 'turned_away = "worse"')],
     "resources.chairs.turned_away", "'worse' is a waiting state"),
    ("turned away from one limited queue to another", "closed",
     [('waiting = ["waiting"]\n', 'waiting = ["waiting"]\nqueue_limit = 2\nturned_away = "home"\n\n'
                                  '[[resources]]\nname = "rooms"\ncapacity = 1\nstate = "home"\n'
                                  'waiting = ["other"]\nqueue_limit = 0\nturned_away = "treatment"\n'),
      ('absorbing = true', 'absorbing = true\n\n[[states]]\nname = "other"'),
      ('rate = 0.01', 'rate = 0.01\n\n[[transitions]]\nfrom = "home"\nto = "gone"\nrate = 0.1\n\n'
                      '[[transitions]]\nfrom = "other"\nto = "gone"\nrate = 0.1'),
      ('[[states]]\nname = "home"\nabsorbing = true', '[[states]]\nname = "home"\n\n'
                                                      '[[states]]\nname = "gone"\nabsorbing = true')],
     "resources.beds.turned_away", "could be turned away again and again"),
    ("patience without where to go", "service", [('leave_to = "elsewhere"\n', "")],
     "resources.chairs.leave_to", "is required with patience"),
    ("leaving to the held state", "service", [('leave_to = "elsewhere"', 'leave_to = "treatment"')],
     "resources.chairs.leave_to", "the state that holds the unit"),
    ("patience zero", "service", [("patience = 60", "patience = 0")],
     "resources.chairs.patience", "must be above 0"),
    ("negative queue limit", "service", [("queue_limit = 20", "queue_limit = -1")],
     "resources.chairs.queue_limit", "must be at least 0"),
    ("priority by an unknown attribute", "service",
     [(PRIORITY, 'priority = { attribute = "urgent", levels = ["high", "low"] }')],
     "resources.chairs.priority.attribute", "no attribute 'urgent' (did you mean 'urgency'?)"),
    ("priority level typo", "service",
     [(PRIORITY, 'priority = { attribute = "urgency", levels = ["high", "lo"] }')],
     "resources.chairs.priority.levels[1]", "'lo' is not a level of 'chairs' (did you mean 'low'?)"),
    ("priority leaves out a level", "service",
     [(PRIORITY, 'priority = { attribute = "urgency", levels = ["high"] }')],
     "resources.chairs.priority.levels", "leaves out 'low'"),
    ("priority by a number", "service",
     [(PRIORITY, 'priority = { attribute = "score", levels = ["1"] }')],
     "resources.chairs.priority.attribute", "'score' is a number"),
    ("priority with levels and states", "service",
     [(PRIORITY, 'priority = { states = ["worse", "waiting"], levels = ["a"] }')],
     "resources.chairs.priority.levels", "is only used with attribute"),
    ("priority by a state that is not waiting", "service",
     [(PRIORITY, 'priority = { states = ["home", "waiting"] }')],
     "resources.chairs.priority.states[0]", "'home' is not a waiting state of 'chairs'"),
    ("priority with neither", "service", [(PRIORITY, "priority = { preemptive = true }")],
     "resources.chairs.priority", "needs one of: attribute, states"),
    ("arrivals by rate and file", "service",
     [('rate = "referrals"\n\n[[resources]]', 'rate = "referrals"\nfile = "a.csv"\n\n[[resources]]')],
     "arrivals.file", "cannot be combined with rate"),
    ("arrivals by a table of age", "service",
     [('starts = [0, 200]', 'starts = [0, 200]'), ('by = "time"', 'by = "age"')],
     "arrivals.rate", "arrivals over calendar time need a table by time"),
    ("negative arrival rate", "service", [('rate = "referrals"\n\n[[resources]]',
                                           'rate = -1\n\n[[resources]]')],
     "arrivals.rate", "-1 is below 0; a rate must be at least 0"),
    ("no arrival file", "service", [('rate = "referrals"\n\n[[resources]]',
                                     'file = "nowhere.csv"\n\n[[resources]]')],
     "arrivals.file", "no such file"),
    ("arrival file not CSV", "service", [('rate = "referrals"\n\n[[resources]]',
                                          'file = "times.xlsx"\n\n[[resources]]')],
     "arrivals.file", "must be a .csv file with a column 'time'"),
    ("replications zero", "service", [("count = 3", "count = 0")],
     "replications.count", "must be at least 1"),
    ("warm-up beyond the end", "service", [("warm_up = 30", "warm_up = 400")],
     "replications.warm_up", "is at or beyond the end of the run (400 days)"),
    ("warm-up word typo", "service", [("warm_up = 30", 'warm_up = "estimat"')],
     "replications.warm_up", 'must be a number of days or "estimate"'),
    ("unknown replications key", "service", [("count = 3", "cuont = 3")],
     "replications.cuont", "did you mean 'count'"),
    ("replications of independent patients", "closed",
     [('[[resources]]\nname = "beds"\ncapacity = 2\nstate = "treatment"\nwaiting = ["waiting"]\n',
       "[replications]\ncount = 2\n")],
     "replications", "is only used with [arrivals] or [[resources]]"),
    ("one replication of a closed cohort", "closed",
     [('waiting = ["waiting"]\n', 'waiting = ["waiting"]\n\n[replications]\ncount = 1\n')],
     "replications.count", "give at least 2 replications"),
    ("a closed cohort without a size", "closed",
     [('waiting = ["waiting"]\n', 'waiting = ["waiting"]\n\n[population]\n\n'
                                  '  [[population.attributes]]\n  name = "x"\n'
                                  '  distribution = "normal"\n  mean = 0\n  sd = 1\n')],
     "population.patients", "is required"),
    ("capacity in a cycle model", "discrete", [],
     "resources", "capacity runs in continuous time"),
    ("an open population for a lifetime", "service",
     [("horizon = 400", 'horizon = "lifetime"'), ("warm_up = 30\n", "")],
     "time.horizon", "an open population ([arrivals]) runs for a stated time"),
    ("two resources hold one state", "closed",
     [('waiting = ["waiting"]\n', 'waiting = ["waiting"]\n\n[[resources]]\nname = "rooms"\n'
                                  'capacity = 1\nstate = "treatment"\nwaiting = ["home"]\n')],
     "resources.rooms.state", "'treatment' already holds units of resource 'beds'"),
    ("strategy changes an unknown resource", "service",
     [("resources = { chairs = { capacity = 4 } }", "resources = { chars = { capacity = 4 } }")],
     "strategies.more.resources.chars", "no resource named 'chars' (did you mean 'chairs'?)"),
    ("strategy changes a structural key", "service",
     [("resources = { chairs = { capacity = 4 } }",
       'resources = { chairs = { state = "home" } }')],
     "strategies.more.resources.chairs.state", "unknown key"),
    ("strategy capacity not whole", "service",
     [("resources = { chairs = { capacity = 4 } }", "resources = { chairs = { capacity = 4.5 } }")],
     "strategies.more.resources.chairs.capacity", "whole number of units"),
    ("strategy priority level typo", "service",
     [("resources = { chairs = { capacity = 4 } }",
       'resources = { chairs = { priority = { attribute = "urgency", levels = ["low", "hihg"] } } }')],
     "strategies.more.resources.chairs.priority.levels[1]", "did you mean 'high'"),
    ("strategy arrivals of a closed cohort", "closed",
     [('waiting = ["waiting"]\n', 'waiting = ["waiting"]\n\n[[strategies]]\nname = "a"\n'
                                  'comparator = true\n\n[[strategies]]\nname = "b"\n'
                                  "arrivals = { rate = 2 }\n")],
     "strategies.b.arrivals", "the scenario is a closed cohort"),
    ("strategy adds a transition into the queue", "service",
     [("resources = { chairs = { capacity = 4 } }",
       'resources = { chairs = { capacity = 4 } }\n\n  [[strategies.transitions]]\n'
       '  from = "home"\n  to = "worse"\n  rate = 0.01')],
     "strategies.more.transitions.home->worse.to", "'worse' is a waiting state of 'chairs'"),
]


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_refused_naming_the_field(case):
    _, base, edits, path, phrase = case
    assert_refused(edited(BASES[base], *edits), path, phrase)


def test_the_catalogue_bases_are_valid_except_the_cycle_model():
    assert parse_scenario(SERVICE).warnings == ()
    assert parse_scenario(CLOSED).warnings == ()


def test_an_arrival_file_with_a_bad_row_or_no_time_column(tmp_path):
    text = edited(SERVICE, ('rate = "referrals"\n\n[[resources]]', 'file = "a.csv"\n\n[[resources]]'))
    (tmp_path / "s.toml").write_text(text)
    for content, phrase in (("time\n1\n\nabc\n", "a.csv row 2: 'abc' is not an arrival time"),
                            ("time\n-3\n", "row 1: '-3' is not an arrival time"),
                            ("when\n1\n", "has no column 'time' (columns: when)"),
                            ("time\n", "has no arrival times")):
        (tmp_path / "a.csv").write_text(content)
        with pytest.raises(Exception) as caught:
            read_scenario(tmp_path / "s.toml")
        assert caught.value.path == "arrivals.file" and phrase in caught.value.message, caught.value
