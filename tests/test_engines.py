"""The engines against the analytic side and reference distributions, within Monte-Carlo
error: fixed seeds, |z| < 4 with standard errors from the binomial, the Poisson-binomial
or the sample standard deviation (common practice), Kolmogorov-Smirnov tests at level
0.001 against scipy.stats distributions (reference library)."""
import math
import signal
from contextlib import contextmanager

import numpy as np
import pytest
from scipy import stats
from scipy.linalg import expm

from microsim.cohort.analytic import analytic
from microsim.results.comparison import APPROXIMATE, FEWEST_FOR_MEANS, compare, critical_z, trace_table
from microsim.patients.multipliers import Multipliers
from microsim.engines.cycle_engine import simulate_cycles
from microsim.engines.event_engine import simulate_events
from microsim.patients.population import draw_population
from microsim.patients.population import cohort_patients
from microsim.simulation import simulate
from support import (Z, after, assert_follows, assert_mean_agrees, attribute, effect, event,
                     horizon, model_of, outcomes, population, probability, rate, scenario_text,
                     start, state, state_shares, table, transition)


def same_multipliers(n: int, risks: int, log_hr: float = 0.0) -> Multipliers:
    """Every patient with the same log multiplier on every risk, no age."""
    return Multipliers(np.full((n, risks), log_hr), np.zeros(risks), None)


def assert_shares_binomial(sim, p: np.ndarray):
    """Each simulated share within Z binomial standard errors sqrt(p (1 - p) / N) of p
    (common practice); where p is 0 or 1 (time 0, an empty state) the share is exactly p."""
    se = np.sqrt(p * (1 - p) / sim.size)
    observed = state_shares(sim)
    inside = se > 0
    assert np.all(np.abs(observed - p)[inside] < Z * se[inside])
    assert np.array_equal(observed[~inside], p[~inside])


# ------------------------------------------------- continuous engine, constant rates

RATE_MODEL = scenario_text(
    horizon(10), start(well=0.7, sick=0.3), outcomes(discount_costs=0.05),
    state("well"), state("sick", cost=100), state("dead", absorbing=True),
    rate("well", "sick", 0.15), rate("well", "dead", 0.03),
    rate("sick", "well", 0.1), rate("sick", "dead", 0.25),
    event("flare", ["sick"], rate=0.8))
RATE_Q = np.array([[-0.18, 0.15, 0.03], [0.1, -0.35, 0.25], [0.0, 0.0, 0.0]])
RATE_START = np.array([0.7, 0.3, 0.0])
GRID = np.linspace(0.0, 10.0, 11)


@pytest.fixture(scope="module")
def rate_run():
    model = model_of(RATE_MODEL)
    return model, simulate(model, cohort_patients(20_000), 101, grid=GRID, keep_exposure=True)


def test_event_engine_shares_match_matrix_exponential(rate_run):
    model, sim = rate_run
    # reference: scipy.linalg.expm; binomial standard error sqrt(p (1 - p) / N)
    p = np.array([RATE_START @ expm(RATE_Q * t) for t in GRID])
    assert_shares_binomial(sim, p)  # exact at time 0 and in the empty dead state


def test_event_engine_time_in_state_and_counts_match_analytic(rate_run):
    model, sim = rate_run
    expected = analytic(model, times=GRID)
    for s in range(model.n_states):
        for w in (0, 1):  # undiscounted and discounted at the cost rate
            assert_mean_agrees(sim.exposure.occupancy[:, s, w], expected.exposure.occupancy[0, s, w])
    for r in range(len(model.risks)):  # transitions and flares: counts per patient
        for w in (0, 1):
            assert_mean_agrees(sim.exposure.occurrences[:, r, w], expected.exposure.occurrences[0, r, w])


def test_event_engine_keeps_patients_in_a_state_with_no_way_out():
    """A non-absorbing state without transitions or events keeps everyone who enters it
    (an implicit self-loop, allowed by the format). Regression: the engine read the
    precomputed rounds of such a state, which do not exist, and crashed."""
    model = model_of(scenario_text(horizon(5), start(well=1.0), state("well", utility=1),
                                   state("stuck", utility=1), rate("well", "stuck", 0.5)))
    sim = simulate(model, cohort_patients(4000), 7)
    # reference: P(stuck at t) = 1 - exp(-0.5 t), closed form of a single exponential
    stuck = 1 - np.exp(-0.5 * sim.grid)
    assert_shares_binomial(sim, np.stack([1 - stuck, stuck], axis=1))
    assert np.all(np.diff(sim.states, axis=1) >= 0)  # nobody leaves "stuck"


# ------------------------------------------------------ sojourn times of parametric hazards

def two_state(hazard: dict, years: float) -> str:
    return scenario_text(horizon(years), start(alive=1),
                         state("alive"), state("dead", absorbing=True),
                         transition("alive", "dead", hazard=hazard))


# scipy's parameterisations (reference library): weibull_min S = exp(-(t/scale)^c);
# gompertz with c = rate/shape, scale = 1/shape has hazard rate e^{shape t};
# fisk (log-logistic) S = 1 / (1 + (t/scale)^c)
SOJOURNS = [
    ("weibull", dict(family="weibull", shape=1.5, scale=8), 0.0,
     stats.weibull_min(1.5, scale=8)),
    ("weibull-falling", dict(family="weibull", shape=0.7, scale=8), 0.0,
     stats.weibull_min(0.7, scale=8)),
    ("weibull-hr", dict(family="weibull", shape=1.5, scale=8), math.log(3.0),
     stats.weibull_min(1.5, scale=8 * 3.0 ** (-1 / 1.5))),
    ("gompertz", dict(family="gompertz", rate=0.02, shape=0.15), 0.0,
     stats.gompertz(0.02 / 0.15, scale=1 / 0.15)),
    ("loglogistic", dict(family="loglogistic", shape=2.5, scale=6), 0.0,
     stats.fisk(2.5, scale=6)),
]


@pytest.mark.parametrize("seed, case", list(enumerate(SOJOURNS)), ids=[c[0] for c in SOJOURNS])
def test_death_times_follow_the_hazard_family(seed, case):
    _, hazard, log_hr, reference = case
    horizon, n = 40.0, 5000
    model = model_of(two_state(hazard, horizon))
    h = simulate_events(model, same_multipliers(n, 1, log_hr), np.arange(n), seed)
    deaths = h.time[h.risk >= 0]
    # deaths before the horizon: binomial count, and the truncated distribution F(t) / F(T)
    died = reference.cdf(horizon)
    assert abs(len(deaths) - n * died) < Z * math.sqrt(n * died * (1 - died)) + 1e-9
    assert_follows(deaths, lambda t: reference.cdf(t) / died)


def test_sojourns_in_a_reentered_state_restart_the_entry_clock():
    # 'ill' is entered again and again; its exit is Weibull on the time since entry, with a
    # competing constant death: each stay lasts min(Weibull, exponential), survival
    # exp(-(t/2)^1.5 - 0.1 t) (independent competing risks, common practice)
    model = model_of(scenario_text(
        horizon(60), start(well=1),
        state("well"), state("ill"), state("dead", absorbing=True),
        rate("well", "ill", 0.5),
        transition("ill", "well", hazard=dict(family="weibull", shape=1.5, scale=2)),
        rate("ill", "dead", 0.1)))
    n = 1500
    h = simulate_events(model, same_multipliers(n, 3), np.arange(n), 17)
    ill = model.states.index("ill")
    entries = np.flatnonzero((h.target == ill) & (h.source != ill))
    following = np.minimum(entries + 1, len(h.time) - 1)  # the next record ends the stay
    ended = (entries + 1 < len(h.time)) & (h.patient[following] == h.patient[entries])
    began = h.time[entries]
    # a stay longer than 20 years has probability exp(-(10)^1.5 - 2) < 1e-14, so every stay
    # that began before year 40 ended before the horizon: no censoring among them
    assert np.all(ended[began < 40.0])
    durations = (h.time[following] - began)[ended & (began < 40.0)]
    assert len(durations) > 2000

    def cdf(t):
        return 1 - np.exp(-(t / 2) ** 1.5 - 0.1 * t)

    assert_follows(durations, cdf)


# -------------------------------------------------------------- heterogeneous population

HETEROGENEOUS = scenario_text(
    horizon(10), start(well=1),
    state("well", utility=1), state("sick", utility=0.5), state("dead", absorbing=True),
    rate("well", "sick", 0.1, effects=[effect("risk_factor", 2)]),
    rate("well", "dead", 0.01, effects=[effect("age", 1.08, centre=60)]),
    rate("sick", "dead", 0.15, effects=[effect("age", 1.08, centre=60)]),
    population(2000, attribute("risk_factor", "yesno", prevalence=0.3),
               attribute("age", "normal", mean=60, sd=8)))


def test_heterogeneous_population_matches_average_of_patient_traces():
    model = model_of(HETEROGENEOUS)
    people = draw_population(model.scenario.population, 3)
    grid = np.linspace(0.0, 10.0, 6)
    sim = simulate(model, people, 4, grid=grid)
    p = analytic(model, patients=people, times=grid).trace  # (N, T, S)
    # patients are independent Bernoulli trials with their own p: the share's standard
    # error is sqrt(sum p (1 - p)) / N (Poisson-binomial variance, common practice)
    se = np.sqrt((p * (1 - p)).sum(axis=0)) / len(people)
    observed, expected = state_shares(sim), p.mean(axis=0)
    inside = se > 0
    assert np.all(np.abs(observed - expected)[inside] < Z * se[inside])
    verdict = compare(sim)
    assert verdict.agrees is True, verdict.verdict


STRONG_HR = scenario_text(
    horizon(10), start(alive=1),
    state("alive", utility=1), state("dead", absorbing=True),
    rate("alive", "dead", 0.2, effects=[effect("risk_factor", 5)]),
    population(2000, attribute("risk_factor", "yesno", prevalence=0.5)))


def test_average_patient_misrepresents_a_strongly_heterogeneous_population():
    model = model_of(STRONG_HR)
    people = draw_population(model.scenario.population, 5)
    sim = simulate(model, people, 6)
    result = compare(sim)
    assert result.agrees is True, result.verdict
    row = result.average_patient.set_index("measure").loc["life_years"]
    # the average patient has the mean log hazard ratio: rate 0.2 * 5^prevalence, and expected
    # life years (1 - e^{-10 r}) / r (closed form, common practice)
    rate = 0.2 * 5.0 ** 0.5  # the population section's prevalence
    assert row.average_patient == pytest.approx((1 - math.exp(-10 * rate)) / rate, rel=1e-9)
    # both sides are exact, so the gap is a number: the population's own mean of
    # (1 - e^{-10 r_b}) / r_b with r_b = 0.2 * 5^{x_b} (closed form, common practice)
    rates = 0.2 * 5.0 ** people.risk_factor.to_numpy(float)
    population = np.mean((1 - np.exp(-10 * rates)) / rates)
    assert row.population == pytest.approx(population, rel=1e-9)
    assert row.difference == pytest.approx(row.average_patient - population, rel=1e-9)
    assert row.relative_difference == pytest.approx(row.difference / population, rel=1e-9)
    # Jensen's inequality: the population lives longer than its average patient, by far;
    # both sides are exact, so the only noise is which patients were sampled: the standard
    # error of the mean of the patients' own values (common practice)
    lives = (1 - np.exp(-10 * rates)) / rates
    assert row.se == pytest.approx(np.std(lives, ddof=1) / math.sqrt(lives.size), rel=1e-9)
    assert row.z == pytest.approx(row.difference / row.se, rel=1e-9)
    assert row.difference < -0.1 and row.z < -10 and row.basis.startswith("exact")
    assert "not Monte-Carlo noise" in result.average_verdict
    assert "so it is a property of the model" in result.average_verdict


@pytest.mark.parametrize("patients, verdict", [
    (FEWEST_FOR_MEANS - 1, "is not tested: fewer than"), (200, "so it may be chance")])
def test_an_exact_average_patient_gap_within_sampling_error_is_not_called_a_property(
        patients, verdict):
    # a weak hazard ratio (1.05): the Jensen gap is far below the sampling error of a few
    # hundred patients' prevalence, so the exact gap is mostly chance in the sample
    model = model_of(scenario_text(
        horizon(10), start(alive=1), state("alive", utility=1), state("dead", absorbing=True),
        rate("alive", "dead", 0.2, effects=[effect("risk_factor", 1.05)]),
        population(2000, attribute("risk_factor", "yesno", prevalence=0.5))))
    people = draw_population(model.scenario.population, 5).head(patients)
    result = compare(simulate(model, people, 6))
    assert result.average_patient.basis.iloc[0].startswith("exact")
    assert verdict in result.average_verdict, result.average_verdict
    assert "property of the model" not in result.average_verdict


# ---------------------------------------------------------------------- cycle engine

CYCLE_MODEL = scenario_text(
    horizon(12, cycle=1), start(well=0.8, sick=0.2), outcomes(discount_effects=0.035),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.1), probability("well", "dead", 0.02),
    probability("well", "well", "remainder"),
    probability("sick", "well", 0.05), probability("sick", "dead", 0.2),
    probability("sick", "sick", "remainder"))

TUNNEL = scenario_text(
    horizon(12, cycle=1), start(healthy=1),
    state("healthy"), state("sick"), state("dead", absorbing=True),
    probability("healthy", "sick", 0.15), probability("healthy", "dead", 0.02),
    probability("healthy", "healthy", "remainder"),
    probability("sick", "dead", "die_by_stay"), probability("sick", "healthy", "recover_by_stay"),
    probability("sick", "sick", "remainder"),
    table("die_by_stay", by="time_in_state", starts=[0, 1, 2], values=[0.2, 0.1, 0.05]),
    table("recover_by_stay", by="time_in_state", starts=[0, 1, 2], values=[0.0, 0.1, 0.3]))

COUNTS = scenario_text(
    horizon(12, cycle=1), start(well=1),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.1, memory=[after("flare", multipliers=[1, 1.5, 2])]),
    probability("well", "dead", 0.02), probability("well", "well", "remainder"),
    probability("sick", "dead", 0.2), probability("sick", "sick", "remainder"),
    event("flare", ["well"], probability=0.3))


WINDOW = scenario_text(
    horizon(12, cycle=1), start(well=1),
    state("well"), state("sick"), state("dead", absorbing=True),
    probability("well", "sick", 0.1, memory=[after("flare", within=2, multiplier=3)]),
    probability("well", "dead", 0.02), probability("well", "well", "remainder"),
    probability("sick", "dead", 0.2), probability("sick", "sick", "remainder"),
    event("flare", ["well"], probability=0.3))


@pytest.mark.parametrize("text", [CYCLE_MODEL, TUNNEL, COUNTS, WINDOW],
                         ids=["homogeneous", "tunnel", "count-memory", "window-memory"])
def test_cycle_engine_matches_expanded_chain(text):
    # the analytic side here is the expanded chain checked against hand-written chains in
    # test_cohort_analytic.py and test_cohort_windows.py
    model = model_of(text)
    sim = simulate(model, cohort_patients(8000), 202, keep_exposure=True)
    expected = analytic(model)
    assert_shares_binomial(sim, expected.trace[0])
    for s in range(model.n_states):  # time in state, half-cycle rule, with and without discount
        for w in (0, 2):
            assert_mean_agrees(sim.exposure.occupancy[:, s, w], expected.exposure.occupancy[0, s, w])
    for r in range(len(model.risks)):
        if np.any(sim.exposure.occurrences[:, r, 0]):
            assert_mean_agrees(sim.exposure.occurrences[:, r, 0], expected.exposure.occurrences[0, r, 0])
        else:
            assert expected.exposure.occurrences[0, r, 0] == 0.0


# ------------------------------------------------------------ memory of the last event

WITHIN = scenario_text(
    horizon(10), start(ill=1),
    state("ill"), state("dead", absorbing=True),
    rate("ill", "dead", 0.1, memory=[after("fall", within=0.5, multiplier=4)]),
    event("fall", ["ill"], rate=1))


@contextmanager
def deadline(seconds: float):
    """Raise TimeoutError in the main thread if the block runs longer than `seconds`."""
    def expire(signum, frame):
        raise TimeoutError(f"still running after {seconds} s")
    previous = signal.signal(signal.SIGALRM, expire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def reference_survival(grid, paths: int, seed: int):
    """Survival under a death rate 0.1, times 4 within 0.5 years after a fall, falls a
    Poisson process of rate 1 (independent of death while alive), by direct numpy
    simulation of the falls: S(t) = E exp(-0.1 t - 0.3 |{s < t: a fall in (s - 0.5, s]}|).
    The window after fall i lasts until min(f_i + 0.5, f_{i+1}), so the windows are
    disjoint and their lengths add up."""
    rng = np.random.default_rng(seed)
    counts = rng.poisson(10.0, paths)
    falls = np.full((paths, counts.max() + 1), np.inf)
    for j, k in enumerate(counts):
        falls[j, :k] = np.sort(rng.uniform(0.0, 10.0, k))
    ends = np.minimum(falls[:, :-1] + 0.5, falls[:, 1:])
    starts = falls[:, :-1]
    covered = np.stack([np.clip(np.minimum(ends, t) - starts, 0.0, None).sum(axis=1)
                        for t in grid], axis=1)
    return np.exp(-0.1 * grid - 0.3 * covered)


def test_time_since_memory_matches_direct_simulation_of_falls():
    # the deadline also guards the end of a window: a rounding slip there once made a
    # patient wait zero time at the same change point forever
    model = model_of(WITHIN)
    grid = np.linspace(0.0, 10.0, 6)
    n, paths = 4000, 20_000
    with deadline(5.0):  # a few tenths of a second when it works
        sim = simulate(model, cohort_patients(n), 3, grid=grid)
    alive = (sim.states == 0).mean(axis=0)
    paths_survival = reference_survival(grid, paths, 4)
    expected = paths_survival.mean(axis=0)
    se = np.sqrt(expected * (1 - expected) / n + paths_survival.var(axis=0) / paths)
    assert np.all(np.abs(alive - expected)[1:] < Z * se[1:])


MONTHLY_WINDOW = scenario_text(
    horizon(1, cycle=0.08333333333333333), start(well=1),
    state("well"), state("dead", absorbing=True),
    probability("well", "dead", 0.0), probability("well", "well", "remainder"),
    event("flare", ["well"], probability="first_cycle_only"),
    event("check", ["well"], probability=0.5,
          memory=[after("flare", within=0.5, multiplier=1e-12)]),
    table("first_cycle_only", by="time", starts=[0, 0.08333333333333333], values=[1, 0]))


def test_cycle_engine_time_since_window_lasts_whole_cycles():
    # every patient flares in cycle 0 (recorded at its end, 1/12); checks (50% a cycle) are
    # suppressed (multiplier 1e-12) while less than half a year has passed since then: in
    # cycles 1..6; from cycle 7 on, half a year has passed (the format's rule: "applies
    # while less than `within` has passed since the last occurrence")
    model = model_of(MONTHLY_WINDOW)
    n = 400
    h = simulate_cycles(model, same_multipliers(n, len(model.risks)), np.arange(n), 12)
    check = [r.name for r in model.risks].index("check")
    cycle_of = np.rint(h.time[h.risk == check] * 12).astype(int) - 1  # recorded at cycle end
    per_cycle = np.bincount(cycle_of, minlength=12)
    assert np.all(per_cycle[1:7] == 0)
    low = n / 2 - Z * math.sqrt(n / 4)  # binomial(400, 1/2) lower bound
    assert per_cycle[0] > low and np.all(per_cycle[7:] > low), per_cycle
    # the expanded chain mirrors the rule: 6 cycles at 1/2 and 6 suppressed (rate scale)
    expected = analytic(model).exposure.occurrences[0, check, 0]
    assert expected == pytest.approx(6 * 0.5 + 6 * (1 - 0.5 ** 1e-12), rel=1e-12)


# ------------------------------------------------------------------------ the verdict

SEMI_MARKOV = scenario_text(
    horizon(30, unit="days"), start(recovering=1),
    state("recovering"), state("complication"), state("discharged", absorbing=True),
    rate("recovering", "complication", 0.1), rate("recovering", "discharged", 0.2),
    transition("complication", "recovering", hazard=dict(family="weibull", shape=1.5, scale=4)))


def test_verdict_agrees_on_a_correct_model(rate_run):
    _, sim = rate_run
    result = compare(sim)
    assert result.exact and result.agrees is True
    assert "agrees" in result.verdict


def test_verdict_says_when_there_is_no_exact_counterpart():
    model = model_of(SEMI_MARKOV)
    result = compare(simulate(model, cohort_patients(300), 8))
    assert result.exact is False and result.agrees is None
    assert "no exact counterpart" in result.verdict
    assert "complication->recovering" in result.verdict
    assert "reads its clock as the time since start" in result.verdict  # the stand-in named
    for table in (result.shares, result.outcomes):  # no row claims to be a test
        assert (table.test == APPROXIMATE).all()


def test_comparison_has_power_against_a_wrong_counterpart(rate_run):
    # model B: the well->sick rate 20% higher; the simulation of model A must be told apart
    model, sim = rate_run
    wrong = model_of(RATE_MODEL.replace("rate = 0.15", "rate = 0.18"))
    table = trace_table(sim, analytic(wrong, times=sim.grid))
    assert np.nanmax(np.abs(table.z)) > critical_z(len(table))
    right = trace_table(sim, analytic(model, times=sim.grid))
    assert np.nanmax(np.abs(right.z)) < critical_z(len(right))
