"""Derived parameters: formulas of other parameters.

References: arithmetic precedence and associativity as in ordinary mathematical notation
(a power binds tighter than unary minus and groups to the right: -2^2 = -4, 2^3^2 = 512;
from memory, common practice), checked against Python's own arithmetic on the same
numbers; the rate/probability conversions r = -ln(1 - p) / t and p = 1 - exp(-r t)
(Fleurence & Hollenbeak 2007, "Rates and probabilities in economic modelling",
PharmacoEconomics; from memory) computed here with `math`; a model whose parameter is
derived must give exactly what the same model gives with the number typed in, in the
analytic counterpart, in both simulation engines and in every PSA draw.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from microsim.cohort.analytic import analytic
from microsim.cohort.summaries import expected_outcomes
from microsim.patients.population import cohort_patients
from microsim.scenario import parse_scenario
from microsim.scenario.formulas import FormulaError, evaluate, parse_formula
from microsim.simulation import simulate
from microsim.scenario.formulas import with_derived
from microsim.uncertainty.draw_checks import check_draws, problems
from microsim.uncertainty.draws import ParameterSampler
from microsim.uncertainty.one_way import one_way
from microsim.binding import bind
from support import (assert_refused, horizon, model_of, outcomes, parameters, probability,
                     rate, scenario_text, section, start, state, strategy)


def value(text: str, **values) -> float:
    return evaluate(parse_formula(text), values, strict=True)


@pytest.mark.parametrize("text, expected", [
    ("1 + 2 * 3", 1 + 2 * 3), ("(1 + 2) * 3", (1 + 2) * 3), ("10 - 4 - 3", 10 - 4 - 3),
    ("8 / 4 / 2", 8 / 4 / 2), ("2 ^ 3 ^ 2", 2 ** 3 ** 2), ("2 ** 3 ** 2", 2 ** 3 ** 2),
    ("-2 ^ 2", -2 ** 2), ("(-2) ^ 2", (-2) ** 2), ("2 ^ -1", 2 ** -1), ("--3", 3),
    ("2 * -3", 2 * -3), ("-x + +y", -0.25 + 4.0), ("x * 1e3", 0.25e3), (".5 + 1.", 1.5),
    ("2 ^ 3 * 2", 2 ** 3 * 2), ("-(x - y) / 2", -(0.25 - 4.0) / 2),
    ("min(x, y, 1)", 0.25), ("max(x, y, 1)", 4.0), ("exp(log(y))", math.exp(math.log(4.0))),
    ("log(exp(1))", 1.0), ("y ^ 0.5", 2.0),
])
def test_precedence_and_associativity_follow_ordinary_notation(text, expected):
    assert value(text, x=0.25, y=4.0) == expected  # Python's arithmetic on the same numbers


def test_rate_and_probability_conversions_are_the_closed_forms():
    p, t = 0.3, 5.0
    # numpy's log1p/expm1 may differ from math's in the last bit
    assert value("rate_from_probability(p, t)", p=p, t=t) == pytest.approx(
        -math.log1p(-p) / t, rel=1e-15)
    assert value("probability_from_rate(r, t)", r=0.07, t=t) == pytest.approx(
        -math.expm1(-0.07 * t), rel=1e-15)
    back = value("probability_from_rate(rate_from_probability(p, t), t)", p=p, t=t)
    assert abs(back - p) < 1e-15


def test_formulas_evaluate_over_arrays_of_draws_as_over_one_value():
    f = parse_formula("rate_from_probability(p, 2) * hr ^ 2 - min(p, 0.1)")
    p, hr = np.array([0.1, 0.2, 0.35]), np.array([0.5, 0.9, 1.3])
    many = evaluate(f, {"p": p, "hr": hr})
    one_by_one = [evaluate(f, {"p": a, "hr": b}) for a, b in zip(p, hr)]
    assert np.allclose(many, one_by_one, rtol=1e-15, atol=0)


@pytest.mark.parametrize("text, column, phrase", [
    ("p ^", 4, "expected a number, a name or '('"),
    ("exp(p", 6, "expected ')' to close exp("),
    ("(p + 1", 7, "to close the '(' at column 1"),
    ("p p", 3, "after a complete expression (a missing operator?)"),
    ("2 $ 3", 3, "unexpected character '$'"),
    ("ln(p)", 1, "unknown function 'ln'"),
    ("min(p)", 1, "min takes at least 2 arguments, got 1"),
    ("exp(p, 2)", 1, "exp takes 1 argument, got 2"),
    ("rate_from_probability(p)", 1, "takes 2 arguments, got 1"),
    ("p * * 2", 5, "expected a number"),
    ("", 1, "is empty"),
])
def test_syntax_errors_give_their_column(text, column, phrase):
    with pytest.raises(FormulaError) as caught:
        parse_formula(text)
    assert caught.value.column == column and phrase in caught.value.message


@pytest.mark.parametrize("text, column, phrase", [
    ("1 / (p - 0.5)", 3, "division by zero"),
    ("log(p - 0.5)", 1, "the natural log needs a number above 0"),
    ("0 ^ -1", 3, "0 to a negative power"),
    ("(-p) ^ 0.5", 6, "a negative number to a fractional power"),
    ("rate_from_probability(2 * p, 1)", 1, "a probability from 0 up to (not including) 1"),
    ("probability_from_rate(p, 0)", 1, "a period above 0"),
    ("exp(2000 * p)", 1, "too large"),
])
def test_operations_without_a_finite_value_are_refused_at_their_column(text, column, phrase):
    with pytest.raises(FormulaError) as caught:
        value(text, p=0.5)
    assert caught.value.column == column and phrase in caught.value.message
    many = np.ravel(evaluate(parse_formula(text), {"p": np.array([0.5])}))
    assert not np.isfinite(many[0])  # not strict: no value, no exception


# --------------------------------------------------------------------- in a scenario

def two_state(p_death, *extra, kind="probability", **more) -> str:
    """well -> dead at p_death (per cycle, or a rate), with costs and utilities."""
    way = probability("well", "dead", "p_death") if kind == "probability" else \
        rate("well", "dead", "p_death")
    rest = [probability("well", "well", "remainder")] if kind == "probability" else []
    return scenario_text(
        horizon(10), start(well=1.0), outcomes(discount_costs=0.035, discount_effects=0.035),
        parameters(p5=0.3, unit_cost=120.0, visits=4.0, p_death=p_death,
                   cost_well={"formula": "unit_cost * visits"}, **more),
        state("well", cost="cost_well", utility=0.85), state("dead", absorbing=True),
        way, *rest, *extra)


DERIVED = {"formula": "probability_from_rate(rate_from_probability(p5, 5), 1)"}
TYPED = -math.expm1(math.log1p(-0.3) / 5)  # by hand with math: the same conversion


@pytest.mark.parametrize("kind, derived, typed", [
    ("probability", DERIVED, TYPED),
    ("rate", {"formula": "rate_from_probability(p5, 5)"}, -math.log1p(-0.3) / 5)])
def test_a_derived_parameter_gives_the_outputs_of_the_number_typed_in(kind, derived, typed):
    a, b = model_of(two_state(derived, kind=kind)), model_of(two_state(typed, kind=kind))
    assert abs(a.values["p_death"] - typed) <= 1e-15 and a.values["cost_well"] == 480.0
    left, right = expected_outcomes(a), expected_outcomes(b)
    assert np.allclose(left.value, right.value, rtol=1e-12, atol=0)
    x = simulate(a, cohort_patients(300), 5, keep_exposure=True)
    y = simulate(b, cohort_patients(300), 5, keep_exposure=True)
    assert np.array_equal(x.states, y.states)  # the same histories, draw for draw
    assert np.allclose(x.exposure.occupancy, y.exposure.occupancy, rtol=1e-12, atol=0)


def test_an_input_used_only_by_a_formula_is_used():
    s = parse_scenario(two_state(0.05))
    assert not [w for w in s.warnings if w.startswith(("parameters.unit_cost", "parameters.visits"))]
    assert any(w.startswith("parameters.p5: defined but not used") for w in s.warnings)


def test_derived_parameters_read_each_other_in_any_order():
    text = two_state({"formula": "half * 2"}, half={"formula": "p5 / 6"})
    assert abs(model_of(text).values["p_death"] - 0.3 / 6 * 2) < 1e-16


@pytest.mark.parametrize("p_death, more, path, phrase", [
    ({"formula": "p5 + p_deth"}, {}, "parameters.p_death.formula",
     "column 6 of 'p5 + p_deth': unknown name 'p_deth' (did you mean 'p_death'?)"),
    ({"formula": "a"}, {"a": {"formula": "b * 2"}, "b": {"formula": "p_death - 1"}},
     "parameters.p_death.formula", "form a cycle (p_death -> a -> b -> p_death)"),
    ({"formula": "p_death + 1"}, {}, "parameters.p_death.formula",
     "cycle (p_death -> p_death)"),
    ({"formula": "1 / (p5 - 0.3)"}, {}, "parameters.p_death.formula",
     "column 3 of '1 / (p5 - 0.3)': division by zero (1 / 0) with p5 = 0.3"),
    ({"formula": "log(p5 - 0.3)"}, {}, "parameters.p_death.formula", "with p5 = 0.3"),
    ({"formula": "p5 * 4"}, {}, "parameters.p_death.formula",
     "gives 1.2, but it is used as a probability at transitions.well->dead.probability"),
    ({"formula": "p5", "value": 0.3}, {}, "parameters.p_death.value",
     "a derived parameter is computed from its formula"),
    ({"formula": "p5", "distribution": {"family": "beta", "alpha": 3, "beta": 7}}, {},
     "parameters.p_death.distribution", "give distributions to the parameters it is computed"),
    ({"formula": "p5", "low": 0.1, "high": 0.4}, {}, "parameters.p_death.low", "takes no low"),
    ({"formula": "p5", "fromula": 1}, {}, "parameters.p_death.fromula", "did you mean 'formula'"),
    ({"formula": 0.3}, {}, "parameters.p_death.formula", "must be text"),
    ({"formula": "p5 +"}, {}, "parameters.p_death.formula", "column 5 of 'p5 +'"),
    # deep or long formulas: refused before their recursion would exhaust Python's stack
    # (its default limit is 1000 frames, from memory); the message quotes the formula's ends
    ({"formula": "(" * 300 + "p5" + ")" * 300}, {}, "parameters.p_death.formula",
     "nests or chains more than 100 operations; split it into derived parameters"),
    ({"formula": " + ".join(["p5 / 1000"] * 1000)}, {}, "parameters.p_death.formula",
     "column 1 of 'p5 / 1000 + p5 / 1000 + p5 / ... 000 + p5 / 1000 + p5 / 1000': nests"),
    ({"formula": "-" * 3000 + "p5"}, {}, "parameters.p_death.formula", "more than 100"),
])
def test_bad_formulas_are_refused_in_one_line(p_death, more, path, phrase):
    assert_refused(two_state(p_death, **more), path, phrase)


def test_a_formula_of_up_to_100_operations_is_read_and_evaluated():
    # within the depth limit: 50 terms added, against Python's own sum of the same terms
    # in the same (left to right) order
    text = " + ".join(["p5 / 99"] * 50)
    assert evaluate(parse_formula(text), {"p5": 0.3}) == sum([0.3 / 99] * 50)


def test_a_formula_without_a_value_at_a_one_way_setting_is_refused():
    ranged = {"value": 0.3, "low": 0.1, "high": 0.5}
    assert_refused(two_state({"formula": "0.1 / (0.5 - q)"}, q=ranged),
                   "parameters.p_death.formula",
                   "division by zero (0.1 / 0) with q = 0.5 with parameters.q at its high value")
    assert_refused(two_state({"formula": "2.4 * q"}, q=ranged), "parameters.p_death.formula",
                   "gives 1.2 with parameters.q at its high value 0.5 (one-way range), but it "
                   "is used as a probability")


def test_sensitivity_cannot_vary_a_derived_parameter_and_checks_it_on_grids():
    two_way = section("sensitivity", two_way=["q", "p_death"])
    assert_refused(two_state({"formula": "q / 2"}, two_way, q={"value": 0.3, "low": 0.1,
                                                                 "high": 0.5}),
                   "sensitivity.two_way[1]", "'p_death' is derived (computed by its formula "
                   "from q); vary the parameters it is computed from")
    scan = section("sensitivity", break_even=["q"], grid=5)  # q = 0, 0.1, ..., 0.4
    assert_refused(two_state({"formula": "((q - 0.2) ^ 2) ^ -1 / 1000"}, scan,
                             q={"value": 0.3, "low": 0.0, "high": 0.4}),
                   "sensitivity.break_even[0]", "parameters.p_death has no value (column 17 "
                   "of '((q - 0.2) ^ 2) ^ -1 / 1000': 0 to a negative power (-1) with q = 0.2)")


def test_evppi_of_a_derived_parameter_is_refused_in_the_words_of_sensitivity():
    psa = section("uncertainty", evppi=["p_death"])
    q = {"value": 0.3, "distribution": {"family": "beta", "alpha": 30, "beta": 70}}
    assert_refused(two_state({"formula": "q / 2"}, psa, q=q), "uncertainty.evppi[0]",
                   "'p_death' is derived (computed by its formula from q); list as one group "
                   "the parameters it is computed from")


def test_one_way_sensitivity_of_an_input_moves_its_derived_parameter():
    text = two_state(DERIVED).replace("p5 = 0.3", "p5 = { value = 0.3, low = 0.2, high = 0.4 }")
    s = parse_scenario(text)
    seen = []
    table = one_way(lambda values: seen.append(bind(s, values).values["p_death"]) or 0.0,
                    s.parameters, lambda result: result)
    assert list(table.parameter) == ["p5"]
    expected = [-math.expm1(math.log1p(-p) / 5) for p in (0.3, 0.2, 0.4)]
    assert sorted(seen) == pytest.approx(sorted(expected), rel=1e-15)


# ------------------------------------------------------------------------------- PSA

def psa_scenario(policy="refuse", hr=None) -> str:
    hr = hr or {"value": 0.8, "distribution": {"family": "lognormal", "meanlog": -0.22,
                                               "sdlog": 0.1}}
    return scenario_text(
        horizon(5), start(well=1.0),
        parameters(p5={"value": 0.3, "distribution": {"family": "beta", "alpha": 30,
                                                      "beta": 70}},
                   hr=hr, p_base={"formula": "probability_from_rate(rate_from_probability("
                                             "p5, 5), 1)"},
                   p_treated={"formula": "1 - (1 - p_base) ^ hr"}),
        state("well", utility=0.9), state("dead", absorbing=True),
        probability("well", "dead", "p_base"), probability("well", "well", "remainder"),
        strategy("usual", comparator=True),
        strategy("new", changes=[{"state": "well", "cost": 100.0}]),
        section("uncertainty", draws=30, patients_per_draw=10, invalid_draws=policy),
        section("simulation", seed=9))


def test_psa_draws_flow_through_derived_parameters():
    s = parse_scenario(psa_scenario())
    table = check_draws(s, ParameterSampler(s.parameters), 30, 9).table
    p5, hr = table.p5.to_numpy(), table.hr.to_numpy()
    assert np.std(p5) > 0
    by_hand = np.array([-math.expm1(math.log1p(-p) / 5) for p in p5])
    assert np.allclose(table.p_base, by_hand, rtol=1e-14, atol=0)
    assert np.allclose(table.p_treated, [1 - (1 - b) ** h for b, h in zip(by_hand, hr)],
                       rtol=1e-14, atol=0)
    for _, row in table.head(3).iterrows():  # binding a draw recomputes from its inputs
        bound = bind(s, {c: row[c] for c in s.parameters})
        assert abs(bound.values["p_treated"] - row.p_treated) < 1e-15


WIDE_HR = {"value": 1.0, "distribution": {"family": "normal", "mean": 1.0, "sd": 3.0}}


def test_a_derived_value_invalid_in_some_draws_is_refused_redrawn_or_truncated():
    text = psa_scenario(hr=WIDE_HR).replace('probability = "p_base"',
                                            'probability = "p_treated"')
    s = parse_scenario(text)
    sampler = ParameterSampler(s.parameters)
    first = sampler.draws(9, np.arange(30))
    # by hand: (1 - p)^hr is above 1 for hr < 0 (a probability below 0)
    bad = first.hr.to_numpy() < 0
    assert bad.any() and not bad.all()
    with pytest.raises(Exception) as caught:
        check_draws(s, sampler, 30, 9)
    k = int(np.argmax(bad))
    assert str(caught.value).startswith(f"parameters.p_treated.formula: PSA draw {k} gives "
                                        "p_treated = ")
    redrawn = check_draws(parse_scenario(text.replace('"refuse"', '"redraw"')), sampler, 30, 9)
    assert (redrawn.table.p_treated.between(0, 1)).all()
    assert set(redrawn.changed.parameter) == {"p5", "hr"}
    assert np.array_equal(redrawn.table.hr[~bad], first.hr[~bad])


def test_a_formula_without_a_value_in_a_draw_is_an_invalid_draw():
    text = psa_scenario().replace('"1 - (1 - p_base) ^ hr"', '"1 / log(hr / 0.7)"')
    s = parse_scenario(text)
    table = ParameterSampler(s.parameters).draws(9, np.arange(30))
    table.loc[4, "hr"] = 0.7  # a draw at which the log is 0: set by hand
    table["p_treated"] = with_derived(s.parameters, {c: table[c] for c in s.parameters})["p_treated"]
    found = problems(s, table, {})
    assert found[0].path == "parameters.p_treated.formula" and found[0].bad[4]
    assert "division by zero" in found[0].why(4)
