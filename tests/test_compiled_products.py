"""The compiled exact products of cycle models against the numpy reference.

`microsim.cohort.compiled_products` must give the numbers of `analytic.matrix_products`
(whose chains are checked against hand-built matrix powers and closed forms in
test_cohort_analytic.py, test_markov_tunnels.py and the calibration test) to rounding, on
every kind of cycle model: random models of every feature the generator draws (covariates,
attained age, tables by time, age, time in state and level, count and window memory,
events, strategies, treatment sequences and triggers), the demo under each strategy, any
chunk size and thread count, and the same refusal of a row that sums above 1.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from microsim import threads
from microsim.binding import bind
from microsim.cohort import compiled_products as compiled
from microsim.cohort.analytic import cycle_result, matrix_products
from microsim.cohort.expand import expand
from microsim.patients.population import patients_for
from microsim.patients.treatment import patient_multipliers
from microsim.scenario import parse_scenario, read_scenario
from random_models import random_models

DEMO = Path(__file__).resolve().parent.parent / "scenarios" / "lakemoor_kidney.toml"
ROUNDING = 1e-12  # shares and exposures of order 1 to 40: sums of products in another order

MODELS = [m for m in random_models(20261204, cycle_models=40, rate_models=0, sequence_models=6,
                                   trigger_models=6) if m.kind == "cycle"]


def both(model, mult):
    """(reference, compiled) cycle results of the patient rows of `mult`."""
    exp = expand(model)
    distinct, _ = mult.unique()
    return (cycle_result(exp, distinct, products=matrix_products),
            cycle_result(exp, distinct))


def assert_same(reference, fast):
    (trace0, exposure0), (trace1, exposure1) = reference, fast
    np.testing.assert_allclose(trace1, trace0, rtol=0, atol=ROUNDING)
    for name in ("occupancy", "occurrences", "on_treatment"):
        np.testing.assert_allclose(getattr(exposure1, name), getattr(exposure0, name),
                                   rtol=1e-13, atol=ROUNDING, err_msg=name)


def patients_of(scenario, model, size: int = 300):
    patients = patients_for(scenario, size, 5)
    return patient_multipliers(model, patients, 5)


@pytest.mark.parametrize("drawn", MODELS, ids=lambda m: m.name)
def test_random_cycle_models_give_the_reference_numbers(drawn):
    scenario = parse_scenario(drawn.text)
    model = bind(scenario, strategy=drawn.strategy)
    reference, fast = both(model, patients_of(scenario, model))
    assert reference[0][:, -1].sum() > 0  # a trace of patients, not an empty one
    assert_same(reference, fast)


def test_the_generator_reaches_every_feature_the_kernel_reads():
    features = set().union(*(m.features for m in MODELS))
    for needed in ("table by level", "no way out of the start state for a while"):
        assert needed in features, needed
    texts = "\n".join(m.text for m in MODELS)
    for key in ('by = "time_in_state"', 'by = "age"', "within", "multipliers", "[[events]]",
                "[[strategies]]"):
        assert key in texts, key


def test_the_demo_gives_the_reference_numbers_under_every_strategy():
    scenario = read_scenario(DEMO)
    for strategy in [None] + [s.name for s in scenario.strategies]:
        model = bind(scenario, strategy=strategy)
        reference, fast = both(model, patients_of(scenario, model, 500))
        assert reference[1].occurrences.sum() > 0
        assert_same(reference, fast)


def test_chunks_and_threads_change_no_number(monkeypatch):
    scenario = read_scenario(DEMO)
    model = bind(scenario, strategy=scenario.strategies[-1].name)
    mult, _ = patients_of(scenario, model, 700).unique()
    exp = expand(model)
    whole = compiled.compiled_products(exp, mult)
    monkeypatch.setattr(compiled, "CHUNK_NUMBERS", 1)  # the smallest chunk: 64 patients
    threads.use(2)
    try:
        chunked = compiled.compiled_products(exp, mult)
    finally:
        threads.use(None)
    for a, b in zip(whole, chunked):
        np.testing.assert_array_equal(a, b)


def test_a_row_above_one_is_refused_alike():
    scenario = read_scenario(DEMO)
    scenario = replace(scenario, time=replace(scenario.time, probability_rule="separate"))
    model = bind(scenario)
    mult, _ = patients_of(scenario, model, 50).unique()
    progression = next(r for r, risk in enumerate(model.risks) if risk.name == "progression")
    log_static = mult.log_static.copy()
    log_static[7, progression] = np.log(40.0)  # 1 - 0.94^40 beside background death
    mult = replace(mult, log_static=log_static)
    exp = expand(model)
    messages = []
    for products in (matrix_products, compiled.compiled_products):
        with pytest.raises(RuntimeError, match="above 1") as refused:
            cycle_result(exp, mult, products=products)
        messages.append(str(refused.value))
    assert messages[0].split(" sum to ")[0] == messages[1].split(" sum to ")[0]
    assert "patient row 7" in messages[1]


def test_a_long_tunnel_model_in_small_chunks_gives_the_reference_numbers(monkeypatch):
    """20 years of monthly cycles, a time-in-state table of 25 bands (a 25-cycle tunnel
    beside count memory: many expanded states, so the smallest chunks), the competing
    rule, attained age and an event that moves the count: the kernel in 64-patient chunks
    on two threads against the numpy reference."""
    from support import after, effect, event, horizon, population, probability, start, state
    from support import attribute, scenario_text, table
    starts = [k / 12 for k in range(25)]
    text = scenario_text(
        horizon(20, cycle=1 / 12, rule="competing"), start(well=0.8, sick=0.2),
        state("well"), state("sick"), state("dead", absorbing=True),
        probability("well", "sick", 0.01, effects=[effect("age", 1.03, centre=60)],
                    memory=[after("flare", multipliers=[1.0, 1.5, 2.0])]),
        probability("well", "dead", 0.002, effects=[effect("age", 1.05, centre=60)]),
        probability("well", "well", "remainder"),
        probability("sick", "dead", "stay_death"), probability("sick", "well", 0.02),
        probability("sick", "sick", "remainder"),
        event("flare", ["well", "sick"], probability=0.03),
        table("stay_death", by="time_in_state", starts=starts,
              values=[0.05 * 0.9 ** k for k in range(25)]),
        population(200, attribute("age", "normal", mean=60, sd=8, lower=40, upper=80)))
    scenario = parse_scenario(text)
    model = bind(scenario)
    mult, _ = patients_of(scenario, model, 200).unique()
    exp = expand(model)
    assert exp.size > 70 and model.n_cycles == 240
    reference = cycle_result(exp, mult, products=matrix_products)
    monkeypatch.setattr(compiled, "CHUNK_NUMBERS", 1)
    threads.use(2)
    try:
        fast = cycle_result(exp, mult)
    finally:
        threads.use(None)
    assert_same(reference, fast)
