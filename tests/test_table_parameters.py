"""Table entries that name parameters: PSA and sensitivity analyses vary a table through them.

References outside the project:
- a table whose entry names a parameter is the same table with the parameter's number typed
  in (the definition in docs/scenario-format.md): bound values, analytic traces and
  simulated histories identical, to the bit;
- the closed form of discounted life years under a constant death rate mu over H years,
  with an instantaneous discount rate r = ln(1 + d): (1 - exp(-(mu + r) H)) / (mu + r)
  (common practice; the formula docs/scenario-format.md gives), times each sex's utility,
  weighted by the sex shares of the patients (counted here with numpy);
- a drawn probability entry outside [0, 1], or a row that could sum above 1, is handled
  exactly as the same parameter drawn for a transition's probability (the rules of
  `uncertainty.invalid_draws` in docs/scenario-format.md; numpy.clip for truncation).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from microsim.binding import bind
from microsim.capacity.binding import bind_capacity
from microsim.cli import main
from microsim.cohort.analytic import analytic
from microsim.patients.population import draw_population, patients_for
from microsim.patients.treatment import patient_multipliers
from microsim.scenario import ScenarioError, parse_scenario
from microsim.simulation import simulate
from microsim.uncertainty.draw_checks import check_draws
from microsim.uncertainty.draws import ParameterSampler
from microsim.uncertainty.one_way import tornado
from microsim.uncertainty.psa import parameter_uncertainty
from support import (assert_refused, attribute, edited, horizon, outcomes, parameters, population,
                     probability, rate, scenario_text, section, start, state, table)
from test_capacity_scenario import CLOSED, SERVICE

SEX = attribute("sex", "categorical", levels=["female", "male"], shares=[0.4, 0.6])
MU, H, D, U_FEMALE, U_MALE = 0.08, 20.0, 0.035, 0.85, 0.78
U_MALE_DRAWN = dict(value=U_MALE, distribution=dict(family="beta", alpha=78, beta=22),
                    low=0.7, high=0.9)


def by_sex(utility, *extra, u_male=U_MALE_DRAWN, draws=12) -> str:
    """well -> dead at the constant rate MU; the utility in well read from a table by sex
    whose male entry is `utility` (a number or the parameter u_male)."""
    return scenario_text(
        horizon(H), start(well=1), state("well", utility="u_by_sex", cost=100),
        state("dead", absorbing=True), rate("well", "dead", MU),
        table("u_by_sex", attribute="sex", values={"female": U_FEMALE, "male": utility}),
        parameters(u_male=u_male), outcomes(discount_effects=D), *extra,
        section("uncertainty", draws=draws, basis="exact"), section("simulation", seed=11),
        population(300, SEX))


def discounted_years() -> float:
    rate_ = MU + math.log1p(D)
    return (1 - math.exp(-rate_ * H)) / rate_


def cycle_model(p_sick, *, policy=None, distribution=None) -> str:
    """A yearly cycle model whose well -> sick probability by age and sex reads `p_sick`
    for men from 60 on (a number or the parameter p_old)."""
    p_old = dict(value=0.3, distribution=distribution) if distribution else 0.3
    return scenario_text(
        horizon(15, cycle=1), start(well=1), state("well", utility="u_by_sex"),
        state("sick", utility=0.5), state("dead", absorbing=True),
        probability("well", "sick", "p_by_age"), probability("well", "dead", 0.05),
        probability("well", "well", "remainder"),
        probability("sick", "dead", 0.2), probability("sick", "sick", "remainder"),
        table("p_by_age", by="age", starts=[0, 60], attribute="sex",
              values={"female": [0.05, 0.1], "male": [0.08, p_sick]}),
        table("u_by_sex", attribute="sex", values={"female": U_FEMALE, "male": "u_male"}),
        parameters(p_old=p_old, u_male=U_MALE),
        section("uncertainty", draws=40, invalid_draws=policy),
        population(200, SEX, attribute("age", "uniform", lower=50, upper=70)))


# ------------------------------------------------------------------ a name is its number

@pytest.mark.parametrize("kind", ["cycle", "rate"])
def test_an_entry_that_names_a_parameter_is_its_number_typed_in(kind, tmp_path):
    if kind == "cycle":
        named, typed = cycle_model("p_old"), cycle_model(0.3).replace('"u_male" }', f"{U_MALE} }}")
    else:
        named, typed = by_sex("u_male"), by_sex(U_MALE)
    assert named != typed
    models = [bind(parse_scenario(text)) for text in (named, typed)]
    for a, b in zip(*(m.value_tables + tuple(r.level_table for r in m.risks
                                              if r.level_table is not None) for m in models)):
        assert a.values == b.values and all(isinstance(v, float) for v in a.values)
    patients = draw_population(models[0].scenario.population, 4, np.arange(300))
    traces, histories = [], []
    for k, model in enumerate(models):
        mult = patient_multipliers(model, patients, 4)
        cohort = analytic(model, mult=mult)
        traces.append((cohort.trace, cohort.exposure.occupancy))
        simulate(model, patients, 4, histories=tmp_path / f"{k}.parquet")
        histories.append(pd.read_parquet(tmp_path / f"{k}.parquet"))
    for a, b in zip(*traces):
        np.testing.assert_array_equal(a, b)
    pd.testing.assert_frame_equal(*histories)
    assert len(histories[0]) > 300  # some patients moved


def test_a_derived_parameter_can_fill_an_entry():
    text = by_sex("u_male_derived").replace(
        "[parameters]\n", '[parameters]\nu_male_derived = { formula = "u_male - 0.05" }\n')
    model = bind(parse_scenario(text))
    assert model.state_tables[0].table.values == (U_FEMALE, pytest.approx(U_MALE - 0.05))
    assert bind(parse_scenario(text), {"u_male": 0.6}).state_tables[0].table.values[1] == \
        pytest.approx(0.55)


# -------------------------------------------------------------- the analyses vary it

def test_each_exact_psa_draw_is_the_closed_form_of_its_drawn_entry(tmp_path):
    scenario = parse_scenario(by_sex("u_male"))
    result = parameter_uncertainty(scenario, tmp_path / "psa", progress=False)
    male = (patients_for(scenario, 300, 11)["sex"] == "male").mean()  # the shared patients
    assert 0.5 < male < 0.7
    rows = result.results.merge(result.draws, on="draw")
    assert len(rows) == 12 and rows.u_male.nunique() == 12  # every draw its own value
    expected = discounted_years() * ((1 - male) * U_FEMALE + male * rows.u_male.to_numpy())
    np.testing.assert_allclose(rows.qalys_discounted.to_numpy(), expected, rtol=1e-9)
    assert result.tables == (("u_by_sex",), ())


def test_a_table_of_numbers_is_said_to_be_held_fixed(tmp_path, capsys):
    path = tmp_path / "fixed.toml"
    path.write_text(by_sex(U_MALE, u_male=U_MALE_DRAWN).replace(
        'cost = 100', 'cost = "c_well"').replace(
        "[parameters]\n", "[parameters]\nc_well = { value = 100, distribution = "
                          '{ family = "gamma", shape = 100, scale = 1 } }\n'))
    out = tmp_path / "out"
    assert main(["run", str(path), "--psa", "--draws", "3", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "PSA tables: held fixed in every draw: u_by_sex (no entry names a drawn" in printed
    summary = json.loads((out / "fixed" / "latest" / "summary.json").read_text())["psa"]
    assert summary["tables_held_fixed"] == ["u_by_sex"] and summary["tables_varied"] == []
    draws = pd.read_parquet(out / "fixed" / "latest" / "psa_draws.parquet")
    assert draws.qalys_discounted.nunique() == 1  # the utility never moves


def test_one_way_on_an_entry_moves_the_result_by_the_hand_computed_amount():
    scenario = parse_scenario(by_sex("u_male"))
    row = tornado(scenario, patients=200, seed=5, measure="qalys").set_index("parameter").loc["u_male"]
    male = (patients_for(scenario, 200, 5)["sex"] == "male").mean()
    for setting, u in ((row.result_low, 0.7), (row.result_high, 0.9), (row.result_base, U_MALE)):
        assert setting == pytest.approx(
            discounted_years() * ((1 - male) * U_FEMALE + male * u), rel=1e-9)
    assert row.swing == pytest.approx(discounted_years() * male * 0.2, rel=1e-9)


# ------------------------------------------------------------- draws checked as a use

def direct_model(policy: str) -> str:
    """The same model with p_old as the probability of a transition of its own (men over 60
    only would need a table, so here it is everyone's well -> sick from age 60: the checks
    only read the parameter's uses)."""
    return cycle_model("p_old", policy=policy, distribution=NORMAL).replace(
        'probability = "p_by_age"', 'probability = "p_old"')


NORMAL = dict(family="normal", mean=0.1, sd=0.15)  # below 0 in a quarter of the draws


def test_a_probability_entry_beyond_its_role_is_refused_when_read_as_a_transitions_is():
    text = cycle_model("p_old", distribution=NORMAL)
    assert_refused(text, "parameters.p_old.distribution",
                   "'p_old' is used as a probability at tables.p_by_age.values.male[1] (the "
                   "table is used at transitions.well->sick.probability)")
    assert_refused(direct_model("refuse"), "parameters.p_old.distribution",
                   "'p_old' is used as a probability at transitions.well->sick.probability")


def checked(text: str):
    s = parse_scenario(text)
    return check_draws(s, ParameterSampler(s.parameters), 40, s.simulation.seed)


def test_a_drawn_probability_entry_is_truncated_or_redrawn_as_a_transitions_is():
    for policy in ("truncate", "redraw"):
        entry = checked(cycle_model("p_old", policy=policy, distribution=NORMAL))
        direct = checked(direct_model(policy))
        pd.testing.assert_frame_equal(entry.table, direct.table)
        assert entry.changed.draw.nunique() > 5
        assert (entry.table.p_old.between(0, 1)).all()
        columns = ["draw", "policy", "attempts", "parameter", "drawn", "used"]
        pd.testing.assert_frame_equal(entry.changed[columns], direct.changed[columns])
    drawn = ParameterSampler(parse_scenario(direct_model("truncate")).parameters).draws(
        parse_scenario(direct_model("truncate")).simulation.seed, np.arange(40))
    truncated = checked(cycle_model("p_old", policy="truncate", distribution=NORMAL))
    np.testing.assert_array_equal(truncated.table.p_old, np.clip(drawn.p_old, 0, 1))
    assert set(truncated.changed.reason) == {
        "tables.p_by_age.values.male[1] (the table is used at "
        "transitions.well->sick.probability): a probability must be between 0 and 1"}


def test_a_drawn_entry_whose_row_can_sum_above_1_is_refused_with_its_draw():
    # beside a remainder, men over 60 leave well with p_old + 0.05 (+ the band's maximum)
    text = cycle_model("p_old", distribution=dict(family="beta", alpha=19, beta=1)).replace(
        "probability = 0.05", "probability = 0.1")
    s = parse_scenario(text)
    drawn = ParameterSampler(s.parameters).draws(s.simulation.seed, np.arange(40))
    bad = (drawn.p_old + 0.1 > 1).to_numpy()
    assert 0 < bad.sum() < 40
    with pytest.raises(ScenarioError) as refused:
        checked(text)
    first = int(np.argmax(bad))
    assert refused.value.path == "transitions.well->*"
    assert f"PSA draw {first} (p_old = " in refused.value.message
    assert f"{bad.sum()} of 40 draws are invalid" in refused.value.message


# ------------------------------------------------------------------------- refusals

@pytest.mark.parametrize("entry, path, phrase", [
    ("u_mael", "tables.u_by_sex.values.male",
     "no parameter named 'u_mael' (did you mean 'u_male'?); defined: u_male; a table's entry "
     "is a number or the name of a parameter"),
    ("other", "tables.u_by_sex.values.male",
     "'other' is a table; a table's entry is a number or the name of a parameter"),
    ("0.8", "tables.u_by_sex.values.male", "must be a number or parameter name, got '0.8'"),
    ("U_male", "tables.u_by_sex.values.male",
     "must be a number or parameter name, got 'U_male' (did you mean 'u_male'?)"),
    (True, "tables.u_by_sex.values.male", "must be a number or parameter name, got true"),
])
def test_an_entry_that_is_no_number_nor_parameter_is_refused(entry, path, phrase):
    other = table("other", attribute="sex", values={"female": 1, "male": 2})
    assert_refused(by_sex(entry, other), path, phrase)


def test_an_entry_in_a_list_is_refused_at_its_index():
    text = cycle_model("p_olt")
    assert_refused(text, "tables.p_by_age.values.male[1]",
                   "no parameter named 'p_olt' (did you mean 'p_old'?)")


def test_a_parameter_value_unfit_for_the_tables_use_is_refused_naming_both():
    assert_refused(by_sex("u_male", u_male=1.2), "parameters.u_male",
                   "1.2 is above 1; a utility weight must be at most 1 (it is used as a utility "
                   "weight at tables.u_by_sex.values.male (the table is used at "
                   "states.well.utility))")


def test_a_capacity_table_takes_numbers_only():
    text = edited(CLOSED, ("capacity = 2", 'capacity = "beds_by_day"')) + "\n" + table(
        "beds_by_day", by="time", starts=[0, 50], values=[2, "more_beds"]) + "\n" + \
        parameters(more_beds=3)
    assert_refused(text, "tables.beds_by_day.values[1]",
                   "names the parameter 'more_beds', but the table is the capacity at "
                   "resources.beds.capacity")


def test_an_arrival_rate_entry_that_names_a_parameter_is_bound_at_its_value():
    named = edited(SERVICE, ("values = [0.3, 0.4]", 'values = ["early_referrals", 0.4]'),
                   ("chair_cost = 80", "chair_cost = 80\nearly_referrals = 0.3"))
    for values, rate_ in ((None, 0.3), ({"early_referrals": 0.25}, 0.25)):
        hazard = bind_capacity(parse_scenario(named), values=values).arrivals.hazard
        typed = bind_capacity(parse_scenario(edited(SERVICE, ("[0.3, 0.4]", f"[{rate_}, 0.4]"))))
        assert hazard == typed.arrivals.hazard


def test_the_command_line_refuses_an_unknown_entry_in_one_line_with_exit_2(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text(by_sex("u_mael"))
    assert main(["run", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: tables.u_by_sex.values.male: no parameter named 'u_mael'")
    assert err.count("\n") == 1 and not (tmp_path / "out").exists()
