"""The randomness contract (DESIGN.md, "Randomness"): every draw is a function of (run
seed, patient id, purpose, occurrence), so a patient's history does not change with the
population size, the batch size or the order in which patients are given; a different
seed gives different histories. Checked on both engines, with memory, events, covariates
and (in the rate model) enough events per patient to run past the precomputed draws; and
on the rate model under a strategy with treatment phases (a wait for treatment, a second
treatment), whose copies of a state continue the state's draws."""
import functools

import numpy as np
import pytest

from microsim.patients.multipliers import multipliers
from microsim.engines.cycle_engine import simulate_cycles
from microsim.engines.event_engine import simulate_events
from microsim.patients.population import draw_population
from microsim.simulation import simulate
from microsim.binding import bind
from microsim.scenario import parse_scenario
from support import (after, records_by_patient, attribute, effect, event, horizon, nested, outcomes,
                     population, probability, rate, scenario_text, start, state, strategy, table,
                     transition)

DISCOUNTS = outcomes(discount_costs=0.035, discount_effects=0.015)
POPULATION = population(1000, attribute("smoker", "yesno", prevalence=0.4),
                        attribute("age", "normal", mean=60, sd=8))

# a flare rate of 5 per year over 20 years gives many patients more rounds of draws in one
# state than the engine precomputes (tens), so draws made on demand are covered too
RATE_MODEL = scenario_text(
    DISCOUNTS, horizon(20), start(well=0.9, sick=0.1),
    state("well"), state("sick"), state("dead", absorbing=True),
    rate("well", "sick", 0.15, effects=[effect("smoker", 2)],
         memory=[after("flare", multipliers=[1, 1.2, 1.5])]),
    transition("sick", "well", hazard=dict(family="weibull", shape=1.4, scale=3)),
    transition("well", "dead", hazard=dict(family="gompertz", rate=0.005, shape=0.08),
               clock="since_start", effects=[effect("age", 1.05, centre=60)]),
    rate("sick", "dead", 0.05, memory=[after("sick", multipliers=[1, 1, 2])]),
    event("flare", ["well", "sick"], rate=5),
    POPULATION)

CYCLE_MODEL = scenario_text(  # attained age is unbounded: the moves compete
    DISCOUNTS, horizon(20, cycle=1, rule="competing"), start(well=0.9, sick=0.1),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.1, effects=[effect("smoker", 2)],
                memory=[after("flare", multipliers=[1, 1.5])]),
    probability("well", "dead", 0.02, effects=[effect("age", 1.05, centre=60)]),
    probability("well", "well", "remainder"),
    probability("sick", "well", "recover_by_stay"), probability("sick", "dead", 0.1),
    probability("sick", "sick", "remainder"),
    event("flare", ["well", "sick"], probability=0.3),
    table("recover_by_stay", by="time_in_state", starts=[0, 1, 3], values=[0.05, 0.2, 0.3]),
    POPULATION)


PHASES = "\n".join((RATE_MODEL, strategy("usual", comparator=True), strategy(
    "treat", start_on="sick", start_delay=0.5, stop_on="well",
    changes=[nested(transition="sick->dead", hazard_ratio=0.5)],
    then=[nested(name="second", changes=[nested(transition="well->sick", hazard_ratio=0.8)])])))

SEED = 31
ENGINES = {"rate": (RATE_MODEL, simulate_events), "cycle": (CYCLE_MODEL, simulate_cycles),
           "phases": (PHASES, simulate_events)}


def bound(name: str):
    """The model of ENGINES[name]: the phases' under its treating strategy."""
    scenario = parse_scenario(ENGINES[name][0])
    return bind(scenario, strategy="treat" if name == "phases" else None)


@pytest.fixture(scope="module", params=sorted(ENGINES))
def setup(request):
    return bound(request.param), ENGINES[request.param][1]


def people(model, ids):
    return draw_population(model.scenario.population, SEED, np.asarray(ids))


def histories_by_patient(model, engine, ids, seed=SEED):
    """Run the engine on patients `ids` in one batch: {patient id: its records}."""
    patients = people(model, ids)
    return records_by_patient(engine(model, multipliers(model, patients), np.asarray(ids), seed),
                              ids)


def rows(sim, ids, part="states"):
    """Some patients' rows of states, occurrences or time in state, found by patient id."""
    where = {int(p): i for i, p in enumerate(sim.patients["patient"])}
    index = [where[int(p)] for p in ids]
    return {"states": sim.states, "occurrences": sim.exposure.occurrences,
            "occupancy": sim.exposure.occupancy}[part][index]


def test_histories_do_not_depend_on_population_size(setup):
    model, engine = setup
    small = histories_by_patient(model, engine, np.arange(100))
    large = histories_by_patient(model, engine, np.arange(1000))
    for pid in range(100):
        assert np.array_equal(small[pid], large[pid])
    if engine is simulate_events:  # the contract covers draws past the precomputed block
        rounds_in_one_state = max(np.bincount(v[1:, 1].astype(int)).max() for v in small.values())
        assert rounds_in_one_state > 64


def test_histories_do_not_depend_on_order(setup):
    model, engine = setup
    ids = np.arange(200)
    shuffled = np.random.default_rng(5).permutation(ids)
    straight = histories_by_patient(model, engine, ids)
    mixed = histories_by_patient(model, engine, shuffled)
    for pid in ids:
        assert np.array_equal(straight[int(pid)], mixed[int(pid)])


@functools.cache
def runs(name):
    """The run of patients 0..999 in one batch, and runs it must match on the patients they
    share: (patient ids, run) for another size, batch sizes 1 and 7, and another order."""
    model = bound(name)
    reference = simulate(model, people(model, np.arange(1000)), SEED, batch_size=1000, keep_exposure=True)
    first, shuffled = np.arange(100), np.random.default_rng(9).permutation(1000)
    others = [(first, simulate(model, people(model, first), SEED, batch_size=size, keep_exposure=True))
              for size in (1000, 1, 7)]
    others.append((np.arange(1000), simulate(model, people(model, shuffled), SEED,
                                             batch_size=7, keep_exposure=True)))
    return reference, others


@pytest.mark.parametrize("part", ["states", "occurrences"])
@pytest.mark.parametrize("name", sorted(ENGINES))
def test_simulation_rows_do_not_depend_on_size_batch_or_order(name, part):
    reference, others = runs(name)
    for ids, run in others:
        assert np.array_equal(rows(run, ids, part), rows(reference, ids, part))


@pytest.mark.parametrize("name", sorted(ENGINES))
def test_time_in_state_rows_do_not_depend_on_size_batch_or_order(name):
    reference, others = runs(name)
    for ids, run in others:
        assert np.array_equal(rows(run, ids, "occupancy"), rows(reference, ids, "occupancy"))


def test_another_seed_gives_other_histories(setup):
    model, engine = setup
    ids = np.arange(100)
    one = histories_by_patient(model, engine, ids, seed=SEED)
    two = histories_by_patient(model, engine, ids, seed=SEED + 1)
    differ = sum(not np.array_equal(one[pid], two[pid]) for pid in range(100))
    # a patient's history repeats under another seed only when nothing can tell them
    # apart (e.g. a cycle-model patient who stays well without a flare for 20 cycles:
    # probability below 0.7^20 ~ 1e-3)
    assert differ >= 95


@pytest.mark.parametrize("name", sorted(ENGINES))
def test_threads_change_nothing(name, tmp_path):
    """Batches run on threads give every number and every history record of one thread,
    histories in the same order (microsim.threads)."""
    from microsim import threads
    import pandas as pd
    model = bound(name)
    patients = people(model, np.arange(600))
    sims = {}
    try:
        for used in (1, 3):
            threads.use(used)
            sims[used] = simulate(model, patients, SEED, batch_size=37, keep_exposure=True,
                                  histories=tmp_path / f"{used}.parquet")
    finally:
        threads.use(None)
    one, three = sims[1], sims[3]
    assert np.array_equal(one.states, three.states)
    assert np.array_equal(one.exposure.occupancy, three.exposure.occupancy)
    assert one.transitions == three.transitions > 0
    for measure in one.values:
        assert np.array_equal(one.values[measure], three.values[measure])
    pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "1.parquet"),
                                  pd.read_parquet(tmp_path / "3.parquet"))


def test_thread_count_refuses_nonsense(monkeypatch):
    from microsim import threads
    from microsim.scenario.errors import ScenarioError
    monkeypatch.setenv(threads.VARIABLE, "two")
    with pytest.raises(ScenarioError, match="MICROSIM_THREADS"):
        threads.count()
    monkeypatch.setenv(threads.VARIABLE, "3")
    assert threads.count() == 3
    with pytest.raises(ScenarioError, match="threads"):
        threads.use(0)
