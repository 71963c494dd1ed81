"""A fixed delay from the trigger to treatment in rate models (`start_delay` with `start_on`).

References:
- the definition itself (docs/scenario-format.md, *A delay*): treatment starts exactly the
  delay after the trigger, whatever moves the patient makes meanwhile; read from the
  histories, patient by patient, to the last bit;
- closed forms of competing exponential risks (from memory: survival under a constant
  hazard mu is exp(-mu t); the first of a Poisson process of rate lambda is Exp(lambda)),
  checked against the simulation by binomial standard errors, |z| < 4;
- scipy.stats.gamma (reference library) for the analytic side's Erlang(n) wait, which that
  side must follow to round-off (it is the approximation it says it is);
- scipy.stats.kstest (reference library, through `support.assert_follows`) for the time in
  state running on through the phase change.
"""
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from microsim.binding import bind
from microsim.cli import main
from microsim.cohort.analytic import analytic
from microsim.cohort.expand import DELAY_STAGES
from microsim.engines.event_engine import simulate_events
from microsim.engines.histories import START
from microsim.patients.population import PATIENT, draw_population
from microsim.patients.treatment import patient_multipliers
from microsim.results.comparison import compare
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import (Z, after, arrivals, assert_engines_agree, assert_follows, assert_refused,
                     attribute, event, horizon, nested, parameters, population, rate, resource,
                     scenario_text, section, start, state, strategy, transition)
from test_treatment_phases import COMPARATOR

MU0, MU1, DELAY = 0.3, 0.1, 2.0  # death rate untreated and treated; years to treatment


def sick_from_the_start(delay=DELAY, end=6):
    """Everyone enters 'sick' at time 0, which starts the treatment `delay` later."""
    return scenario_text(
        horizon(end, cycle=0.5), start(sick=1), state("sick", cost=100),
        state("dead", absorbing=True), rate("sick", "dead", MU0, name="die"), COMPARATOR,
        strategy("treat", start_on="sick", start_delay=delay,
                 changes=[nested(transition="die", hazard_ratio=MU1 / MU0),
                          nested(cost=500)]))


ALPHA, MU, LAMBDA = 0.4, 0.1, 0.5  # progression, death from both states, flares


def on_flare(delay=1.5, end=8):
    """Treatment starts `delay` after the first flare; it adds a cost only, so the first
    flare is Exp(LAMBDA) and death Exp(MU) whatever the phase."""
    return scenario_text(
        horizon(end, cycle=0.5), start(stable=1), state("stable"), state("progressed"),
        state("dead", absorbing=True), rate("stable", "progressed", ALPHA, name="progress"),
        rate("stable", "dead", MU), rate("progressed", "dead", MU),
        event("flare", ["stable", "progressed"], rate=LAMBDA, cost=50), COMPARATOR,
        strategy("treat", start_on="flare", start_delay=delay,
                 changes=[nested(cost=80)]))


def on_progression(delay=1.0, end=10, hr=0.5):
    """Treatment starts `delay` after entering 'progressed', which patients may leave for
    'remission' (and come back) during the wait."""
    return scenario_text(
        horizon(end), start(stable=1), state("stable"), state("progressed"),
        state("remission"), state("dead", absorbing=True),
        rate("stable", "progressed", 0.5, name="progress"), rate("stable", "dead", 0.05),
        rate("progressed", "remission", 0.8), rate("remission", "progressed", 0.6),
        rate("progressed", "dead", 0.3, name="die"), rate("remission", "dead", 0.05),
        COMPARATOR,
        strategy("treat", start_on="progressed", start_delay=delay,
                 changes=[nested(transition="die", hazard_ratio=hr)]))


def histories(model, n, seed):
    ids = np.arange(n)
    mult = patient_multipliers(model, pd.DataFrame({PATIENT: ids}), seed)
    return simulate_events(model, mult, ids, seed)


def phase_changes(model, h):
    """{patient row: (trigger time, phase change time or None)} from the histories: the
    trigger is the first record that enters a waiting copy (the start record included)."""
    waiting = model.waiting
    out = {}
    for b in range(h.n_patients):
        mine = np.flatnonzero(h.patient == b)
        entering = [k for k in mine if waiting[h.target[k]] and (h.source[k] < 0
                                                                 or not waiting[h.source[k]])]
        if not entering:
            continue
        passed = [k for k in mine if h.risk[k] == START and h.source[k] >= 0]
        out[b] = (float(h.time[entering[0]]), float(h.time[passed[0]]) if passed else None)
    return out


@pytest.mark.parametrize("text", [on_progression(), on_flare(), sick_from_the_start()],
                         ids=["state-entered-later", "event", "state-at-time-0"])
def test_treatment_starts_exactly_the_delay_after_the_trigger(text):
    model = bind(parse_scenario(text), strategy="treat")
    h = histories(model, 3000, 41)
    end = model.n_cycles * model.cycle
    changes = phase_changes(model, h)
    assert len(changes) > 1000
    delay = model.delay
    for b, (trigger, passed) in changes.items():
        mine = np.flatnonzero(h.patient == b)
        died = h.time[mine[-1]] if model.absorbing[h.target[mine[-1]]] else math.inf
        if trigger + delay < min(end, died):
            assert passed == trigger + delay, b  # to the bit: the deadline's own sum
        else:
            assert passed is None, b
    # the phase change is no move: the treated copy of the state the patient was in
    passes = (h.risk == START) & (h.source >= 0)
    assert passes.any()
    assert all(model.entered(i) == model.entered(j) and model.treated_states[j]
               for i, j in zip(h.source[passes], h.target[passes]))


def test_moves_during_the_wait_neither_cancel_nor_restart_it():
    model = bind(parse_scenario(on_progression()), strategy="treat")
    h = histories(model, 3000, 43)
    changes = phase_changes(model, h)
    remission_wait = model.states.index("remission+treat-wait")
    moved = [b for b, (trigger, passed) in changes.items() if passed is not None and np.any(
        (h.patient == b) & (h.target == remission_wait) & (h.time < passed))]
    assert len(moved) > 100  # many went into remission and back (or not) while waiting
    for b in moved:
        trigger, passed = changes[b]
        assert passed == trigger + model.delay


def share(sim, state_name):
    return (sim.states == sim.model.states.index(state_name)).mean(axis=0)


def assert_binomial(observed, expected, n, *context):
    """|observed - expected| < Z binomial standard errors; a share of exactly 0 or 1 must
    be observed exactly."""
    for t, (o, p) in enumerate(zip(observed, expected)):
        if p in (0.0, 1.0):
            assert o == p, (*context, t)
        else:
            assert abs(o - p) < Z * math.sqrt(p * (1 - p) / n), (*context, t, o, p)


def test_entered_at_time_0_the_shares_follow_the_closed_form():
    # by hand: untreated (waiting) and alive exp(-mu0 t) before d and 0 after; treated and
    # alive exp(-mu0 d - mu1 (t - d)) from d on
    n = 4000
    model = bind(parse_scenario(sick_from_the_start()), strategy="treat")
    sim = simulate(model, pd.DataFrame({PATIENT: np.arange(n)}), 17)
    t = sim.grid
    waiting = np.where(t < DELAY, np.exp(-MU0 * t), 0.0)
    treated = np.where(t >= DELAY, np.exp(-MU0 * DELAY - MU1 * (t - DELAY)), 0.0)
    assert_binomial(share(sim, "sick+treat-wait"), waiting, n, "waiting")
    assert_binomial(share(sim, "sick+treat"), treated, n, "treated")


def test_after_an_event_the_treated_share_is_a_shifted_exponential_times_survival():
    # by hand: treatment starts at Exp(lambda) + d, death is Exp(mu) whatever the phase, so
    # P(alive and treated at t) = exp(-mu t) (1 - exp(-lambda (t - d))) for t > d, else 0
    n, d = 4000, 1.5
    model = bind(parse_scenario(on_flare(d)), strategy="treat")
    sim = simulate(model, pd.DataFrame({PATIENT: np.arange(n)}), 19)
    t = sim.grid
    treated = np.exp(-MU * t) * np.where(t > d, -np.expm1(-LAMBDA * (t - d)), 0.0)
    observed = share(sim, "stable+treat") + share(sim, "progressed+treat")
    assert_binomial(observed, treated, n, "treated")
    waiting = np.exp(-MU * t) * (np.exp(-LAMBDA * np.maximum(t - d, 0)) - np.exp(-LAMBDA * t))
    observed = share(sim, "stable+treat-wait") + share(sim, "progressed+treat-wait")
    assert_binomial(observed, waiting, n, "waiting")


def test_the_time_in_state_runs_on_through_the_start_of_treatment():
    # a Weibull hazard on the time since entering 'sick' (entered after the start): with
    # the clock running on, the time from entry to death has cumulative hazard H(u) before
    # d and H(d) + HR (H(u) - H(d)) after (H(u) = (u / scale)^shape); a clock restarted at
    # d would give H(d) + HR H(u - d) instead
    shape, scale, hr, d = 2.0, 2.0, 0.5, 1.0
    text = scenario_text(
        horizon(60), start(well=1), state("well"), state("sick"), state("dead", absorbing=True),
        rate("well", "sick", 1.0),
        transition("sick", "dead", name="die", clock="since_entry",
                   hazard=nested(family="weibull", shape=shape, scale=scale)),
        COMPARATOR, strategy("treat", start_on="sick", start_delay=d,
                             changes=[nested(transition="die", hazard_ratio=hr)]))
    model = bind(parse_scenario(text), strategy="treat")
    h = histories(model, 2000, 47)
    sick = [i for i in range(model.n_states) if model.entered(i) == "sick"]
    entry = h.time[(h.source == model.states.index("well")) & np.isin(h.target, sick)]
    death = h.time[np.isin(h.source, sick) & model.absorbing[h.target]]
    assert entry.size == death.size == 2000  # everyone falls sick and dies within 60 years

    def cdf(u):
        H = (np.asarray(u) / scale) ** shape
        Hd = (d / scale) ** shape
        return -np.expm1(-np.where(u < d, H, Hd + hr * (H - Hd)))
    assert_follows(death - entry, cdf)


def test_the_analytic_side_is_an_erlang_wait_and_says_it_is_not_exact():
    model = bind(parse_scenario(sick_from_the_start()), strategy="treat")
    result = analytic(model)
    assert not result.exact
    assert f"Erlang({DELAY_STAGES})" in result.reasons[0]
    # scipy.stats.gamma: an Erlang(n) time of mean d, with mortality mu0 while waiting
    t = result.times
    wait = stats.gamma(DELAY_STAGES, scale=DELAY / DELAY_STAGES).sf(t)
    np.testing.assert_allclose(result.trace[0, :, model.states.index("sick+treat-wait")],
                               np.exp(-MU0 * t) * wait, rtol=1e-9, atol=1e-12)


def test_validation_says_no_exact_counterpart_and_gives_no_verdict():
    model = bind(parse_scenario(on_progression()), strategy="treat")
    comparison = compare(simulate(model, pd.DataFrame({PATIENT: np.arange(500)}), 5))
    assert not comparison.exact and comparison.agrees is None
    assert "no exact counterpart" in comparison.counterpart
    assert "Erlang" in comparison.verdict and "orientation only" in comparison.verdict


def test_the_exact_basis_of_a_psa_refuses_a_delay(tmp_path):
    from microsim.scenario.errors import ScenarioError
    from microsim.uncertainty.psa import parameter_uncertainty
    text = on_progression(hr="hr") + parameters(hr=dict(value=0.5, distribution=dict(
        family="gamma", shape=36, scale=0.5 / 36))) + section(
        "uncertainty", draws=2, basis="exact") + population(
        50, attribute("frail", "yesno", prevalence=0.4))
    with pytest.raises(ScenarioError) as refused:
        parameter_uncertainty(parse_scenario(text), tmp_path / "psa", progress=False)
    assert refused.value.path == "uncertainty.basis"
    assert "Erlang" in refused.value.message and "strategy 'treat'" in refused.value.message
    assert not (tmp_path / "psa").exists()


def test_engines_give_the_same_histories_with_a_delay():
    text = on_progression().replace('start_delay = 1.0', 'start_delay = 1.0\nuptake = 0.7') + \
        population(1500, attribute("frail", "yesno", prevalence=0.4))
    text = text.replace('name = "progress"', 'name = "progress"\neffects = [{attribute = '
                        '"frail", hazard_ratio = 1.5}]')
    model = bind(parse_scenario(text), strategy="treat")
    assert_engines_agree(model, np.arange(1500) * 3 + 2, 7, rtol=1e-12)
    model = bind(parse_scenario(on_flare()), strategy="treat")
    assert_engines_agree(model, np.arange(1500) * 5 + 1, 9, rtol=1e-12)


def test_a_delay_of_0_is_the_model_without_a_delay_patient_for_patient():
    without = bind(parse_scenario(on_progression().replace("start_delay = 1.0\n", "")),
                   strategy="treat")
    zero = bind(parse_scenario(on_progression(0.0)), strategy="treat")
    assert zero.states == without.states and zero.delay_to is None
    one, two = histories(without, 1000, 3), histories(zero, 1000, 3)
    for name in ("patient", "time", "source", "target", "risk"):
        assert np.array_equal(getattr(one, name), getattr(two, name)), name


def test_a_delay_beyond_the_horizon_treats_no_one():
    scenario = parse_scenario(on_flare(delay=9.0, end=8))
    assert any(w.startswith("strategies.treat.start_delay: 9 years is not shorter than the "
                            "horizon (8 years)") for w in scenario.warnings), scenario.warnings
    assert not any("start_delay" in w for w in parse_scenario(on_flare()).warnings)
    model = bind(scenario, strategy="treat")
    h = histories(model, 2000, 11)
    assert np.any(model.waiting[h.target])  # patients flare and wait
    assert not np.any(model.treated_states[h.target])
    sim = simulate(model, pd.DataFrame({PATIENT: np.arange(2000)}), 11)
    assert not sim.treated.any()


def test_death_during_the_wait_ends_it_and_happens_at_the_untreated_rate():
    # by hand: everyone waits from 0; the share who die before d is 1 - exp(-mu0 d)
    n, mu0 = 3000, 0.6
    text = sick_from_the_start().replace(f"rate = {MU0}", f"rate = {mu0}")
    model = bind(parse_scenario(text), strategy="treat")
    h = histories(model, n, 13)
    wait = model.states.index("sick+treat-wait")
    died_waiting = np.unique(h.patient[(h.source == wait) & model.absorbing[h.target]])
    passed = np.unique(h.patient[(h.risk == START) & (h.source == wait)])
    assert not np.intersect1d(died_waiting, passed).size  # no treatment after death
    assert died_waiting.size + passed.size == n  # everyone either dies waiting or is treated
    p = -math.expm1(-mu0 * DELAY)
    assert abs(died_waiting.size / n - p) < Z * math.sqrt(p * (1 - p) / n)
    assert np.all(h.time[np.isin(h.patient, died_waiting) & model.absorbing[h.target]] < DELAY)


CAPACITY = scenario_text(
    horizon(100, unit="days"), start(waiting=0, treated=1), state("treated"),
    state("waiting"), state("home"), state("dead", absorbing=True),
    rate("treated", "home", 0.5), rate("home", "dead", 0.001), rate("waiting", "dead", 0.01),
    arrivals(rate=0.3), resource("chairs", capacity=2, state="treated", waiting=["waiting"]),
    section("replications", count=2),
    strategy("usual", comparator=True),
    title="Service", provenance="Invented for tests; not real data.")


@pytest.mark.parametrize("text, field, phrase", [
    (on_flare(delay=-1.0), "strategies.treat.start_delay", "at least 0"),
    (on_flare().replace('start_on = "flare"\n', ""), "strategies.treat.start_delay",
     "give start_on"),
    (CAPACITY + strategy("later", start_on="home", start_delay=3.0,
                         changes=[nested(state="home", cost=10)]),
     "strategies.later.start_on", "not available with [arrivals]"),
], ids=["negative", "no-trigger", "capacity"])
def test_refusals_are_one_line_and_exit_2(text, field, phrase, tmp_path, capsys):
    assert_refused(text, field, phrase)
    path = tmp_path / "bad.toml"
    path.write_text(text)
    assert main(["check", str(path)]) == 2
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {field}"), lines


def test_a_wait_that_ends_in_a_state_stopping_the_treatment_passes_to_the_next_one():
    # start 1.5 after a flare, stop on entering 'progressed', a second line after it: a
    # patient who progressed during the wait is never on the first treatment in
    # 'progressed' (it would stop at once) but on the second line from its deadline
    text = on_flare().replace('[[strategies.changes]]', 'stop_on = "progressed"\n\n'
                              '[[strategies.then]]\nname = "second"\n\n[[strategies.changes]]', 1)
    model = bind(parse_scenario(text), strategy="treat")
    assert "progressed+treat" not in model.states
    waiting = model.states.index("progressed+treat-wait")
    assert model.states[int(model.delay_to[waiting])] == "progressed+second"
    assert model.states[int(model.delay_to[model.states.index("stable+treat-wait")])] == \
        "stable+treat"
