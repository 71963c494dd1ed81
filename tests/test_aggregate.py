"""Aggregators (`microsim.results.aggregate`) on hand-made histories: states on a grid, time in
state integrated exactly with continuous discounting, occurrences discounted at their
time, and the within-cycle rule of cycle models. References: hand integrals of
e^{-delta t} with delta = ln(1 + d) (standard continuous discounting, common practice),
scipy.integrate.quad, a brute-force search, and microsim.markov.cycle_weights."""
import math

import numpy as np
import pytest
from scipy import integrate

from microsim.results import aggregate
from microsim.engines.histories import START, Histories
from microsim.markov import cycle_weights
from support import (event, horizon, model_of, outcomes, probability, rate, scenario_text, start,
                     state)

STATES = (state("well"), state("sick"), state("dead", absorbing=True))


def rate_model(years=5, costs=0.05, effects=0.03):
    return model_of(scenario_text(
        horizon(years), start(well=1), outcomes(discount_costs=costs, discount_effects=effects),
        *STATES,
        rate("well", "sick", 0.2), rate("sick", "well", 0.1), rate("sick", "dead", 0.3),
        event("flare", ["sick"], rate=0.5)))


def cycle_model(correction="half-cycle", n_cycles=6, cycle=0.5, effects=0.04):
    return model_of(scenario_text(
        horizon(n_cycles * cycle, cycle=cycle), start(well=1),
        outcomes(discount_effects=effects, correction=correction),
        *STATES,
        probability("well", "sick", 0.2), probability("well", "well", "remainder"),
        probability("sick", "dead", 0.3), probability("sick", "sick", "remainder"),
        event("flare", ["sick"], probability=0.5)))


WELL, SICK, DEAD = 0, 1, 2
TO_SICK, TO_WELL, TO_DEAD, FLARE = 0, 1, 2, 3  # risk order: transitions, then events


def histories(records, n_patients):
    """Histories from (patient, time, from, to, risk) records, grouped by patient in time
    order as engines return them."""
    patient, time, source, target, risk = (np.array(c) for c in zip(*records))
    return Histories(patient.astype(np.int64), time.astype(float), source.astype(np.int16),
                     target.astype(np.int16), risk.astype(np.int32), n_patients)


# patient 0: well, sick at 1.5, a flare at 2.25, well at 3; patient 1: sick from the start,
# a flare and a recovery both at 2, dead at 4; patient 2: well throughout
RECORDS = [
    (0, 0.0, START, WELL, START), (0, 1.5, WELL, SICK, TO_SICK), (0, 2.25, SICK, SICK, FLARE),
    (0, 3.0, SICK, WELL, TO_WELL),
    (1, 0.0, START, SICK, START), (1, 2.0, SICK, SICK, FLARE), (1, 2.0, SICK, WELL, TO_WELL),
    (1, 4.0, WELL, DEAD, TO_DEAD),
    (2, 0.0, START, WELL, START),
]
# each patient's sojourns (state, from, to) up to the horizon 5
SOJOURNS = {
    0: [(WELL, 0.0, 1.5), (SICK, 1.5, 3.0), (WELL, 3.0, 5.0)],
    1: [(SICK, 0.0, 2.0), (WELL, 2.0, 4.0), (DEAD, 4.0, 5.0)],
    2: [(WELL, 0.0, 5.0)],
}


def brute_force_states(records, n_patients, grid):
    """For each patient and grid time, the target of the last record at or before it."""
    out = np.full((n_patients, len(grid)), -1)
    for k, g in enumerate(grid):
        for patient, time, _, target, _ in records:  # records are in time order per patient
            if time <= g:
                out[patient, k] = target
    return out


def test_grid_states_take_the_last_record_at_or_before_each_time():
    grid = np.array([0.0, 1.0, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0])
    states = aggregate.grid_states(histories(RECORDS, 3), grid)
    expected = np.array([[0, 0, 1, 1, 1, 0, 0, 0],
                         [1, 1, 1, 0, 0, 0, 2, 2],
                         [0, 0, 0, 0, 0, 0, 0, 0]])
    np.testing.assert_array_equal(states, expected)
    np.testing.assert_array_equal(states, brute_force_states(RECORDS, 3, grid))


def test_grid_states_on_random_histories_match_brute_force():
    rng = np.random.default_rng(3)
    records = []
    n_patients = 40
    for patient in range(n_patients):
        state = int(rng.integers(0, 2))
        records.append((patient, 0.0, START, state, START))
        # event times on a coarse lattice so that ties with the grid and with each other occur
        for time in np.sort(rng.integers(1, 40, rng.integers(0, 6)) / 4.0):
            target = int(rng.integers(0, 3))
            records.append((patient, float(time), state, target, 0))
            state = target
    grid = np.linspace(0.0, 10.0, 21)
    np.testing.assert_array_equal(aggregate.grid_states(histories(records, n_patients), grid),
                                  brute_force_states(records, n_patients, grid))


def discounted_length(a, b, d):
    """integral_a^b e^{-delta t} dt = (e^{-delta a} - e^{-delta b}) / delta, delta = ln(1 + d)."""
    if d == 0:
        return b - a
    delta = math.log1p(d)
    return (math.exp(-delta * a) - math.exp(-delta * b)) / delta


def test_continuous_occupancy_integrates_each_sojourn_with_discounting():
    model = rate_model()
    assert [r.name for r in model.risks] == ["well->sick", "sick->well", "sick->dead", "flare"]
    occupancy = aggregate.exposure(model, histories(RECORDS, 3)).occupancy
    assert occupancy.shape == (3, 3, 3)
    for patient, sojourns in SOJOURNS.items():
        for w, d in enumerate((0.0, 0.05, 0.03)):  # no discount, costs, effects
            expected = np.zeros(3)
            for state, a, b in sojourns:
                expected[state] += discounted_length(a, b, d)
            np.testing.assert_allclose(occupancy[patient, :, w], expected, rtol=1e-13)
            # reference: scipy.integrate.quad of (1 + d)^-t over the same sojourns
            by_quad = np.zeros(3)
            for state, a, b in sojourns:
                by_quad[state] += integrate.quad(lambda t: (1 + d) ** -t, a, b)[0]
            np.testing.assert_allclose(occupancy[patient, :, w], by_quad, rtol=1e-10)


def test_continuous_occupancy_sums_to_the_horizon():
    occupancy = aggregate.exposure(rate_model(), histories(RECORDS, 3)).occupancy
    np.testing.assert_allclose(occupancy[:, :, 0].sum(axis=1), 5.0, rtol=1e-14)
    np.testing.assert_allclose(occupancy[:, :, 2].sum(axis=1), discounted_length(0, 5, 0.03),
                               rtol=1e-13)


def test_occurrences_are_discounted_at_the_time_they_happen():
    model = rate_model()
    occurrences = aggregate.exposure(model, histories(RECORDS, 3)).occurrences
    assert occurrences.shape == (3, 4, 3)
    for w, d in enumerate((0.0, 0.05, 0.03)):
        expected = np.zeros((3, 4))
        for patient, time, _, _, risk in RECORDS:
            if risk != START:  # the start record is no occurrence
                expected[patient, risk] += (1 + d) ** -time
        np.testing.assert_allclose(occurrences[:, :, w], expected, rtol=1e-13)


# cycle model, cycle 0.5, 6 cycles: patient 0 sick from cycle 2 (recorded at t = 1), a
# flare at t = 1.5, dead at t = 2.5; patient 1 well throughout
C_TO_SICK, C_TO_DEAD, C_FLARE = 0, 2, 4  # cycle model risks: well->sick, well->well,
#                                         sick->dead, sick->sick, flare
CYCLE_RECORDS = [
    (0, 0.0, START, WELL, START), (0, 1.0, WELL, SICK, C_TO_SICK),
    (0, 1.5, SICK, SICK, C_FLARE), (0, 2.5, SICK, DEAD, C_TO_DEAD),
    (1, 0.0, START, WELL, START),
]
CYCLE_INDICATOR = np.array([  # states at t = 0, 0.5, ..., 3
    [WELL, WELL, SICK, SICK, SICK, DEAD, DEAD],
    [WELL] * 7,
])


@pytest.mark.parametrize("correction", ["none", "half-cycle", "trapezoidal", "simpson"])
def test_cycle_occupancy_is_indicator_trace_times_cycle_weights(correction):
    model = cycle_model(correction)
    h = histories(CYCLE_RECORDS, 2)
    np.testing.assert_array_equal(aggregate.grid_states(h, model.times), CYCLE_INDICATOR)
    occupancy = aggregate.exposure(model, h).occupancy
    for w, d in enumerate((0.0, 0.0, 0.04)):
        weights = cycle_weights(6, 0.5, d, correction=correction)
        for s in range(3):
            expected = (CYCLE_INDICATOR == s).astype(float) @ weights
            np.testing.assert_allclose(occupancy[:, s, w], expected, rtol=1e-13)


def test_cycle_occupancy_of_the_absorbed_and_the_treated_equals_the_point_by_point_sums():
    # random paths that end absorbed (dead from a random point on) and random treatment
    # windows, some ending after death or never opening: every point's weight summed where
    # the patient is in the state (and on treatment), by numpy masks as the reference
    from microsim.patients.multipliers import Window
    model = cycle_model("half-cycle", n_cycles=40)
    rng = np.random.default_rng(11)
    B, T = 300, 41
    states = rng.integers(0, 2, size=(B, T))
    died = rng.integers(1, T + 5, size=B)  # beyond T: never absorbed
    states[np.arange(T) >= died[:, None]] = DEAD
    times = model.times
    on = rng.choice(np.r_[times, np.inf], size=B)
    off = on + rng.choice([0.5, 3.0, 25.0, np.inf], size=B)
    window = Window(on, off, np.ones(len(model.risks)), np.ones(len(model.risks)))
    every, treated = aggregate.cycle_occupancy(model, states.astype(np.int16), window)
    weights = np.stack([cycle_weights(40, 0.5, d, correction="half-cycle")
                        for d in (0.0, 0.0, 0.04)], axis=1)
    active = (on[:, None] <= times) & (times < off[:, None])
    for s in range(3):
        inside = (states == s).astype(float)
        np.testing.assert_allclose(every[:, s], inside @ weights, rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(treated[:, s], (inside * active) @ weights, rtol=1e-12,
                                   atol=1e-14)


def test_cycle_occupancy_half_cycle_by_hand():
    # the format's half-cycle rule: cycle * (f_0 / 2 + f_1 + ... + f_{n-1}), each point
    # discounted (1 + d)^-t (docs/scenario-format.md; Elbasha & Chhatwal 2016, from memory)
    model = cycle_model("half-cycle")
    occupancy = aggregate.exposure(model, histories(CYCLE_RECORDS, 2)).occupancy
    times = 0.5 * np.arange(7)
    weights = 0.5 * np.array([0.5, 1, 1, 1, 1, 1, 0]) * 1.04 ** -times
    assert occupancy[0, SICK, 2] == pytest.approx(weights[2:5].sum(), rel=1e-13)
    assert occupancy[1, WELL, 2] == pytest.approx(weights.sum(), rel=1e-13)
    assert occupancy[0, WELL, 0] == pytest.approx(0.5 * (0.5 + 1), rel=1e-13)


def test_cycle_occurrences_discounted_at_the_cycle_end_they_are_recorded():
    model = cycle_model()
    assert [r.name for r in model.risks] == ["well->sick", "well->well", "sick->dead",
                                             "sick->sick", "flare"]
    occurrences = aggregate.exposure(model, histories(CYCLE_RECORDS, 2)).occurrences
    np.testing.assert_allclose(occurrences[0, :, 2], [1.04 ** -1.0, 0.0, 1.04 ** -2.5,
                                                       0.0, 1.04 ** -1.5], rtol=1e-13)
    np.testing.assert_array_equal(occurrences[0, :, 0], [1, 0, 1, 0, 1])
    np.testing.assert_array_equal(occurrences[1], 0.0)
