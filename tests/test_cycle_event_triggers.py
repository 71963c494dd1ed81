"""Treatment started or stopped by an event in cycle models, against hand-built chains.

Rule under test (docs/scenario-format.md, "After an event"): the event is drawn beside the
cycle's move, independently of it; when it happens, the patient ends the cycle in the next
phase's copy of the state the move led to (the first countdown copy with a delay), unless
the move changed the phase already or led to an absorbing state.

References outside the project: the same model written by hand as a Markov chain over the
copies of its states (common practice: a treatment history as states), whose transition
probabilities are products of the move's and the event's (independent draws), its trace
the matrix powers start @ P^n (numpy); a hazard ratio on a per-cycle probability acts on
the rate scale, p' = 1 - (1 - p)^HR (common practice). Simulations are checked against
their exact counterpart by the comparison's Bonferroni verdict (|z| < 4 per cell or
stricter).
"""
import numpy as np
import pandas as pd
import pytest

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.patients.population import draw_population
from microsim.results.comparison import compare
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import (after, assert_mean_agrees, assert_refused, attribute, both_engines, event,
                     horizon, move, nested, parameters, population, probability, scenario_text,
                     start, state, strategy, table)

P_SICK, P_DIE_WELL, P_DIE_SICK, Q = 0.15, 0.02, 0.2, 0.3  # the example of the format's page
HR_SICK, HR_DIE = 0.5, 0.8
COMPARATOR = strategy("usual", comparator=True)


def flaring(q=Q, n_cycles=8):
    """well, sick, dead; a flare in 'well' only, with per-cycle probability q."""
    return [horizon(n_cycles, cycle=1), start(well=1), state("well", cost=100),
            state("sick", cost=300), state("dead", absorbing=True),
            probability("well", "sick", P_SICK, name="fall_ill"),
            probability("well", "dead", P_DIE_WELL), probability("well", "well", "remainder"),
            probability("sick", "dead", P_DIE_SICK, name="die_sick"),
            probability("sick", "sick", "remainder"),
            event("flare", ["well"], probability=q, cost=40)]


def treat(**fields):
    return strategy("treat", changes=[nested(transition="fall_ill", hazard_ratio=HR_SICK),
                                      nested(transition="die_sick", hazard_ratio=HR_DIE),
                                      nested(cost=1000)], **fields)


def phased(*blocks, **fields):
    return bind(parse_scenario(scenario_text(*blocks, COMPARATOR, treat(**fields))),
                strategy="treat")


def on_rate_scale(p, hr):
    return 1 - (1 - p) ** hr


def chain(states, entries):
    """A transition matrix over `states` from {(from, to): probability}; rows sum to 1."""
    P = np.zeros((len(states), len(states)))
    for (a, b), p in entries.items():
        P[states.index(a), states.index(b)] += p
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-15)
    return P


def untreated_well(stay, sick, q=Q):
    """From untreated 'well': the move (stay, fall ill, die) and, independently, the flare,
    which sends the move's end state to `stay` / `sick` (its copies in the next phase)."""
    keep = 1 - P_SICK - P_DIE_WELL
    return {("well", "well"): keep * (1 - q), ("well", stay): keep * q,
            ("well", "sick"): P_SICK * (1 - q), ("well", sick): P_SICK * q,
            ("well", "dead"): P_DIE_WELL}


def treated(well, sick):
    ill = on_rate_scale(P_SICK, HR_SICK)
    die = on_rate_scale(P_DIE_SICK, HR_DIE)
    return {(well, well): 1 - ill - P_DIE_WELL, (well, sick): ill, (well, "dead"): P_DIE_WELL,
            (sick, sick): 1 - die, (sick, "dead"): die}


UNTREATED_SICK = {("sick", "sick"): 1 - P_DIE_SICK, ("sick", "dead"): P_DIE_SICK}


def trace_of(P, start_state, states, n):
    pi = np.zeros(len(states))
    pi[states.index(start_state)] = 1.0
    return np.array([pi @ np.linalg.matrix_power(P, k) for k in range(n + 1)])


def assert_matches_chain(model, P, start_state, treated_states):
    result = analytic(model)
    by_hand = trace_of(P, start_state, list(model.states), model.n_cycles)
    np.testing.assert_allclose(result.trace[0], by_hand, rtol=0, atol=1e-12)
    on = np.array([s in treated_states for s in model.states], float)
    np.testing.assert_allclose(result.trace[0] @ on, by_hand @ on, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(model.treated_states, on.astype(bool))
    # the flare is counted once per occurrence, in every copy of 'well', as without phases
    flares = sum(result.exposure.occurrences[0, r, 0] for r, risk in enumerate(model.risks)
                 if risk.name == "flare")
    wells = [model.states.index(s) for s in model.states if model.entered(model.states.index(s))
             == "well"]
    assert flares == pytest.approx(by_hand[:-1, wells].sum() * Q, rel=1e-12)
    return result


def test_treatment_started_by_a_flare_equals_the_hand_built_chain():
    model = phased(*flaring(), start_on="flare")
    states = ["well", "well+treat", "sick", "sick+treat", "dead"]
    assert list(model.states) == states
    P = chain(states, {**untreated_well("well+treat", "sick+treat"), **UNTREATED_SICK,
                       **treated("well+treat", "sick+treat"), ("dead", "dead"): 1.0})
    assert_matches_chain(model, P, "well", {"well+treat", "sick+treat"})


def test_a_delay_of_one_cycle_after_the_flare_equals_the_hand_built_countdown():
    # the flare sends the move's end state to its first countdown copy, which passes to the
    # treated copy at the next cycle end, whether the patient moves or stays
    model = phased(*flaring(), start_on="flare", start_delay=1.0)
    states = ["well", "well+treat-wait1", "well+treat", "sick", "sick+treat-wait1",
              "sick+treat", "dead"]
    assert list(model.states) == states
    keep = 1 - P_SICK - P_DIE_WELL
    countdown = {("well+treat-wait1", "well+treat"): keep,
                 ("well+treat-wait1", "sick+treat"): P_SICK,
                 ("well+treat-wait1", "dead"): P_DIE_WELL,
                 ("sick+treat-wait1", "sick+treat"): 1 - P_DIE_SICK,
                 ("sick+treat-wait1", "dead"): P_DIE_SICK}
    P = chain(states, {**untreated_well("well+treat-wait1", "sick+treat-wait1"),
                       **UNTREATED_SICK, **countdown, **treated("well+treat", "sick+treat"),
                       ("dead", "dead"): 1.0})
    assert_matches_chain(model, P, "well", {"well+treat", "sick+treat"})


def test_treatment_stopped_by_a_flare_equals_the_hand_built_chain():
    model = phased(*flaring(), stop_on="flare")
    states = ["well+treat", "well+stopped", "sick+treat", "sick+stopped", "dead"]
    assert list(model.states) == states
    ill = on_rate_scale(P_SICK, HR_SICK)
    keep = 1 - ill - P_DIE_WELL
    on = {("well+treat", "well+treat"): keep * (1 - Q), ("well+treat", "well+stopped"): keep * Q,
          ("well+treat", "sick+treat"): ill * (1 - Q), ("well+treat", "sick+stopped"): ill * Q,
          ("well+treat", "dead"): P_DIE_WELL}
    die = on_rate_scale(P_DIE_SICK, HR_DIE)
    off = {("well+stopped", "well+stopped"): 1 - P_SICK - P_DIE_WELL,
           ("well+stopped", "sick+stopped"): P_SICK, ("well+stopped", "dead"): P_DIE_WELL,
           ("sick+treat", "sick+treat"): 1 - die, ("sick+treat", "dead"): die,
           ("sick+stopped", "sick+stopped"): 1 - P_DIE_SICK, ("sick+stopped", "dead"): P_DIE_SICK}
    P = chain(states, {**on, **off, ("dead", "dead"): 1.0})
    assert_matches_chain(model, P, "well+treat", {"well+treat", "sick+treat"})


SECOND = nested(name="second", changes=[nested(transition="die_sick", hazard_ratio=0.6)])


def test_a_treatment_never_begins_in_a_state_that_stops_it():
    # stop_on 'sick', a second line after it: a flare in the cycle that falls ill starts the
    # first treatment in 'sick', which stops it at once, so the patient passes to the second
    # line (never 'sick+treat'), as a patient treated in 'well' who falls ill does
    model = phased(*flaring(), start_on="flare", stop_on="sick", then=[SECOND])
    states = ["well", "well+treat", "sick", "sick+second", "dead"]
    assert list(model.states) == states
    ill = on_rate_scale(P_SICK, HR_SICK)
    die = on_rate_scale(P_DIE_SICK, 0.6)
    P = chain(states, {**untreated_well("well+treat", "sick+second"), **UNTREATED_SICK,
                       ("well+treat", "well+treat"): 1 - ill - P_DIE_WELL,
                       ("well+treat", "sick+second"): ill, ("well+treat", "dead"): P_DIE_WELL,
                       ("sick+second", "sick+second"): 1 - die, ("sick+second", "dead"): die,
                       ("dead", "dead"): 1.0})
    assert_matches_chain(model, P, "well", {"well+treat", "sick+second"})


@pytest.mark.parametrize("delay", [1.0, 2.0])
def test_falling_ill_during_the_delay_passes_to_the_second_line_when_the_delay_ends(delay):
    # whether the patient fell ill in the countdown's last cycle or before it, the first
    # treatment would begin in 'sick', which stops it: the countdown ends in 'sick+second'
    model = phased(*flaring(), start_on="flare", stop_on="sick", then=[SECOND],
                   start_delay=delay)
    assert "sick+treat" not in model.states and "sick+second" in model.states
    ends = {model.states[int(j)] for i, j in enumerate(model.stay_to)
            if model.states[i].startswith("sick+treat-wait1")}
    assert ends == {"sick+second"}


def test_a_move_that_starts_treatment_itself_is_not_moved_on_again_by_the_flare():
    # start_on both 'sick' and the flare: a cycle that enters 'sick' with a flare starts
    # treatment once (the flare changes nothing more); one phase, no 'sick' before it
    model = phased(*flaring(), start_on=["sick", "flare"])
    states = ["well", "well+treat", "sick+treat", "dead"]
    assert list(model.states) == states
    keep = 1 - P_SICK - P_DIE_WELL
    P = chain(states, {("well", "well"): keep * (1 - Q), ("well", "well+treat"): keep * Q,
                       ("well", "sick+treat"): P_SICK, ("well", "dead"): P_DIE_WELL,
                       **treated("well+treat", "sick+treat"), ("dead", "dead"): 1.0})
    assert_matches_chain(model, P, "well", {"well+treat", "sick+treat"})


def test_time_in_state_runs_on_into_the_copy_the_flare_leads_to():
    # a transition the treatment adds reads a table by time in state: by hand, tunnels of
    # the cycles spent in 'well' (0, 1, 2 or more) before and after the flare, the treated
    # copy entered with the cycles already spent (the copies before treatment need no
    # tunnel of their own, yet must count the cycles for it)
    blocks = [horizon(7, cycle=1), start(well=1), state("well"), state("dead", absorbing=True),
              probability("well", "dead", 0.05, name="die"),
              probability("well", "well", "remainder"),
              event("flare", ["well"], probability=0.4),
              table("late_risk", by="time_in_state", starts=[0, 2], values=[0.0, 0.3])]
    model = bind(parse_scenario(scenario_text(*blocks, COMPARATOR, strategy(
        "treat", start_on="flare",
        transitions=[move("well", "dead", probability="late_risk", name="late")]))),
        strategy="treat")
    assert model.states == ("well", "well+treat", "dead")
    tunnels = ["u0", "u1", "u2", "t1", "t2", "dead"]
    entries = {("dead", "dead"): 1.0, ("t1", "t2"): 0.95, ("t1", "dead"): 0.05,
               ("t2", "t2"): 1 - 0.05 - 0.3, ("t2", "dead"): 0.05 + 0.3}
    for d in range(3):
        nxt = min(d + 1, 2)
        entries.update({(f"u{d}", f"u{nxt}"): 0.95 * 0.6, (f"u{d}", f"t{nxt}"): 0.95 * 0.4,
                        (f"u{d}", "dead"): 0.05})
    P = chain(tunnels, entries)
    by_hand = trace_of(P, "u0", tunnels, model.n_cycles)
    collapse = np.array([[1, 0, 0], [1, 0, 0], [1, 0, 0], [0, 1, 0], [0, 1, 0], [0, 0, 1]], float)
    np.testing.assert_allclose(analytic(model).trace[0], by_hand @ collapse, rtol=0, atol=1e-12)


# -- simulated against exact, and the deterministic edges --------------------------------

PEOPLE = population(3000, attribute("frail", "yesno", prevalence=0.4))


@pytest.mark.parametrize("fields", [
    dict(start_on="flare", uptake=0.7),
    dict(start_on="flare", start_delay=2.0),
    dict(start_on="flare", stop_on="sick", then=[nested(
        name="second", stop_on="flare",
        changes=[nested(transition="die_sick", hazard_ratio=0.6)])]),
], ids=["start", "delay", "sequence"])
def test_simulation_agrees_with_its_exact_counterpart(fields):
    # the flare in both living states, remembered (count memory), with a covariate effect
    blocks = flaring()[:-1] + [event(
        "flare", ["well", "sick"], probability=Q, cost=40,
        effects=[nested(attribute="frail", hazard_ratio=1.5)],
        memory=[after("flare", multipliers=[1, 0.5])]), PEOPLE]
    scenario = parse_scenario(scenario_text(*blocks, COMPARATOR, treat(**fields)))
    model = bind(scenario, strategy="treat")
    patients = draw_population(scenario.population, 31, np.arange(3000))
    sim = simulate(model, patients, 31, keep_exposure=True)
    result = compare(sim)
    assert result.exact and result.agrees, result.verdict
    # on treatment at the horizon, and flares per patient, against each patient's exact
    # expectation (central limit theorem)
    exact = analytic(model, mult=sim.mult)
    assert sim.grid[-1] == model.times[-1]
    on_at_end = model.treated_states[sim.states[:, -1]].astype(float)
    assert 0 < on_at_end.mean() < 1
    assert_mean_agrees(on_at_end, (exact.trace[:, -1] @ model.treated_states).mean(), "on")
    flares = [r for r, risk in enumerate(model.risks) if risk.name == "flare"]
    assert_mean_agrees(sim.exposure.occurrences[:, flares, 0].sum(axis=1),
                       exact.exposure.occurrences[:, flares, 0].sum(axis=1).mean(), "flares")


def test_a_certain_flare_starts_everyone_in_its_state_at_the_end_of_the_first_cycle():
    model = phased(*flaring(q=1.0), start_on="flare")
    ids = np.arange(400)
    _, got, _ = both_engines(model, ids, 11)
    alive = got.cycle_states[:, 1] != model.states.index("dead")
    assert alive.any() and (~alive).any()
    names = np.array(model.states)[got.cycle_states[:, 1]]
    assert set(names[alive]) <= {"well+treat", "sick+treat"}
    assert np.all(model.treated_states[got.cycle_states[alive, 1:]]
                  | (got.cycle_states[alive, 1:] == model.states.index("dead")))
    trace = analytic(model).trace[0]
    treated_share = trace @ model.treated_states
    assert treated_share[0] == 0.0
    np.testing.assert_allclose(treated_share[1], 1 - P_DIE_WELL, rtol=0, atol=1e-15)
    simulated = np.mean(model.treated_states[got.cycle_states[:, 1]])
    se = np.sqrt(P_DIE_WELL * (1 - P_DIE_WELL) / len(ids))
    assert abs(simulated - (1 - P_DIE_WELL)) < 4 * se


def test_an_impossible_flare_gives_the_untreated_histories_patient_for_patient():
    scenario = parse_scenario(scenario_text(*flaring(q=0.0), COMPARATOR, treat(start_on="flare")))
    ids = np.arange(500) * 7 + 1
    records = []
    for model in (bind(scenario, strategy="treat"), bind(scenario)):
        _, h, _ = both_engines(model, ids, 13)
        names = np.array([model.entered(s) for s in range(model.n_states)] + ["start"])
        risks = np.array([risk.name for risk in model.risks] + ["start"])
        records.append((h.patient, h.time, names[h.source], names[h.target], risks[h.risk]))
    for mine, theirs in zip(*records):
        assert np.array_equal(mine, theirs)
    assert len(records[0][0]) > len(ids)  # patients move
    model = bind(scenario, strategy="treat")
    assert np.all(analytic(model).trace[0] @ model.treated_states == 0.0)
    sims = [simulate(bind(scenario, strategy=name), pd.DataFrame({"patient": ids}), 13)
            for name in ("treat", None)]
    for measure, values in sims[0].values.items():
        np.testing.assert_allclose(values, sims[1].values[measure], rtol=1e-12, atol=0)
    assert any("start_on: no patient reaches flare" in w for w in scenario.warnings)


def test_a_flare_whose_probability_is_a_parameter_fixed_at_0_is_warned_of():
    blocks = flaring(q="p_flare") + [parameters(p_flare=0.0)]
    warnings = parse_scenario(scenario_text(*blocks, COMPARATOR, treat(start_on="flare"))).warnings
    assert any("start_on: no patient reaches flare" in w for w in warnings), warnings
    drawn = blocks[:-1] + [parameters(p_flare=nested(value=0.0, distribution=nested(
        family="beta", alpha=1, beta=50)))]  # 0 at the base case, drawn above it in a PSA
    warnings = parse_scenario(scenario_text(*drawn, COMPARATOR, treat(start_on="flare"))).warnings
    assert not any("no patient reaches" in w for w in warnings), warnings


# -- what is still refused ---------------------------------------------------------------

RASH = nested(name="rash", states=["sick"], probability=0.1)


@pytest.mark.parametrize("fields, path, phrase", [
    (dict(start_on="flair"), "strategies.treat.start_on", "did you mean 'flare'"),
    (dict(start_on="flare", stop_on="flare"), "strategies.treat.stop_on",
     "cannot stop on the entry that starts it"),
    (dict(start_on="rash", events=[RASH]), "strategies.treat.start_on",
     "only the first treatment (strategies.treat) has"),
    (dict(start_on="flare", stop_on="rash", then=[nested(name="second", events=[RASH])]),
     "strategies.treat.stop_on", "only the treatment strategies.treat.then.second has"),
    (dict(stop_on="flare", start_delay=1.0), "strategies.treat.start_delay", "give start_on"),
    (dict(start_on="flare", start_delay=0.5), "strategies.treat.start_delay",
     "not a whole number of cycles"),
], ids=["typo", "same-event", "while-treated-event", "later-treatment's-event", "delay-no-start",
        "part-cycle-delay"])
def test_refusals(fields, path, phrase):
    assert_refused(scenario_text(*flaring(), COMPARATOR, treat(**fields)), path, phrase)


def test_a_refusal_is_one_line_exit_2_and_nothing_written(tmp_path, capsys):
    # the command line's rule for bad input (docs: one line naming the field, exit 2)
    from microsim.cli import main
    path = tmp_path / "bad.toml"
    path.write_text(scenario_text(*flaring(), COMPARATOR, treat(start_on="flair")))
    out = tmp_path / "out"
    assert main(["run", str(path), "--patients", "10", "--out", str(out)]) == 2
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: strategies.treat.start_on"), lines
    assert not out.exists()
