"""Transitions and events that a treatment adds for its own time on treatment (the first
treatment, a strategy, and each later treatment of a sequence), against independent
computations.

References: the chain of the strategy written out by hand as a matrix, with a copy of each
state per treatment phase and each added transition or event only in the copies of its own
treatment's phase (common practice: health states by line of therapy), solved by scipy's
matrix exponential (rate models; time in state by the block-matrix integral of Van Loan
1978) or numpy matrix powers (cycle models) as reference libraries; closed forms of a
single exponential survival for an event within a treatment window. The strategy's exact
counterpart must equal them to round-off, and the simulation must agree with its exact
counterpart within |z| < 4 (the comparison's Bonferroni verdict). Common random numbers:
an added event leaves every other draw where it was (cycle models: every move; rate models:
every record until the event first happens).
"""
import numpy as np
import pytest
from scipy.linalg import expm

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.engines.histories import START
from microsim.patients.population import cohort_patients, draw_population
from microsim.patients.treatment import patient_multipliers
from microsim.results.comparison import compare
from microsim.results.outcomes import outcome_values
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import (assert_engines_agree, assert_refused, attribute, both_engines, horizon,
                     move, nested, population, probability, rate, records_by_patient,
                     scenario_text, start, state, strategy)
from test_treatment_phases import PATHWAY

COMPARATOR = strategy("usual", comparator=True)


def expm_trace(generator: np.ndarray, start_shares: np.ndarray, times: np.ndarray) -> np.ndarray:
    """(T, S) shares at `times` of the chain with this generator (scipy.linalg.expm)."""
    return np.stack([start_shares @ expm(generator * t) for t in times])


def generator(states: list[str], rates: dict[tuple[str, str], float]) -> np.ndarray:
    """The rate matrix of `rates` between named states, each row summing to 0."""
    q = np.zeros((len(states), len(states)))
    for (source, target), value in rates.items():
        q[states.index(source), states.index(target)] += value
    q -= np.diag(q.sum(axis=1))
    return q


def test_a_first_treatment_transition_acts_in_no_copy_outside_its_phase():
    # the added transition leaves 'stable', which is never treated (treatment starts on
    # entering 'progressed'): no patient may take it, before or after the fix of a binding
    # in which its hazard was 0 on and off treatment and so read by the engines as unchanged
    text = scenario_text(
        horizon(10), start(stable=1), state("stable"), state("progressed"), state("ae"),
        state("dead", absorbing=True), rate("stable", "progressed", 0.1),
        rate("stable", "dead", 0.05), rate("progressed", "dead", 0.2), rate("ae", "dead", 0.5),
        COMPARATOR, strategy("treat", start_on="progressed", changes=[nested(cost=1)],
                             transitions=[move("stable", "ae", rate=0.3, name="toxicity")]))
    model = bind(parse_scenario(text), strategy="treat")
    names = ["stable", "progressed+treat", "dead"]
    by_hand = expm_trace(generator(names, {
        ("stable", "progressed+treat"): 0.1, ("stable", "dead"): 0.05,
        ("progressed+treat", "dead"): 0.2}), np.array([1.0, 0, 0]), model.times)
    np.testing.assert_allclose(analytic(model).trace[0][:, [model.states.index(n) for n in names]],
                               by_hand, atol=1e-9)
    sim = simulate(model, cohort_patients(2000), seed=4)
    assert not any(n.startswith("ae") for n in model.states)  # no copy of 'ae' is reachable
    result = compare(sim)
    assert result.exact and result.agrees, result.verdict


def integrated(generator_matrix: np.ndarray, start_shares: np.ndarray, end: float) -> np.ndarray:
    """(S,) expected time in each state over [0, end]: the top-right block of
    expm([[Q, I], [0, 0]] end) is the integral of expm(Q s) over [0, end] (Van Loan 1978,
    "Computing integrals involving the matrix exponential")."""
    n = len(generator_matrix)
    block = np.zeros((2 * n, 2 * n))
    block[:n, :n], block[:n, n:] = generator_matrix, np.eye(n)
    return start_shares @ expm(block * end)[:n, n:]


def named(model, values: np.ndarray, names: list[str]) -> np.ndarray:
    """The model's values (last axis: its states) in the order of `names`, which must hold
    every state of the model."""
    assert sorted(model.states) == sorted(names)
    return values[..., [model.states.index(n) for n in names]]


# a rate model (test_treatment_phases.PATHWAY): first-line treatment on progression until
# relapse, then a second line that may cause neutropenia (an added state of the strategy,
# left at a rate whatever the treatment) and a rash (an event of its own), neither of which
# exists before it starts


RASH = [nested(name="rash", states=["relapsed"], rate=0.8, cost=150)]


def second_line(events=RASH, **fields) -> str:
    return strategy(
        "treat", start_on="progressed", stop_on="relapsed",
        changes=[nested(transition="relapse", hazard_ratio=0.5), nested(cost=1000)],
        states=[nested(name="neutropenia", cost=2000, utility=0.4)],
        transitions=[move("neutropenia", "relapsed", rate=2.0, while_treated=False)],
        then=[nested(name="second", changes=[nested(state="relapsed", cost=600)],
                     transitions=[move("relapsed", "neutropenia", rate=0.5, name="onset")],
                     events=events, **fields)])


HAND_STATES = ["stable", "progressed+treat", "relapsed+second", "neutropenia+second", "dead"]
HAND_RATES = {("stable", "progressed+treat"): 0.2, ("stable", "dead"): 0.02,
              ("progressed+treat", "relapsed+second"): 0.3 * 0.5, ("progressed+treat", "dead"): 0.1,
              ("relapsed+second", "dead"): 0.4, ("relapsed+second", "neutropenia+second"): 0.5,
              ("neutropenia+second", "relapsed+second"): 2.0}
HAND_START = np.array([0.9, 0.1, 0, 0, 0])


def test_a_second_treatment_s_transition_and_event_equal_the_hand_built_chain():
    model = bind(parse_scenario(scenario_text(*PATHWAY, COMPARATOR, second_line())),
                 strategy="treat")
    q = generator(HAND_STATES, HAND_RATES)
    result = analytic(model)
    np.testing.assert_allclose(named(model, result.trace[0], HAND_STATES),
                               expm_trace(q, HAND_START, model.times), atol=1e-9)
    time_in = integrated(q, HAND_START, 12.0)
    np.testing.assert_allclose(named(model, result.exposure.occupancy[0, :, 0], HAND_STATES),
                               time_in, rtol=1e-7)
    count = {name: sum(result.exposure.occurrences[0, r, 0] for r, risk in
                       enumerate(model.risks) if risk.name == name) for name in ("rash", "onset")}
    relapsed = time_in[HAND_STATES.index("relapsed+second")]
    assert count["rash"] == pytest.approx(0.8 * relapsed, rel=1e-7)
    assert count["onset"] == pytest.approx(0.5 * relapsed, rel=1e-7)
    costs = (np.array([100, 300 + 1000, 500 + 600, 2000, 0]) @ time_in + 150 * count["rash"])
    assert outcome_values(model, result.exposure)["costs"][0] == pytest.approx(costs, rel=1e-7)


def test_the_comparator_and_the_first_treatment_have_neither_addition():
    scenario = parse_scenario(scenario_text(*PATHWAY, COMPARATOR, second_line()))
    usual = bind(scenario)
    assert {"rash", "onset"}.isdisjoint(usual.risk_names)
    model = bind(scenario, strategy="treat")
    for risk in model.risks:
        if risk.name in ("rash", "onset"):
            assert model.states[risk.source] == "relapsed+second"


PEOPLE = population(3000, attribute("frail", "yesno", prevalence=0.4))


@pytest.mark.parametrize("uptake", [1.0, 0.6])
def test_simulation_with_a_second_treatment_s_additions_agrees_with_its_exact_counterpart(uptake):
    # with uptake 0.6 the patients not taken up pass through the copies of the second phase
    # without its additions (their hazard is 0 off treatment)
    text = scenario_text(
        *PATHWAY[:-1], rate("relapsed", "dead", 0.4, name="die_relapsed",
                            effects=[nested(attribute="frail", hazard_ratio=1.5)]),
        PEOPLE, COMPARATOR, second_line().replace('name = "treat"\n',
                                                  f'name = "treat"\nuptake = {uptake}\n'))
    scenario = parse_scenario(text)
    model = bind(scenario, strategy="treat")
    patients = draw_population(scenario.population, 21, np.arange(3000))
    sim = simulate(model, patients, 21)
    result = compare(sim)
    assert result.exact and result.agrees, result.verdict


def test_patients_not_taking_treatment_up_pass_the_second_phase_without_its_additions():
    # by hand: the share taken up follows the treated chain, the others the untreated one
    # (the same copies at the comparator's rates, with no onset and no rash)
    text = scenario_text(*PATHWAY, COMPARATOR, second_line().replace(
        'name = "treat"\n', 'name = "treat"\nuptake = 0.6\n'))
    model = bind(parse_scenario(text), strategy="treat")
    patients = cohort_patients(400)
    mult = patient_multipliers(model, patients, seed=5)
    taken = np.isfinite(mult.window.on).mean()
    assert 0.5 < taken < 0.7
    untreated = {("stable", "progressed+treat"): 0.2, ("stable", "dead"): 0.02,
                 ("progressed+treat", "relapsed+second"): 0.3, ("progressed+treat", "dead"): 0.1,
                 ("relapsed+second", "dead"): 0.4}
    by_hand = (taken * expm_trace(generator(HAND_STATES, HAND_RATES), HAND_START, model.times)
               + (1 - taken) * expm_trace(generator(HAND_STATES, untreated), HAND_START,
                                          model.times))
    mixture = analytic(model, patients, mult).trace.mean(axis=0)
    np.testing.assert_allclose(named(model, mixture, HAND_STATES), by_hand, atol=1e-9)


def test_a_second_treatment_stopped_by_its_own_event_equals_the_hand_built_chain():
    # the first rash stops the second treatment: by hand a move from 'relapsed+second' to
    # 'relapsed+stopped' at the rash's rate; after it neither the rash nor the onset exists
    # (so no copy of neutropenia after the stop is reachable)
    model = bind(parse_scenario(scenario_text(*PATHWAY, COMPARATOR,
                                              second_line(stop_on="rash"))), strategy="treat")
    names = HAND_STATES[:4] + ["relapsed+stopped", "dead"]
    rates = {**HAND_RATES, ("relapsed+second", "relapsed+stopped"): 0.8,
             ("relapsed+stopped", "dead"): 0.4}
    np.testing.assert_allclose(named(model, analytic(model).trace[0], names),
                               expm_trace(generator(names, rates), np.array([0.9, 0.1, 0, 0, 0, 0]),
                                          model.times), atol=1e-9)


# a cycle model: treated from the start until 'sick', the first treatment adding a move to
# an adverse-event state; the second treatment a move of its own to it and a rash
CYCLE = [
    horizon(15), start(well=1), state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.2), probability("well", "dead", 0.05),
    probability("well", "well", "remainder"), probability("sick", "well", 0.3),
    probability("sick", "dead", 0.1), probability("sick", "sick", "remainder")]
CYCLE_RASH = [nested(name="rash", states=["well", "sick"], probability=0.1, cost=50)]


def cycle_sequence(events=CYCLE_RASH) -> str:
    return strategy(
        "treat", stop_on="sick", changes=[nested(transition="well->sick", hazard_ratio=0.5)],
        states=[nested(name="ae", cost=500)],
        transitions=[move("well", "ae", probability=0.04, name="first_ae"),
                     move("ae", "well", probability=0.5, while_treated=False),
                     move("ae", "dead", probability=0.1, while_treated=False),
                     move("ae", "ae", probability="remainder", while_treated=False)],
        then=[nested(name="second", events=events, transitions=[
            move("sick", "ae", probability=0.06, name="second_ae")])])


def test_a_cycle_model_s_second_treatment_additions_equal_the_hand_built_matrix_powers():
    model = bind(parse_scenario(scenario_text(*CYCLE, COMPARATOR, cycle_sequence())),
                 strategy="treat")
    names = ["well+treat", "ae+treat", "sick+second", "well+second", "ae+second", "dead"]
    treated = 1 - (1 - 0.2) ** 0.5  # the hazard ratio on the rate scale, p' = 1 - (1 - p)^HR
    rows = {"well+treat": {"sick+second": treated, "dead": 0.05, "ae+treat": 0.04},
            "ae+treat": {"well+treat": 0.5, "dead": 0.1},
            "sick+second": {"well+second": 0.3, "dead": 0.1, "ae+second": 0.06},
            "well+second": {"sick+second": 0.2, "dead": 0.05},  # no first_ae: not on first
            "ae+second": {"well+second": 0.5, "dead": 0.1}, "dead": {}}
    p = np.zeros((6, 6))
    for source, moves in rows.items():
        for target, value in moves.items():
            p[names.index(source), names.index(target)] = value
        p[names.index(source), names.index(source)] = 1 - sum(moves.values())
    start_shares = np.eye(6)[0]
    by_hand = np.stack([start_shares @ np.linalg.matrix_power(p, n) for n in range(16)])
    result = analytic(model)
    np.testing.assert_allclose(named(model, result.trace[0], names), by_hand, atol=1e-12)
    # a rash is drawn at each cycle start in 'well' or 'sick' on the second treatment
    rashes = 0.1 * by_hand[:15, [names.index("sick+second"), names.index("well+second")]].sum()
    counted = sum(result.exposure.occurrences[0, r, 0] for r, risk in enumerate(model.risks)
                  if risk.name == "rash")
    assert counted == pytest.approx(rashes, rel=1e-10)
    result = compare(simulate(model, cohort_patients(3000), seed=8))
    assert result.exact and result.agrees, result.verdict


def test_an_added_event_leaves_every_cycle_model_move_as_it_was():
    # common random numbers: a cycle's move is drawn from the purpose "cycle:move" and each
    # event from its own, so the strategy with the second treatment's rash moves every
    # patient exactly as the strategy without it
    with_rash, without = (
        bind(parse_scenario(scenario_text(*CYCLE, COMPARATOR, cycle_sequence(events))),
             strategy="treat") for events in (CYCLE_RASH, None))
    assert with_rash.states == without.states and "rash" not in without.risk_names
    patients = cohort_patients(1500)
    one, two = simulate(with_rash, patients, seed=6), simulate(without, patients, seed=6)
    np.testing.assert_array_equal(one.states, two.states)
    assert one.states[:, -1].tolist().count(with_rash.states.index("dead")) > 0


def test_an_added_event_leaves_every_rate_model_history_as_it_was_until_it_happens():
    # each risk draws from its own purpose: until a patient's first rash, the strategy with
    # the rash gives each patient the records of the strategy without it
    with_rash, without = (
        bind(parse_scenario(scenario_text(*PATHWAY, COMPARATOR, second_line(events))),
             strategy="treat") for events in (RASH, None))
    ids = np.arange(1200)
    names = [{START: "start", **{r: risk.name for r, risk in enumerate(m.risks)}}
             for m in (with_rash, without)]
    one, two = (records_by_patient(both_engines(m, ids, 9)[0], ids) for m in (with_rash, without))
    rash_patients = 0
    for pid in ids.tolist():
        a, b = one[pid], two[pid]
        rashes = [k for k, row in enumerate(a) if names[0][int(row[3])] == "rash"]
        k = rashes[0] if rashes else len(a)
        rash_patients += bool(rashes)
        assert len(b) >= k
        np.testing.assert_array_equal(a[:k, :3], b[:k, :3])
        assert [names[0][int(r)] for r in a[:k, 3]] == [names[1][int(r)] for r in b[:k, 3]]
        if rashes and k < len(b):
            assert b[k, 0] > a[k, 0]  # without it the next record comes later
    assert 0 < rash_patients < len(ids)


def test_vectorised_engines_give_the_simpy_histories_with_a_second_treatment_s_additions():
    ids = np.arange(900) * 3 + 5
    assert_engines_agree(bind(parse_scenario(scenario_text(*PATHWAY, COMPARATOR, second_line())),
                              strategy="treat"), ids, 3, rtol=1e-12)
    assert_engines_agree(bind(parse_scenario(scenario_text(*CYCLE, COMPARATOR, cycle_sequence())),
                              strategy="treat"), ids, 3)


def later(**fields) -> str:
    """The strategy of PATHWAY with one later treatment of `fields`."""
    return strategy("treat", start_on="progressed", stop_on="relapsed",
                    states=[nested(name="neutropenia")],
                    transitions=[move("neutropenia", "relapsed", rate=2.0, while_treated=False),
                                 move("progressed", "neutropenia", rate=0.1, name="early")],
                    events=[nested(name="itch", states=["progressed"], rate=0.3)],
                    then=[nested(name="second", **fields)])


SECOND = "strategies.treat.then.second"


@pytest.mark.parametrize("fields, path, phrase", [
    (dict(transitions=[move("relapsed", "neutropnia", rate=0.5)]),
     f"{SECOND}.transitions.relapsed->neutropnia.to", "did you mean 'neutropenia'"),
    (dict(transitions=[move("relapsed", "neutropenia", rate=0.5, name="relapse")]),
     f"{SECOND}.transitions.relapsed->neutropenia.name", "already the name of transitions."),
    (dict(transitions=[move("relapsed", "neutropenia", rate=0.5, name="early")]),
     f"{SECOND}.transitions.relapsed->neutropenia.name",
     "already the name of strategies.treat.transitions.progressed->neutropenia"),
    (dict(transitions=[move("relapsed", "neutropenia", rate=0.5, name="relapsed")]),
     f"{SECOND}.transitions.relapsed->neutropenia.name", "is a state name"),
    (dict(transitions=[move("relapsed", "dead", rate=0.5)]),
     f"{SECOND}.transitions.relapsed->dead", "a second transition from 'relapsed' to 'dead'"),
    (dict(events=[nested(name="rash", states=["relapsd"], rate=0.5)]),
     f"{SECOND}.events.rash.states[0]", "did you mean 'relapsed'"),
    (dict(events=[nested(name="rash", states=["relapsed"], rate=0.5),
                  nested(name="rash", states=["neutropenia"], rate=0.5)]),
     f"{SECOND}.events.rash.name", "already the name of strategies.treat.then.second.events.rash"),
    (dict(events=[nested(name="rash", states=["relapsed"], probability=0.5)]),
     f"{SECOND}.events.rash", "use the model's kind"),
    (dict(transitions=[move("relapsed", "neutropenia", rate=0.5, while_treated=False)]),
     f"{SECOND}.transitions.relapsed->neutropenia.while_treated", "while_treated = false"),
    (dict(states=[nested(name="rash_state")]), "strategies.treat.then[0].states",
     "[[strategies.states]]"),
    (dict(transitions=[move("relapsed", "neutropenia", rat=0.5)]),
     f"{SECOND}.transitions.relapsed->neutropenia.rat", "did you mean 'rate'"),
    (dict(changes=[nested(transition="early", hazard_ratio=2.0)]),
     f"{SECOND}.changes[0].transition", "exists only while the first treatment (strategies.treat) is on"),
    (dict(stop_on="itch"), f"{SECOND}.stop_on",
     "'itch' is an event that only the first treatment (strategies.treat) has"),
    (dict(transitions=[move("relapsed", "neutropenia", rate=0.5, memory=[
        nested(after="rsh", multipliers=[1, 2])])]),
     f"{SECOND}.transitions.relapsed->neutropenia.memory[0].after", "is not a transition"),
], ids=["unknown-state", "model-name", "strategy-name", "state-name", "same-pair",
        "event-state", "event-twice", "event-kind", "while-treated", "states", "key-typo",
        "first-only-change", "first-only-stop", "memory-typo"])
def test_refusals(fields, path, phrase):
    assert_refused(scenario_text(*PATHWAY, COMPARATOR, later(**fields)), path, phrase)


def test_a_first_treatment_event_cannot_start_it():
    text = scenario_text(*PATHWAY, COMPARATOR, strategy(
        "treat", start_on="itch", changes=[nested(cost=1)],
        events=[nested(name="itch", states=["progressed"], rate=0.3)]))
    assert_refused(text, "strategies.treat.start_on",
                   "only the first treatment (strategies.treat) has, while it is on, so it "
                   "cannot start")


def test_a_cycle_model_s_later_transition_needs_room_in_its_row():
    text = scenario_text(
        horizon(10), start(well=1), state("well"), state("sick"), state("dead", absorbing=True),
        probability("well", "sick", 0.2), probability("well", "well", "remainder"),
        probability("sick", "dead", 0.1), probability("sick", "sick", 0.9), COMPARATOR,
        strategy("treat", stop_on="sick", changes=[nested(cost=1)], then=[nested(
            name="second", transitions=[move("sick", "well", probability=0.05)])]))
    assert_refused(text, f"{SECOND}.transitions.sick->well", "needs one in its row")


ALIVE = [horizon(10), start(alive=1), state("alive", cost=10), state("dead", absorbing=True),
         rate("alive", "dead", 0.1)]


@pytest.mark.parametrize("while_treated", [True, False])
def test_a_strategy_s_own_event_happens_only_on_treatment_unless_told(while_treated):
    # treated from time 2 to 6; the rash at rate 0.5 among the living, whose share is
    # exp(-0.1 t): 0.5 * integral of exp(-0.1 t) over [2, 6] on treatment only, over [0, 10]
    # whatever the treatment (closed form)
    text = scenario_text(*ALIVE, COMPARATOR, strategy(
        "treat", start=2, stop=6, events=[nested(name="rash", states=["alive"], rate=0.5,
                                                 cost=40, while_treated=while_treated)]))
    scenario = parse_scenario(text)
    model = bind(scenario, strategy="treat")
    low, high = (2.0, 6.0) if while_treated else (0.0, 10.0)
    rashes = 0.5 * (np.exp(-0.1 * low) - np.exp(-0.1 * high)) / 0.1
    result = analytic(model)
    counted = result.exposure.occurrences[0, model.risk_names.index("rash"), 0]
    assert counted == pytest.approx(rashes, rel=1e-7)
    costs = 10 * (1 - np.exp(-1.0)) / 0.1 + 40 * rashes
    assert outcome_values(model, result.exposure)["costs"][0] == pytest.approx(costs, rel=1e-7)
    assert "rash" not in bind(scenario).risk_names  # the comparator has none
    result = compare(simulate(model, cohort_patients(3000), seed=2))
    assert result.exact and result.agrees, result.verdict


def test_a_cycle_model_strategy_s_event_counts_only_cycles_started_on_treatment():
    # p = 0.2 a cycle for the living at each cycle start from 2 to 5 (treated on [2, 6)),
    # the living share after n cycles 0.9^n (closed form)
    text = scenario_text(
        horizon(10), start(alive=1), state("alive"), state("dead", absorbing=True),
        probability("alive", "dead", 0.1), probability("alive", "alive", "remainder"),
        COMPARATOR, strategy("treat", start=2, stop=6, events=[
            nested(name="rash", states=["alive"], probability=0.2)]))
    model = bind(parse_scenario(text), strategy="treat")
    counted = analytic(model).exposure.occurrences[0, model.risk_names.index("rash"), 0]
    assert counted == pytest.approx(0.2 * sum(0.9 ** n for n in range(2, 6)), rel=1e-12)


def test_a_strategy_s_event_with_a_typo_is_refused():
    text = scenario_text(*ALIVE, COMPARATOR, strategy(
        "treat", events=[nested(name="rash", states=["alive"], rate=0.5, while_treatd=True)]))
    assert_refused(text, "strategies.treat.events.rash.while_treatd",
                   "did you mean 'while_treated'")
    text = scenario_text(*ALIVE, COMPARATOR, strategy(
        "treat", events=[nested(name="rash", states=["dead"], rate=0.5)]))
    assert_refused(text, "strategies.treat.events.rash.states[0]", "absorbing")
