"""The comparison's verdicts on the edges: no Monte-Carlo error at all, round-off in the
analytic shares, rare states, and the average patient (exact gaps, strategies)."""
import json
import warnings
from dataclasses import replace

import numpy as np
import pytest

from microsim.binding import bind
from microsim.cohort import analytic as analytic_module
from microsim.cohort.analytic import analytic, cleaned
from microsim.patients.multipliers import Window, average_patient
from microsim.patients.population import cohort_patients, draw_population
from microsim.results.comparison import (EXACT, MONTE_CARLO, ComparisonSums, compare, comparison_grid,
                                         share_p_values)
from microsim.scenario import ScenarioError, parse_scenario
from microsim.results.outcomes import outcome_values
from microsim.simulation import simulate
from microsim.cli import main
from microsim.workflow import run_population
from support import (attribute, effect, horizon, model_of, population, probability, rate,
                     scenario_text, section, start, state, strategy, transition)

# Two states and no way out of the model: everyone is alive at every time, so life years
# equal the horizon for every patient (no Monte-Carlo error), while the trace comes from
# the forward equations (a Weibull hazard on the time since start) with round-off.
NEVER_ABSORBED = scenario_text(
    horizon(12), start(well=1),
    state("well", utility=1, cost=100), state("ill", utility=0.5, cost=900),
    transition("well", "ill", hazard=dict(family="weibull", shape=1.6, scale=5),
               clock="since_start"),
    rate("ill", "well", 0.4))


def test_an_outcome_equal_for_every_patient_agrees_within_round_off():
    sim = simulate(model_of(NEVER_ABSORBED), cohort_patients(2000), 3)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no sqrt-of-negative or divide warnings
        result = compare(sim)
    assert result.agrees is True, result.verdict
    life = result.outcomes.set_index("measure").loc["life_years"]
    assert life.simulated == 12.0 and life.analytic == pytest.approx(12.0, rel=1e-9)
    assert life.test == EXACT and life.z == 0.0 and life.p_value == 1.0
    assert "without Monte-Carlo error agree within numerical error" in result.verdict
    # the other outcomes vary between patients and are tested as usual
    assert (result.outcomes.set_index("measure").drop("life_years").test != EXACT).all()


# Patients leave 'start' for 'b' or 'c' at a rate that differs by age, and 'b' and 'c'
# cost and weigh the same: every outcome is the same for every patient, but each patient's
# analytic value mixes the two by its own shares, with round-off of about 1e-16.
SAME_OUTCOMES = scenario_text(
    horizon(7), start(age=60, first=1),
    state("first", utility=0.8, cost=120.3), state("b", utility=0.61, cost=77.7),
    state("c", utility=0.61, cost=77.7),
    transition("first", "b", probability=0.3, effects=[effect("age", 1.01)]),
    transition("first", "c", probability="remainder"),
    transition("b", "b", probability=1), transition("c", "c", probability=1),
    population(3000, attribute("age", "normal", mean=60, sd=5)))


def test_a_standard_error_of_round_off_is_shown_as_0_and_a_real_one_is_kept():
    sim = simulate(model_of(SAME_OUTCOMES), draw_population(
        parse_scenario(SAME_OUTCOMES).population, 4, np.arange(3000)), 4)
    sums = ComparisonSums(sim.model, sim.grid)
    sums.add(sim)
    raw = {m: moments.se for m, moments in sums.deviations.items()}
    assert 0 < max(raw.values()) < 1e-12  # round-off, not Monte-Carlo error (measured)
    outcomes = sums.finish().outcomes.set_index("measure")
    # no row shows round-off as a standard error: life years (everyone alive 7 years) have
    # no Monte-Carlo error; the others are certain too, but the trace varies between states
    # and the comparison does not look at values to tell, so it leaves them untested rather
    # than trust patients who do not vary (test_patients_who_happen_not_to_vary_are_no_deterministic_outcome)
    assert outcomes.test["life_years"] == EXACT and outcomes.se["life_years"] == 0.0
    assert (outcomes.test != MONTE_CARLO).all()
    assert ((outcomes.se == 0.0) | outcomes.se.isna()).all()
    # where patients differ, the standard error stays what the patients give
    kept = compare(simulate(model_of(NEVER_ABSORBED), cohort_patients(500), 3)).outcomes
    varied = kept[kept.test != EXACT]
    assert len(varied) == 4 and (varied.se > 0).all()


def test_a_wrong_deterministic_outcome_still_disagrees():
    # the same simulation with every patient's time in state scaled by 13/12: life years
    # are 13 for everyone against the analytic 12, where there is no Monte-Carlo error
    model = model_of(NEVER_ABSORBED)
    sim = simulate(model, cohort_patients(500), 3, keep_exposure=True)
    exposure = replace(sim.exposure, occupancy=sim.exposure.occupancy * 13 / 12)
    scaled = replace(sim, values=outcome_values(model, exposure))
    result = compare(scaled)
    assert result.agrees is False
    assert "life_years differs by 1 where there is no Monte-Carlo error" in result.verdict


# Gompertz mortality by age and a Weibull sojourn over 100 years: the forward equations
# give shares of about -1.6e-10 (measured), which must not become NaN standard errors.
LONG_HORIZON = scenario_text(
    horizon(100), start(age=40, alive=1),
    state("alive", utility=1), state("sick", utility=0.6), state("dead", absorbing=True),
    transition("alive", "sick", hazard=dict(family="weibull", shape=2.5, scale=8),
               clock="since_start"),
    transition("alive", "dead", hazard=dict(family="gompertz", rate=0.0005, shape=0.09),
               clock="age"),
    transition("sick", "dead", hazard=dict(family="gompertz", rate=0.002, shape=0.1),
               clock="age"))


def test_round_off_in_analytic_shares_is_cleaned(monkeypatch):
    model = model_of(LONG_HORIZON)
    raw = analytic_module.cleaned
    monkeypatch.setattr(analytic_module, "cleaned", lambda trace, model, times: trace)
    uncleaned = analytic(model).trace
    monkeypatch.setattr(analytic_module, "cleaned", raw)
    assert uncleaned.min() < 0  # the case this test is about
    trace = analytic(model).trace
    assert trace.min() >= 0.0 and trace.max() <= 1.0
    np.testing.assert_allclose(trace, uncleaned, atol=1e-9)
    sim = simulate(model, cohort_patients(300), 5)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = compare(sim)
    assert result.agrees is True, result.verdict
    assert np.isfinite(result.shares.se).all() and np.isfinite(result.shares.z).all()


def test_a_share_not_yet_absorbed_that_rounds_above_1_has_a_standard_error_of_0():
    # nobody can die in the first cycle; the shares after it, 1 - 0.45 + 0.15 + 0.2 + 0.1,
    # add up to 1 + 2.2e-16 in floats (IEEE 754 doubles), which must not give a NaN
    text = scenario_text(
        horizon(3, cycle=1), start(a=1), state("a"), state("b"), state("c"), state("d"),
        state("dead", absorbing=True),
        probability("a", "b", 0.15), probability("a", "c", 0.2), probability("a", "d", 0.1),
        probability("a", "a", "remainder"),
        *(probability(s, "dead", 0.3) for s in "bcd"),
        *(probability(s, s, "remainder") for s in "bcd"))
    model = model_of(text)
    assert analytic(model).trace[0, 1, :4].sum() > 1.0  # the case this test is about
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        survival = compare(simulate(model, cohort_patients(200), 1)).survival
    assert survival.se[1] == 0.0 and np.isfinite(survival.se).all()


def test_shares_far_outside_the_unit_interval_are_refused():
    model = model_of(NEVER_ABSORBED)
    trace = np.full((1, 3, 2), 0.5)
    trace[0, 2, 1] = -1e-5
    with pytest.raises(ScenarioError, match="at time 2 1e-05 below 0, beyond the numerical"):
        cleaned(trace, model, np.array([0.0, 1.0, 2.0]))
    trace[0, 2, 1] = 1 + 2e-5
    with pytest.raises(ScenarioError, match="2e-05 above 1"):
        cleaned(trace, model, np.array([0.0, 1.0, 2.0]))
    trace[0, 2, 1] = -3.3e-9  # what the forward equations give over long horizons
    assert cleaned(trace, model, np.array([0.0, 1.0, 2.0]))[0, 2, 1] == 0.0


def test_rare_state_tail_probabilities_are_binomial():
    # one patient of 20 in a state with share 0.0005: P(X >= 1) = 1 - (1 - p)^20 (the
    # binomial distribution, common practice); the normal approximation would give
    # z = (0.05 - 0.0005) / sqrt(0.0005 * 0.9995 / 20) = 9.9, a false alarm
    p = 0.0005
    value = share_p_values(np.array([1 / 20]), np.array([p]), 20)[0]
    assert value == pytest.approx(2 * (1 - (1 - p) ** 20), rel=1e-12)
    assert share_p_values(np.array([0.0]), np.array([p]), 20)[0] == 1.0
    assert share_p_values(np.array([0.1]), np.array([0.0]), 20)[0] == 0.0


def poisson_binomial(probabilities: np.ndarray) -> np.ndarray:
    """The exact distribution of a sum of independent Bernoulli trials, by convolution
    (numpy as the reference)."""
    pmf = np.array([1.0])
    for p in probabilities:
        pmf = np.convolve(pmf, [1 - p, p])
    return pmf


def test_binomial_tails_are_conservative_for_unequal_patients():
    # Hoeffding (1956): beyond one of the mean, the binomial with the same mean has the
    # heavier tails, so p-values from it never overstate the evidence
    rng = np.random.default_rng(7)
    for _ in range(20):
        p = rng.beta(0.3, 3.0, size=60)
        pmf = poisson_binomial(p)
        mean = p.sum()
        for count in range(len(p) + 1):
            if abs(count - mean) < 1:
                continue
            exact = min(pmf[:count + 1].sum(), pmf[count:].sum())
            assert share_p_values(np.array([count / 60]), np.array([p.mean()]), 60)[0] \
                >= min(1.0, 2 * exact) - 1e-12


def test_verdicts_on_a_rare_state_do_not_raise_false_alarms():
    # a state entered with a tiny probability: the verdict must hold for many seeds
    text = scenario_text(horizon(5), start(well=1), state("well"), state("rare"),
                         state("dead", absorbing=True),
                         rate("well", "rare", 0.0002), rate("well", "dead", 0.05),
                         rate("rare", "dead", 0.5))
    model = model_of(text)
    flagged = sum(compare(simulate(model, cohort_patients(300), seed)).agrees is False
                  for seed in range(30))
    # at family-wise level 0.001, 30 correct runs give a false alarm with probability
    # about 0.03 (binomial); more than one would mean the test is not calibrated
    assert flagged <= 1


# ----------------------------------------------------------------- the average patient

TREATED = scenario_text(
    horizon(10), start(alive=1),
    state("alive", utility=1), state("dead", absorbing=True),
    rate("alive", "dead", 0.2, effects=[effect("risk_factor", 5)]),
    population(3000, attribute("risk_factor", "yesno", prevalence=0.4)),
    strategy("none", comparator=True),
    strategy("drug", uptake=0.6, changes=[dict(transition="alive->dead", hazard_ratio=0.5)]))


def life_years(rate_value: np.ndarray) -> np.ndarray:
    """Expected time alive over 10 years at a constant death rate (closed form)."""
    return (1 - np.exp(-10 * rate_value)) / rate_value


def test_the_average_patient_gets_the_strategy_too():
    scenario = parse_scenario(TREATED)
    model = bind(scenario, strategy="drug")
    people = draw_population(scenario.population, 11)
    sim = simulate(model, people, 11)
    result = compare(sim)
    assert result.agrees is True, result.verdict
    row = result.average_patient.set_index("measure").loc["life_years"]
    # the average patient: death rate 0.2 * 5^prevalence (the population section's mean
    # attribute), halved for the treated share of the patients (each patient's own window)
    share = 0.4
    treated = np.isfinite(sim.mult.window.on).mean()
    assert 0.5 < treated < 0.7
    base = 0.2 * 5.0 ** share
    expected = treated * life_years(base * 0.5) + (1 - treated) * life_years(base)
    assert row.average_patient == pytest.approx(expected, rel=1e-9)
    # the population's exact value: each patient's own rate and window
    own = 0.2 * 5.0 ** people.risk_factor.to_numpy(float) * np.where(
        np.isfinite(sim.mult.window.on), 0.5, 1.0)
    assert row.population == pytest.approx(life_years(own).mean(), rel=1e-9)


def test_the_average_patient_has_the_cohorts_attributes_and_keeps_each_window():
    from microsim.patients.multipliers import Multipliers
    log_static = np.array([[0.0, 1.0], [2.0, 3.0], [4.0, 8.0]])
    window = Window(np.array([0.0, np.inf, 1.0]), np.array([5.0, np.inf, 2.0]),
                    np.array([0.5, 1.0]), np.array([1.0, 1.0]))
    patients = Multipliers(log_static, np.zeros(2), np.array([50.0, 60.0, 70.0]), window)
    cohort = Multipliers(np.array([[2.5, 4.5]]), np.zeros(2), np.array([61.0]))
    average = average_patient(cohort, patients)
    np.testing.assert_array_equal(average.log_static, [[2.5, 4.5]] * 3)
    np.testing.assert_array_equal(average.entry_age, [61.0] * 3)
    assert average.window is window


def test_the_cohorts_mean_attributes_come_from_the_population_section():
    # HR^prevalence for a yes/no attribute (the log multiplier is linear in the indicator)
    from microsim.patients.multipliers import cohort_multipliers
    model = bind(parse_scenario(TREATED))
    assert cohort_multipliers(model).log_static[0, 0] == pytest.approx(0.4 * np.log(5.0))


def test_snapping_windows_to_the_cycle_grid_changes_nothing_on_the_grid():
    rng = np.random.default_rng(3)
    times = np.arange(11) * 0.5
    on = np.where(rng.random(200) < 0.2, np.inf, rng.uniform(0, 6, 200))
    off = on + rng.exponential(2.0, 200)
    window = Window(on, off, np.ones(1), np.ones(1))
    snapped = window.on_grid_points(times)
    np.testing.assert_array_equal(snapped.on_grid(times), window.on_grid(times))
    assert len(np.unique(np.c_[snapped.on, snapped.off], axis=0)) <= 11 * 12


def test_cycle_model_with_discontinuation_has_few_distinct_analytic_rows():
    text = scenario_text(
        horizon(8, cycle=1), start(well=1),
        state("well", utility=1), state("ill", utility=0.5), state("dead", absorbing=True),
        transition("well", "ill", probability=0.1), transition("well", "dead", probability=0.02),
        transition("well", "well", probability="remainder"),
        transition("ill", "dead", probability=0.2), transition("ill", "ill", probability="remainder"),
        strategy("none", comparator=True),
        strategy("drug", discontinuation=0.3, changes=[dict(transition="well->ill", hazard_ratio=0.5)]))
    model = bind(parse_scenario(text), strategy="drug")
    sim = simulate(model, cohort_patients(4000), 2)
    result = compare(sim)
    assert result.agrees is True, result.verdict
    # every patient's analytic trace, computed one by one on its raw window, equals the
    # shared computation on windows moved to the grid
    one_by_one = np.concatenate([analytic(model, mult=sim.mult.take(slice(b, b + 1))).trace
                                 for b in range(0, 4000, 397)])
    shared = analytic(model, mult=sim.mult).trace[::397]
    np.testing.assert_allclose(shared, one_by_one, rtol=0, atol=1e-15)


# A lifetime rate model with Weibull hazards and discounting (from a practitioner's trial):
# the forward equations drift to about -3.3e-9 for a share near 0 after 33 years, which is
# numerical error, not a reason to refuse the model.
DISCOUNTED_LIFETIME = scenario_text(
    section("time", unit="years", cycle=0.25, horizon="lifetime", lifetime_cap=40),
    start(alive=1), state("alive", utility=0.8), state("sick", utility=0.5),
    state("dead", absorbing=True),
    transition("alive", "sick", hazard=dict(family="weibull", shape=1.3, scale=2),
               clock="since_start"),
    transition("sick", "dead", hazard=dict(family="weibull", shape=1.2, scale=1.5),
               clock="since_start"),
    rate("alive", "dead", 0.03),
    section("outcomes", discount_costs=0.035, discount_effects=0.035))


def test_a_discounted_lifetime_rate_model_is_not_refused_for_drift():
    model = model_of(DISCOUNTED_LIFETIME)
    trace = analytic(model).trace
    assert trace.min() >= 0.0 and np.allclose(trace.sum(axis=2), 1.0, atol=1e-7)
    result = compare(simulate(model, cohort_patients(1000), 4))
    assert result.agrees is True, result.verdict


def long_model(cycles: int, *, unit_rate: bool = False, grid=None):
    """well -> sick -> dead over `cycles` cycles of a day (per-cycle probabilities, or rates)."""
    move = rate if unit_rate else probability
    return model_of(scenario_text(
        horizon(cycles, unit="days"), start(well=1), state("well", utility=1),
        state("sick", utility=0.5), state("dead", absorbing=True),
        move("well", "sick", 0.002), move("sick", "dead", 0.003),
        *([] if unit_rate else [probability("well", "well", "remainder"),
                                probability("sick", "sick", "remainder")]),
        *([] if grid is None else [section("simulation", grid=grid)])))


def test_a_long_horizon_is_compared_on_at_most_500_steps_and_the_end():
    # every k-th cycle point, k the fewest that leaves at most 500 steps, and the end
    # (reference: numpy.arange / linspace); up to 500 cycles, every cycle point
    np.testing.assert_array_equal(comparison_grid(long_model(20000)),
                                  np.linspace(0, 20000, 501))
    np.testing.assert_array_equal(comparison_grid(long_model(1001)),
                                  np.append(np.arange(0, 1000, 3.0), 1001))
    np.testing.assert_array_equal(comparison_grid(long_model(500)), np.arange(501.0))
    np.testing.assert_array_equal(comparison_grid(long_model(20000, unit_rate=True)),
                                  np.linspace(0, 20000, 501))
    given = long_model(20000, unit_rate=True, grid=10)  # a grid the scenario gives is kept
    np.testing.assert_array_equal(comparison_grid(given, 10.0), np.linspace(0, 20000, 2001))


def test_the_thinned_grid_compares_the_shares_of_the_full_one_and_counts_what_it_compares():
    model = long_model(1001)
    patients = cohort_patients(400)
    grid = comparison_grid(model)
    thinned = compare(simulate(model, patients, 5, grid=grid))
    full = simulate(model, patients, 5)  # every cycle point, the same patients and draws
    trace = analytic(model).trace[0]
    at = np.searchsorted(model.times, grid)
    shares = thinned.shares.pivot(index="time", columns="state", values="simulated")
    for s, name in enumerate(model.states):
        np.testing.assert_array_equal(shares[name], (full.states[:, at] == s).mean(axis=0))
    expected = thinned.shares.pivot(index="time", columns="state", values="analytic")
    np.testing.assert_allclose(expected[list(model.states)], trace[at], rtol=0, atol=1e-15)
    n = len(grid) * model.n_states + len(thinned.outcomes)  # Bonferroni over what is compared
    assert f"Bonferroni over {n} comparisons" in thinned.verdict and thinned.agrees
    assert thinned.level == pytest.approx(0.001 / n)
    # outcomes are the whole horizon's, whatever the grid
    np.testing.assert_allclose(thinned.outcomes.simulated, compare(full).outcomes.simulated,
                               rtol=1e-12)


def test_a_run_compares_a_long_horizon_on_the_thinned_grid():
    model = long_model(1001)
    [check] = run_population(model.scenario, 50, 3).validations.values()
    np.testing.assert_array_equal(np.unique(check.shares.time), comparison_grid(model))


def test_a_run_validates_fewer_patients_by_default_where_the_counterpart_is_solved_numerically(
        tmp_path, capsys):
    # a practitioner's Weibull model with a continuous marker spent 7 minutes of a run on
    # the forward equations of 100,000 validation patients: by default a counterpart solved
    # numerically compares VALIDATED[1] patients, a closed-form one VALIDATED[0]
    from microsim.workflow import VALIDATED, validation_limit
    weibull = model_of(NEVER_ABSORBED)
    constant = model_of(NEVER_ABSORBED.replace(
        'hazard = { family = "weibull", shape = 1.6, scale = 5 }', "rate = 0.2").replace(
        'clock = "since_start"\n', ""))
    assert validation_limit(weibull.scenario, [weibull]) == VALIDATED[1] < VALIDATED[0]
    assert validation_limit(constant.scenario, [constant]) == VALIDATED[0]
    assert validation_limit(constant.scenario, [constant, weibull]) == VALIDATED[1]
    given = parse_scenario(NEVER_ABSORBED + section("simulation", validation_patients=30))
    assert validation_limit(given, [weibull]) == 30  # a value in the file wins
    run = run_population(given, 50, 3)
    assert run.validated == 30
    [check] = run.validations.values()
    seen = check.shares.simulated.to_numpy() * 30  # whole numbers of 30 patients
    np.testing.assert_allclose(seen, np.rint(seen), rtol=0, atol=1e-9)
    path = tmp_path / "given.toml"
    path.write_text(NEVER_ABSORBED + section("simulation", validation_patients=30))
    assert main(["run", str(path), "--patients", "50", "--out", str(tmp_path / "out")]) == 0
    assert ("Validation compares the first 30 of the 50 patients with the analytic "
            "counterpart") in capsys.readouterr().out
    summary = json.loads((tmp_path / "out" / "given" / "latest" / "summary.json").read_text())
    assert summary["patients"] == 50 and summary["validated_patients"] == 30


def test_a_certain_model_is_said_to_agree_with_nothing_random_in_it():
    # edge: every move has probability 1, so every patient walks well, sick, dead and no
    # comparison has Monte-Carlo error; the verdict says so rather than naming a p-value of 1
    model = model_of(scenario_text(
        horizon(4, cycle=1), start(well=1.0), state("well", cost=100, utility=0.8),
        state("sick", cost=300, utility=0.5), state("dead", absorbing=True),
        probability("well", "sick", 1.0), probability("sick", "dead", 1.0)))
    result = compare(simulate(model, cohort_patients(50), 5))
    assert result.agrees is True
    assert "comparisons is without Monte-Carlo error (the model's outcome is certain" \
        in result.verdict and "smallest p-value" not in result.verdict


def test_patients_who_happen_not_to_vary_are_no_deterministic_outcome():
    # a practitioner's trial: three patients of a model with a 1% yearly death risk all
    # lived 5 years, so their outcomes had no spread; that is chance, not a deterministic
    # outcome, and must not be tested as one (it was, and the run "disagreed")
    model = model_of(scenario_text(
        horizon(5, cycle=1), start(well=1.0), state("well", cost=100, utility=0.8),
        state("dead", absorbing=True), probability("well", "dead", 0.01),
        probability("well", "well", "remainder")))
    sim = simulate(model, cohort_patients(3), 5)
    assert np.all(sim.values["life_years"] == 5.0)  # nobody died: no spread at all
    result = compare(sim)
    outcomes = result.outcomes.set_index("measure")
    assert (outcomes.test != EXACT).all() and outcomes.se.isna().all()
    assert result.agrees is True
    assert "not tested" in result.verdict
