"""`within` memory in cycle models: the expanded chain with "cycles since the last
occurrence" against a chain built here by hand in numpy, and against both cycle engines
(Monte-Carlo z-scores, |z| < 4, fixed seeds). Rate models keep no exact counterpart.

The hand-built chains follow the rules of docs/scenario-format.md: probabilities are read
at a cycle start with multipliers on the rate scale, p' = 1 - (1 - p)^m (Fleurence &
Hollenbeak 2007, "Rates and probabilities in economic modelling", from memory); every
occurrence happens at its cycle's end, so a window of `within` time units covers the
cycles that start less than `within` after it; starting in a state is entering it at 0."""
import numpy as np
import pytest

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.cohort.expand import expand
from microsim.cohort.summaries import chain_summary
from microsim.patients.population import cohort_patients, draw_population
from microsim.results.comparison import compare, critical_z, trace_table
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import (Z, after, attribute, effect, event, horizon, model_of, move, nested,
                     population, probability, rate, scenario_text, start, state, strategy,
                     table)

# ------------------------------------------------------------- against a hand-built chain

P_ILL, P_DIE_WELL, P_DIE_ILL, P_RECOVER, P_FLARE = 0.1, 0.02, 0.2, 0.1, 0.3

FLARES = scenario_text(
    horizon(15, cycle=1), start(well=0.8, ill=0.2),
    state("well"), state("ill"), state("dead", absorbing=True),
    # a flare doubles the hazard of falling ill for 2 cycles ...
    probability("well", "ill", P_ILL, memory=[after("flare", within=2, multiplier=2)]),
    probability("well", "dead", P_DIE_WELL), probability("well", "well", "remainder"),
    # ... and the first cycle after entering ill (starting there included) triples death
    probability("ill", "dead", P_DIE_ILL, memory=[after("ill", within=1, multiplier=3)]),
    probability("ill", "well", P_RECOVER), probability("ill", "ill", "remainder"),
    event("flare", ["well"], probability=P_FLARE))


def hand_chain():
    """The per-cycle matrix of FLARES over (state, f, e) and dead, written out by hand:
    f = cycles since the last flare (0, 1; 2 = not within 2 cycles, or never), e = cycles
    since entering ill (0; 1 = later, or never). In well, the flare (0.3, independent of
    the move) sets f to 0 for the next cycle; otherwise f and e age by one cycle, and a
    move into ill sets e to 0. Returns (P, start, collapse onto well/ill/dead, keys)."""
    keys = [(s, f, e) for s in ("well", "ill") for f in range(3) for e in range(2)] + ["dead"]
    at = {key: n for n, key in enumerate(keys)}
    P = np.zeros((len(keys), len(keys)))
    dead = at["dead"]
    for f in range(3):
        for e in range(2):
            f_aged, e_aged = min(f + 1, 2), min(e + 1, 1)
            well, ill = at["well", f, e], at["ill", f, e]
            p_ill = 1 - (1 - P_ILL) ** (2 if f < 2 else 1)
            for f_next, weight in ((0, P_FLARE), (f_aged, 1 - P_FLARE)):
                P[well, at["ill", f_next, 0]] += weight * p_ill
                P[well, at["well", f_next, e_aged]] += weight * (1 - p_ill - P_DIE_WELL)
            P[well, dead] += P_DIE_WELL
            p_die = 1 - (1 - P_DIE_ILL) ** (3 if e < 1 else 1)
            P[ill, at["well", f_aged, e_aged]] += P_RECOVER
            P[ill, at["ill", f_aged, e_aged]] += 1 - P_RECOVER - p_die
            P[ill, dead] += p_die
    P[dead, dead] = 1.0
    begin = np.zeros(len(keys))
    begin[at["well", 2, 1]], begin[at["ill", 2, 0]] = 0.8, 0.2
    collapse = np.array([[key != "dead" and key[0] == s for s in ("well", "ill")]
                         + [key == "dead"] for key in keys], float)
    return P, begin, collapse, keys


def hand_trace(P, begin, cycles):
    """pi_{n+1} = pi_n P (Chapman-Kolmogorov), cycle by cycle."""
    rows = [begin]
    for _ in range(cycles):
        rows.append(rows[-1] @ P)
    return np.array(rows)


def test_windows_match_the_hand_built_chain():
    model = model_of(FLARES)
    result = analytic(model)
    assert result.exact and "window" in result.method
    P, begin, collapse, keys = hand_chain()
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-15)
    expanded = hand_trace(P, begin, 15)
    np.testing.assert_allclose(result.trace[0], expanded @ collapse, rtol=0, atol=1e-12)
    # expected occurrences over the 15 cycles: the share at each cycle start times the
    # probability it then faces, summed (the same hand chain)
    at_starts = expanded[:-1]
    f = np.array([k[1] if k != "dead" else 2 for k in keys])
    e = np.array([k[2] if k != "dead" else 1 for k in keys])
    in_well, in_ill = collapse[:, 0], collapse[:, 1]
    expected = {
        "flare": at_starts @ (in_well * P_FLARE),
        "well->ill": at_starts @ (in_well * (1 - (1 - P_ILL) ** np.where(f < 2, 2, 1))),
        "ill->dead": at_starts @ (in_ill * (1 - (1 - P_DIE_ILL) ** np.where(e < 1, 3, 1))),
    }
    names = [r.name for r in model.risks]
    for name, per_cycle in expected.items():
        assert result.exposure.occurrences[0, names.index(name), 0] == pytest.approx(
            per_cycle.sum(), rel=1e-12), name


def test_chain_summary_starts_each_state_as_an_entry():
    # expected cycles to absorption from each start state: the row sums of the fundamental
    # matrix N = (I - Q)^-1 of the hand chain (Kemeny & Snell 1960, "Finite Markov Chains", from memory)
    P, _, _, keys = hand_chain()
    transient = [n for n, key in enumerate(keys) if key != "dead"]
    steps = np.linalg.solve(np.eye(len(transient)) - P[np.ix_(transient, transient)],
                            np.ones(len(transient)))
    from_state = {"well": steps[transient.index(keys.index(("well", 2, 1)))],
                  "ill": steps[transient.index(keys.index(("ill", 2, 0)))]}
    table_ = chain_summary(model_of(FLARES)).part("absorption").table.set_index("from_state")
    for name, value in from_state.items():
        assert table_.loc[name, "expected_time_years"] == pytest.approx(value, rel=1e-10)


# ------------------------------------------------------------------ against simulation

def windows_model(*blocks: str, cycles: int = 12, cycle: float = 1, begin=None) -> str:
    """well/ill/dead; `blocks` add the way into ill, the ways out of it and the events,
    with their memory."""
    return scenario_text(horizon(cycles * cycle, cycle=cycle),
                         start(**(begin or {"well": 1})),
                         state("well"), state("ill"), state("dead", absorbing=True),
                         probability("well", "dead", 0.02), probability("well", "well", "remainder"),
                         probability("ill", "ill", "remainder"), *blocks)


def onset(*memory, **fields) -> str:
    return probability("well", "ill", 0.1, memory=list(memory), **fields)


FLARE = event("flare", ["well"], probability=0.3)
ILL_EXITS = (probability("ill", "dead", 0.15), probability("ill", "well", 0.2))

CASES = {
    "whole cycles, two windows": FLARES,
    "one and a half cycles": windows_model(
        onset(after("flare", within=1.5, multiplier=4)), FLARE, *ILL_EXITS),
    # half a year: the cycle after the flare starts 0 years after it, the next 1 year after,
    # so the multiplier applies in exactly one cycle
    "shorter than a cycle": windows_model(
        onset(after("flare", within=0.5, multiplier=4)), FLARE, *ILL_EXITS),
    "entries into a state, starting there": windows_model(
        onset(), probability("ill", "dead", 0.1, memory=[after("ill", within=2, multiplier=4)]),
        probability("ill", "well", 0.3, memory=[after("well->ill", within=3, multiplier=0.3)]),
        begin={"well": 0.5, "ill": 0.5}),
    "with count memory on the same name": windows_model(
        onset(after("flare", multipliers=[1, 1.5, 3]), after("flare", within=2, multiplier=2)),
        # a flare's own probability falls for a cycle after it: an event feeding its window
        event("flare", ["well", "ill"], probability=0.4,
              memory=[after("flare", within=1, multiplier=0.25)]),
        probability("ill", "dead", 0.1, memory=[after("flare", within=3, multiplier=3)]),
        probability("ill", "well", 0.2)),
    "several windows, half-year cycles": windows_model(
        onset(after("flare", within=0.5, multiplier=3), after("flare", within=1.2, multiplier=2),
              after("ill", within=2, multiplier=0.2)),
        FLARE, *ILL_EXITS, cycles=16, cycle=0.5),
    # every later cycle start is less than 50 years after the flare: "ever flared"
    "longer than the horizon": windows_model(
        onset(after("flare", within=50, multiplier=4)), FLARE, *ILL_EXITS),
    # the engines' tolerance (1e-9 cycles) leaves no cycle start inside the window
    "vanishing window": windows_model(
        onset(after("flare", within=1e-12, multiplier=4)), FLARE, *ILL_EXITS),
    "with tunnel states": windows_model(
        onset(after("flare", within=2, multiplier=3)), FLARE,
        probability("ill", "dead", "die_by_stay", memory=[after("flare", within=2, multiplier=2)]),
        probability("ill", "well", 0.2),
        table("die_by_stay", by="time_in_state", starts=[0, 1, 3], values=[0.3, 0.1, 0.05])),
}


def assert_agrees_cell_by_cell(sim):
    """The comparison names the exact counterpart (the expanded chain unless no window
    ever applies) and every state share at every time, and every outcome, lies within
    |z| < Z of it (Monte-Carlo standard error)."""
    result = compare(sim)
    assert result.exact and result.agrees, result.verdict
    named = "expanded chain (tunnel/count/window states)" in result.counterpart
    assert named != expand(sim.model).trivial, result.counterpart
    assert np.all(np.abs(result.shares.z) < Z), result.shares.loc[result.shares.z.abs().idxmax()]
    tested = result.outcomes.z.notna()  # an untested outcome (test column) has no z
    assert np.all(np.abs(result.outcomes.z[tested]) < Z), result.outcomes
    if len(result.subgroups):
        assert np.all(np.abs(result.subgroups.z) < Z)
    return result


@pytest.mark.parametrize("engine, seed", [("vectorised", 11), ("simpy", 12)])
@pytest.mark.parametrize("name", CASES)
def test_cycle_engines_agree_with_the_expanded_chain(name, engine, seed):
    model = model_of(CASES[name])
    assert expand(model).exact
    assert_agrees_cell_by_cell(simulate(model, cohort_patients(3000), seed, engine=engine))


HETEROGENEOUS = windows_model(
    onset(after("flare", within=2, multiplier=3), effects=[effect("frail", 4)]),
    event("flare", ["well"], probability=0.3, effects=[effect("age", 1.03, centre=60)]),
    *ILL_EXITS,
    population(3000, attribute("frail", "yesno", prevalence=0.3),
               attribute("age", "uniform", lower=50, upper=70)))


@pytest.mark.parametrize("engine, seed", [("vectorised", 21), ("simpy", 22)])
def test_heterogeneous_population_agrees_patient_by_patient(engine, seed):
    # the counterpart is the average of each patient's own expanded chain
    model = model_of(HETEROGENEOUS)
    people = draw_population(model.scenario.population, seed)
    result = assert_agrees_cell_by_cell(simulate(model, people, seed, engine=engine))
    assert "averaged over patients" in result.counterpart


RESCUE = scenario_text(
    horizon(12, cycle=1), start(well=0.6, ill=0.4),
    state("well"), state("ill"), state("dead", absorbing=True),
    # relapse is likelier in the two years after entering well (at the start, or by rescue)
    probability("well", "ill", 0.1, memory=[after("well", within=2, multiplier=3)]),
    probability("well", "dead", 0.02), probability("well", "well", "remainder"),
    probability("ill", "dead", 0.15), probability("ill", "ill", "remainder"),
    strategy("usual", comparator=True),
    strategy("rescue", uptake=0.7, start=2, stop=9, discontinuation=0.15,
             changes=[nested(transition="ill->dead", hazard_ratio=0.6)],
             # the added transition works best in the first cycle after entering ill
             transitions=[move("ill", "well", name="rescue", probability=0.3,
                               memory=[after("ill", within=1, multiplier=2)])]))


@pytest.mark.parametrize("engine, seed", [("vectorised", 31), ("simpy", 32)])
def test_strategy_with_added_transition_and_treatment_window(engine, seed):
    # each patient's own treatment window (uptake, start, stop, discontinuation) enters
    # its expanded chain; the added transition feeds the window on entries into well
    model = bind(parse_scenario(RESCUE), strategy="rescue")
    assert expand(model).exact
    assert_agrees_cell_by_cell(simulate(model, cohort_patients(3000), seed, engine=engine))


def test_window_beyond_the_horizon_is_ever_having_flared():
    # the same trace as count memory with multipliers [1, 4] (checked against a hand-built
    # chain in test_cohort_analytic.py); the window is cut at the horizon's 12 cycles
    longer = model_of(CASES["longer than the horizon"])
    ever = model_of(CASES["longer than the horizon"].replace(
        "within = 50\n    multiplier = 4", "multipliers = [1, 4]"))
    assert expand(longer).recencies[0].cap == 12
    np.testing.assert_allclose(analytic(longer).trace, analytic(ever).trace, rtol=0, atol=1e-14)


def test_vanishing_window_changes_nothing():
    vanishing = CASES["vanishing window"]
    plain = vanishing.replace("within = 1e-12\n    multiplier = 4", "within = 1\n    multiplier = 1")
    np.testing.assert_allclose(analytic(model_of(vanishing)).trace,
                               analytic(model_of(plain)).trace, rtol=0, atol=1e-15)


def test_comparison_tells_a_wrong_window_length_apart():
    # the tests above could not fail if any window length passed: 1.5 cycles (a flare
    # raises the next two cycles) compared with the chains of 1 and 3 cycles is flagged
    text = CASES["one and a half cycles"]
    sim = simulate(model_of(text), cohort_patients(20_000), 13)
    for wrong in ("within = 1.0", "within = 2.5"):
        table_ = trace_table(sim, analytic(model_of(text.replace("within = 1.5", wrong))))
        assert np.abs(table_.z).max() > critical_z(len(table_)), wrong
    right = trace_table(sim, analytic(model_of(text)))
    assert np.abs(right.z).max() < Z


# ------------------------------------------------------------------------ rate models

def test_rate_models_keep_no_exact_counterpart_for_time_since_memory():
    # continuous time since an occurrence takes infinitely many values: no finite chain
    model = model_of(scenario_text(
        horizon(10), start(ill=1), state("ill"), state("dead", absorbing=True),
        rate("ill", "dead", 0.1, memory=[after("fall", within=0.5, multiplier=4)]),
        event("fall", ["ill"], rate=1)))
    exp = expand(model)
    assert not exp.exact and exp.size == model.n_states
    assert "time since the last 'fall'" in exp.reasons[0] and "rate model" in exp.reasons[0]
    assert analytic(model).exact is False
