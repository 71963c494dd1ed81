"""Are the validation verdicts calibrated? Random models, simulated correctly and with a
deliberate error, against their exact analytic counterparts.

A correct engine should be told "disagrees" in at most a share FAMILY_ALPHA of runs (the
Bonferroni bound holds the family-wise level of each run); an engine with an error of
several standard errors should be told so nearly always (by design in at least
Phi(MARGIN) = 99.9% of runs; asserted: 95%). Both are counted over two hundred random
valid models (tests/random_models.py) drawn from one fixed seed (and ten rate models of the
log-normal and generalised gamma under time ratios, and twelve models whose strategy is a
sequence of two treatments, the second with an event and a transition of its own, and
nine cycle models whose treatment an event starts, starts after a delay or stops, and
six rate models whose treatment starts a fixed time after entering a state, which must be
told there is no exact counterpart, each from a stream of their own). A
deliberate error is one hazard scaled by 1.1 (one per-cycle probability multiplied or
divided by 1.1, a log-location family's clock run 1.1 times faster) in the simulated
binding only, so the comparison still uses the unperturbed model.

References outside the project: the binomial distribution (scipy.stats.binom, reference
library) for how many false alarms n independent runs at level 0.001 may give, and how
many misses n runs with detection probability 0.95 may give, each at level 0.001; the
normal approximation of a binomial share (common practice) for the population size at
which an error is several standard errors.
"""
from __future__ import annotations

import math
from collections import Counter
from dataclasses import replace
from functools import cache

import numpy as np
from scipy.stats import binom

from microsim.binding import bind
from microsim.cohort.analytic import analytic
from microsim.cohort.expand import expand
from microsim.patients.population import patients_for
from microsim.patients.treatment import patient_multipliers
from microsim.results.comparison import FAMILY_ALPHA, compare
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from random_models import random_models

SEED = 20261203
MODELS = random_models(SEED, cycle_models=155, rate_models=50, log_location_models=10,
                       sequence_models=12, trigger_models=9, delay_models=6)
DETECTION = 0.95  # the detection rate the verdict must reach
MARGIN = 3.0  # standard errors by which a detection run's error exceeds the critical value
LARGEST = {"cycle": 20000, "rate": 10000}  # the largest detection run, so the test stays fast
LOOKS = {"cycle": 6, "rate": 2}  # perturbations sized per model at most (a rate model's
# exact trace with time-varying hazards takes a numerical solve)
CELLS = 1e7  # at most this many entries in one analytic batch (patients x expanded states^2)


def allowed(n: int, rate: float, level: float = FAMILY_ALPHA) -> int:
    """The smallest k with P(Binomial(n, rate) >= k + 1) < level (scipy.stats.binom)."""
    k = 0
    while binom.sf(k, n, rate) >= level:  # sf(k) = P(X > k)
        k += 1
    return k


def bound(model, values=None):
    return bind(parse_scenario(model.text), values, strategy=model.strategy)


def run(model, size: int, seed: int, values=None):
    """Simulate the model (or a perturbed binding of it) for `size` of its patients."""
    scenario = parse_scenario(model.text)
    return simulate(bind(scenario, values, strategy=model.strategy),
                    patients_for(scenario, size, seed), seed)


def kinds(models) -> str:
    counts = Counter(f for m in models for f in m.features)
    return ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))


# --------------------------------------------------------------------------- the models

def test_every_random_model_is_valid_and_the_generator_covers_every_kind():
    for m in MODELS:
        scenario = parse_scenario(m.text)  # refuses an invalid model with ScenarioError
        assert scenario.discrete == (m.kind == "cycle"), m.name
    counts = Counter(f for m in MODELS for f in m.features)
    print(f"\n{len(MODELS)} random models: {kinds(MODELS)}")
    wanted = ["cycle", "rate", "lifetime", "no absorbing state", "everyone dies in cycle 1",
              "probability 0", "rate 0", "no way out of the start state for a while",
              "continuous attribute", "categorical attribute", "yes/no attribute",
              "count memory", "window memory", "weibull on since start", "weibull on age",
              "gompertz on since start", "gompertz on age", "table by age", "table by time",
              "table by time in state", "attained-age effect", "event", "strategy",
              "eligibility", "uptake", "discontinuation", "hazard ratio", "added transition",
              "semi-Markov", "event by state", "start shares by attribute",
              "treatment on entering a state", "table by level", "lognormal on since start",
              "generalised_gamma on since start", "time ratio", "sequence",
              "later treatment's event", "later treatment's transition", "utility by level",
              "utility by age", "treatment started by an event", "treatment stopped by an event",
              "delay to treatment", "rate on treatment", "probability on treatment"]
    assert len(MODELS) >= 200
    assert all(counts[f] >= 3 for f in wanted), {f: counts[f] for f in wanted if counts[f] < 3}


# -------------------------------------------------------------------- the correct engine

@cache
def calibration() -> dict[str, object]:
    return {m.name: compare(run(m, m.size, SEED)) for m in MODELS}


def test_a_model_is_reported_exact_when_the_generator_means_it_to_be():
    """Exact: everything but time-since memory in rate models and a semi-Markov hazard."""
    results = calibration()
    wrong = [(m.name, m.exact, sorted(m.features), results[m.name].counterpart) for m in MODELS
             if m.exact != (results[m.name].agrees is not None)]
    print(f"\nmeant to be exact: {sum(m.exact for m in MODELS)} of {len(MODELS)}")
    assert not wrong, wrong


def test_false_alarms_stay_within_the_family_wise_level():
    results = calibration()
    judged = [m for m in MODELS if results[m.name].agrees is not None]
    alarms = [m for m in judged if results[m.name].agrees is False]
    limit = allowed(len(judged), FAMILY_ALPHA)
    report = (f"false alarms: {len(alarms)} of {len(judged)} models with an exact counterpart "
              f"({len(alarms) / len(judged):.2%}; at most {limit} allowed at level "
              f"{FAMILY_ALPHA}); kinds: {kinds(judged)}")
    print("\n" + report)
    details = [(m.name, sorted(m.features), worst_cells(results[m.name])) for m in alarms]
    assert len(alarms) <= limit, (report, details)


def worst_cells(comparison, n: int = 3):
    """The largest |z| of a comparison: what raised the alarm."""
    shares = comparison.shares.assign(row=lambda f: f.time.astype(str) + " " + f.state)
    rows = [(r.row, r.simulated, r.analytic, r.se, r.z) for r in shares.itertuples()]
    rows += [(r.measure, r.simulated, r.analytic, r.se, r.z)
             for r in comparison.outcomes.itertuples()]
    return sorted(rows, key=lambda r: -abs(r[4]) if not math.isnan(r[4]) else 0.0)[:n]


# ------------------------------------------------------------------ a deliberate error

def detection_size(model, comparison, perturbation):
    """The population size at which the perturbation is MARGIN standard errors beyond the
    critical value in some state share at some time; None when it changes no share.

    The pilot is the calibration run's population: its comparison holds the unperturbed
    exact shares and their standard errors, and the perturbed model's exact traces for
    the same patients give the shift. The comparison's z for a share is
    (simulated - analytic) / se with se = sd_u / sqrt(N), sd_u^2 the mean of p_u (1 - p_u)
    over patients; the simulated share has sd_p / sqrt(N). So |z| exceeds the critical
    value c with probability at least Phi(MARGIN) when |shift| sqrt(N) >= c sd_u +
    MARGIN sd_p (normal approximation, common practice)."""
    scenario = parse_scenario(model.text)
    perturbed = bind(scenario, {perturbation.parameter: perturbation.value},
                     strategy=model.strategy)
    patients = patients_for(scenario, model.size, SEED)
    mult = patient_multipliers(bound(model), patients, SEED)
    p_p = analytic(perturbed, mult=mult, times=perturbed.times).trace
    shares = comparison.shares
    shift = np.abs(p_p.mean(axis=0).ravel() - shares.analytic.to_numpy())
    seen = shift > 1e-9
    if not seen.any():
        return None
    sd_u = np.nan_to_num(shares.se.to_numpy()) * math.sqrt(model.size)
    sd_p = np.sqrt(np.clip(p_p * (1 - p_p), 0, None).mean(axis=0)).ravel()
    needed = ((comparison.critical * sd_u + MARGIN * sd_p)[seen] / shift[seen]) ** 2
    return max(int(math.ceil(needed.min())), 100)


def largest_size(model) -> int:
    """The cap of a detection run: the kind's, and for patients who all differ, what keeps
    an analytic batch (patients x expanded states^2) under CELLS."""
    cap = LARGEST[model.kind]
    if model.heterogeneous:
        cap = min(cap, int(CELLS / expand(bound(model)).size ** 2))
    return cap


@cache
def detection():
    """For each model with an exact counterpart, its perturbations in a random order: the
    first one detectable within the cap (so one drawn at random among those) is simulated
    at its detection size and compared with the unperturbed model. Also counts why the
    perturbations looked at before it were passed over."""
    rng = np.random.default_rng(SEED)
    tested, passed_over = [], Counter()
    for m in MODELS:
        comparison = calibration()[m.name]
        if comparison.agrees is None:
            passed_over["models without an exact counterpart"] += 1
            continue
        for k in rng.permutation(len(m.perturbations))[:LOOKS[m.kind]]:
            perturbation = m.perturbations[k]
            size = detection_size(m, comparison, perturbation)
            if size is None:
                passed_over["perturbations that change no state share"] += 1
            elif size > largest_size(m):
                passed_over["perturbations needing more patients than the cap"] += 1
            else:
                values = {perturbation.parameter: perturbation.value}
                sim = run(m, size, SEED + 1, values)
                original = bound(m)
                against = replace(sim, model=original,
                                  mult=patient_multipliers(original, sim.patients, sim.seed))
                tested.append((m, perturbation, size, compare(against)))
                break
        else:
            passed_over["models with nothing detectable within the cap"] += 1
    return tested, passed_over


def test_deliberate_errors_are_detected():
    tested, passed_over = detection()
    missed = [(m.name, p.what, size, worst_cells(c)) for m, p, size, c in tested
              if c.agrees is True]
    detected = len(tested) - len(missed)
    limit = allowed(len(tested), 1 - DETECTION)
    also_unperturbed = sum(calibration()[m.name].agrees is False for m, *_ in tested)
    report = (f"detection: {detected} of {len(tested)} perturbed models "
              f"({detected / len(tested):.2%}; at most {limit} misses allowed for a rate of "
              f"{DETECTION:.0%} at level {FAMILY_ALPHA}; {also_unperturbed} of them also "
              f"disagree unperturbed); passed over: {dict(passed_over)}; "
              f"sizes {min(s for *_, s, _ in tested)}-{max(s for *_, s, _ in tested)}; "
              f"kinds: {kinds(m for m, *_ in tested)}")
    print("\n" + report)
    judged = sum(c.agrees is not None for c in calibration().values())
    tested_kinds = Counter(m.kind for m, *_ in tested)
    assert len(tested) >= judged / 3 and min(tested_kinds[k] for k in LARGEST) >= 5, report
    assert len(missed) <= limit, (report, missed)


def test_the_perturbed_simulation_is_compared_with_the_unperturbed_model():
    """replace(sim, model=..., mult=...) gives compare the unperturbed counterpart while
    the simulated shares stay those of the perturbed run."""
    m, perturbation, *_ = detection()[0][0]
    values = {perturbation.parameter: perturbation.value}
    sim = run(m, 300, SEED + 1, values)
    original, perturbed = bound(m), bound(m, values)
    against = compare(replace(sim, model=original,
                              mult=patient_multipliers(original, sim.patients, sim.seed)))
    own = compare(sim)
    mult = patient_multipliers(original, sim.patients, sim.seed)
    expected = analytic(original, mult=mult, times=sim.grid).trace.mean(axis=0).ravel()
    np.testing.assert_allclose(against.shares.analytic, expected, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(against.shares.simulated, own.shares.simulated)
    wrong = analytic(perturbed, mult=mult, times=sim.grid).trace.mean(axis=0).ravel()
    np.testing.assert_allclose(own.shares.analytic, wrong, rtol=0, atol=1e-12)
    assert np.abs(expected - wrong).max() > 1e-6
