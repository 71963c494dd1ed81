"""A strategy's change that gives the risk on treatment (`rate = ...`, `probability = ...`)
instead of a hazard ratio.

References outside the project: under a constant total rate R the share still in the first
state is exp(-R t), and under a constant per-cycle probability q of leaving it is (1 - q)^n
(common practice); a competing move p beside the treated one leaves 1 - p - p_new per cycle
under the separate rule, since 1 - (1 - p_base)^HR with HR = ln(1 - p_new) / ln(1 - p_base)
is p_new (hand computation). The expected time alive under a constant death rate r cut at
the horizon H is (1 - exp(-r H)) / r (common practice). Each refusal is one line naming
the field and the fix.
"""
from __future__ import annotations


import numpy as np
import pytest

from microsim.binding import bind
from microsim.cohort.summaries import cohort_trace
from microsim.scenario import parse_scenario
from microsim.uncertainty.psa import parameter_uncertainty
from support import (assert_refused, edited, event, horizon, nested, parameters, probability,
                     rate, scenario_text, section, start, state, strategy, table)

ONSET, DEATH, SICK_DEATH, TREATED = 0.2, 0.1, 0.3, 0.04
STATES = (start(well=1.0), state("well"), state("sick"), state("dead", absorbing=True))


def strategies(**change) -> tuple[str, str]:
    return (strategy("usual", comparator=True),
            strategy("drug", changes=[nested(transition="well->dead", **change)]))


def rate_model(death=DEATH, *more: str, **change) -> str:
    return scenario_text(
        horizon(10), *STATES, rate("well", "sick", ONSET), rate("well", "dead", death),
        rate("sick", "dead", SICK_DEATH), *more, *strategies(**(change or dict(rate="r1"))))


def cycle_model(death=DEATH, *more: str, **change) -> str:
    return scenario_text(
        horizon(10), *STATES, probability("well", "sick", ONSET),
        probability("well", "dead", death), probability("well", "well", "remainder"),
        probability("sick", "dead", SICK_DEATH), probability("sick", "sick", "remainder"),
        *more, *strategies(**(change or dict(probability="p1"))))


def trace(model) -> np.ndarray:
    """(T, S) shares of the cohort, states in the model's order."""
    return cohort_trace(model).pivot(index="time", columns="state",
                                     values="share")[list(model.states)].to_numpy()


def test_a_treated_rate_gives_the_trace_of_the_model_with_that_rate():
    text = rate_model(DEATH, parameters(r1=TREATED))
    treated = bind(parse_scenario(text), strategy="drug")
    typed_in = bind(parse_scenario(rate_model(TREATED, hazard_ratio=1.0)))  # as written
    np.testing.assert_allclose(trace(treated), trace(typed_in), rtol=0, atol=1e-12)
    # well is left at the total rate ONSET + TREATED: exp(-R t) (common practice)
    np.testing.assert_allclose(trace(treated)[:, 0],
                               np.exp(-(ONSET + TREATED) * treated.times), rtol=1e-9)


def test_a_treated_probability_gives_the_trace_of_the_model_with_that_probability():
    text = cycle_model(DEATH, parameters(p1=TREATED))
    treated = bind(parse_scenario(text), strategy="drug")
    typed_in = bind(parse_scenario(cycle_model(TREATED, hazard_ratio=1.0)))  # as written
    np.testing.assert_allclose(trace(treated), trace(typed_in), rtol=0, atol=1e-12)
    # well keeps 1 - ONSET - TREATED a cycle: geometric survival (common practice)
    cycles = np.arange(treated.n_cycles + 1)
    np.testing.assert_allclose(trace(treated)[:, 0], (1 - ONSET - TREATED) ** cycles, rtol=1e-12)


def test_an_event_by_state_takes_the_treated_rate_in_every_state():
    """Each state's base rate has its own ratio: 0.6 / 0.2 and 0.6 / 0.5 (hand computation)."""
    flare = event("flare", None, rate=dict(well=0.2, sick=0.5))
    text = scenario_text(
        horizon(10), *STATES, rate("well", "sick", ONSET), rate("well", "dead", DEATH),
        rate("sick", "dead", SICK_DEATH), flare, strategy("usual", comparator=True),
        strategy("drug", changes=[nested(transition="flare", rate=0.6)]))
    model = bind(parse_scenario(text), strategy="drug")
    factors = [f for r, f in zip(model.risks, model.treatment.on_factor) if r.name == "flare"]
    assert factors == pytest.approx([0.6 / 0.2, 0.6 / 0.5], rel=1e-15)


H = 10.0


def life(r):
    """(1 - exp(-r H)) / r: expected years alive under rate r, cut at H (common practice)."""
    return (1.0 - np.exp(-r * H)) / r


def psa_text(base, treated, *model_strategies: str) -> str:
    return scenario_text(
        horizon(H), start(well=1.0), state("well", utility=1), state("dead", absorbing=True),
        rate("well", "dead", base),
        parameters(r0=dict(value=0.1, distribution=dict(family="gamma", shape=25, scale=0.004)),
                   r1=dict(value=0.05, distribution=dict(family="gamma", shape=16,
                                                         scale=0.05 / 16))),
        *(model_strategies or (strategy("usual", comparator=True),
                               strategy("drug", changes=[nested(transition="well->dead",
                                                                rate=treated)]))),
        section("population", patients=50), section("uncertainty", draws=8, basis="exact"),
        section("simulation", seed=5))


def test_each_psa_draw_binds_the_treated_rate_of_that_draw(tmp_path):
    """Both the base and the treated rate are drawn; the strategy's years alive in each draw
    are the closed form at that draw's treated rate, the comparator's at its base rate."""
    result = parameter_uncertainty(parse_scenario(psa_text("r0", "r1")), tmp_path,
                                   progress=False)
    rows = result.results.merge(result.draws, on="draw")
    assert rows.r0.nunique() == rows.r1.nunique() == 8  # the values do vary by draw
    drug, usual = rows[rows.strategy == "drug"], rows[rows.strategy == "usual"]
    np.testing.assert_allclose(drug.life_years, life(drug.r1), rtol=1e-9)
    np.testing.assert_allclose(usual.life_years, life(usual.r0), rtol=1e-9)


def test_each_psa_draw_of_a_treated_probability_equals_the_typed_in_model(tmp_path):
    """The same draws give the strategy with probability = "p1" and a model whose own
    probability is p1, draw by draw."""
    beta = dict(p0=dict(value=0.1, distribution=dict(family="beta", alpha=10, beta=90)),
                p1=dict(value=0.05, distribution=dict(family="beta", alpha=5, beta=95)))

    def text(base, *changes):
        return scenario_text(
            horizon(H), start(well=1.0), state("well", utility=1), state("dead", absorbing=True),
            probability("well", "dead", base), probability("well", "well", "remainder"),
            parameters(**beta), strategy("usual", comparator=True),
            strategy("drug", changes=list(changes) or None),
            section("population", patients=50), section("uncertainty", draws=8, basis="exact"),
            section("simulation", seed=5))

    setting = parameter_uncertainty(
        parse_scenario(text("p0", nested(transition="well->dead", probability="p1"))),
        tmp_path / "sets", progress=False)
    typed_in = parameter_uncertainty(parse_scenario(text("p1", nested(cost=0.0))),
                                     tmp_path / "typed", progress=False)
    np.testing.assert_array_equal(setting.draws.to_numpy(), typed_in.draws.to_numpy())
    drug = setting.results[setting.results.strategy == "drug"]
    same = typed_in.results[typed_in.results.strategy == "drug"]
    assert drug.life_years.nunique() == 8
    np.testing.assert_allclose(drug.life_years.to_numpy(), same.life_years.to_numpy(), rtol=1e-12)


CHANGE = "strategies.drug.changes[0]"
REFUSALS = {
    "hazard ratio and rate": (rate_model(DEATH, hazard_ratio=0.5, rate=0.04),
                              f"{CHANGE}.rate", "cannot be combined with hazard_ratio"),
    "rate and probability": (cycle_model(DEATH, rate=0.04, probability=0.04),
                             f"{CHANGE}.probability", "cannot be combined with rate"),
    "rate on a probability": (cycle_model(DEATH, rate=0.04), f"{CHANGE}.rate",
                              "has a per-cycle probability; give its value on treatment as "
                              "probability ="),
    "probability on a rate": (rate_model(DEATH, probability=0.04), f"{CHANGE}.probability",
                              "has a rate or hazard; give its value on treatment as rate ="),
    "treated probability 1": (cycle_model(DEATH, probability=1.0), f"{CHANGE}.probability",
                              "1 is not below 1"),
    "treated rate 0": (rate_model(DEATH, rate=0.0), f"{CHANGE}.rate", "0 is not above 0"),
    "base rate 0": (rate_model(0.0, rate=0.04), f"{CHANGE}.rate",
                    "'well->dead' has rate 0; no hazard ratio turns 0 into it"),
    "base probability 0": (cycle_model(0.0, probability=0.04), f"{CHANGE}.probability",
                           "has probability 0; no hazard ratio"),
    "base probability 1": (edited(cycle_model(1.0, probability=0.5),
                                  ("probability = 0.2", "probability = 0.0")),
                           f"{CHANGE}.probability", "a certain move stays certain"),
    "base parameter 0": (rate_model("r0", parameters(r0=0.0), rate=0.04), "parameters.r0",
                         "the base rate of a rate on treatment must be above 0"),
    "weibull base": (edited(rate_model(DEATH, rate=0.04),
                            (f"to = \"dead\"\nrate = {DEATH}",
                             'to = "dead"\nhazard = { family = "weibull", shape = 1.5, scale = 8 }')),
                     f"{CHANGE}.rate", "has a weibull hazard, which changes over time"),
    "table base": (cycle_model("p_by_time", table("p_by_time", by="time", starts=[0, 5],
                                                  values=[0.1, 0.2]), probability=0.04),
                   f"{CHANGE}.probability", "reads its probability from table 'p_by_time'"),
    "remainder base": (edited(cycle_model(DEATH, probability=0.04),
                              ('transition = "well->dead"', 'transition = "well->well"')),
                       f"{CHANGE}.transition", "takes the remainder of its row"),
}


@pytest.mark.parametrize("case", REFUSALS)
def test_refusal_names_the_field_and_the_fix(case):
    text, path, phrase = REFUSALS[case]
    assert_refused(text, path, phrase)


def test_a_treated_rate_beside_another_change_of_the_same_risk_is_refused():
    text = edited(rate_model(DEATH, rate=0.04),
                  ("rate = 0.04\n", 'rate = 0.04\n\n  [[strategies.changes]]\n'
                                    '  transition = "well->dead"\n  hazard_ratio = 0.5\n'))
    assert_refused(text, f"{CHANGE}.rate", "which changes[1] also changes; give one change")


def test_a_treated_rate_of_a_pair_of_several_transitions_is_refused():
    text = scenario_text(
        horizon(10), start(well=1.0), state("well"), state("dead", absorbing=True),
        rate("well", "dead", 0.1, name="cancer"), rate("well", "dead", 0.2, name="other"),
        *strategies(rate=0.04))
    assert_refused(text, f"{CHANGE}.transition", "is 2 transitions ('cancer', 'other')")


def test_a_treated_probability_that_overfills_its_row_is_refused_at_its_sum():
    """The row bound takes the treated probability itself: 0.2 + 0.9 = 1.1 (hand computation)."""
    assert_refused(cycle_model(DEATH, probability=0.9), "strategies.drug.transitions.well->*",
                   "can sum to 1.1 ")
