"""One-way sensitivity of a scenario (the tornado's numbers) for a chosen strategy and
measure, against the closed form of life expectancy under a constant hazard.

Reference (closed form, common practice): with a constant death rate r and horizon H, the
expected time alive is L(r) = (1 - exp(-r H)) / r; undiscounted QALYs are utility x L and
costs are (cost per year) x L; net monetary benefit is threshold x QALYs - costs.
"""
import math

import numpy as np
import pytest

from microsim.decision.measures import MEASURES
from microsim.cli import main
from microsim.scenario import ScenarioError, parse_scenario
from microsim.uncertainty.one_way import EXACT, SIMULATED, Estimate, one_way, tornado
from microsim.scenario.spec import ParameterSpec
from support import (Z, after, event, horizon, nested, parameters, rate, scenario_text, start,
                     state, strategy)

R, H, C_WELL, THRESHOLD = 0.1, 10.0, 1000.0, 20000.0
HR = dict(value=0.6, low=0.4, high=0.8)
C_DRUG = dict(value=500.0, low=300.0, high=900.0)
STRATEGIES = [strategy("usual", comparator=True),
              strategy("drug", changes=[nested(transition="well->dead", hazard_ratio="hr"),
                                        nested(cost="c_drug")])]


def life(r: float) -> float:
    return (1.0 - math.exp(-r * H)) / r


def closed_form(measure: str, name: str, hr: float, c_drug: float) -> float:
    values = {"usual": {"qalys": life(R), "costs": C_WELL * life(R)},
              "drug": {"qalys": life(R * hr), "costs": (C_WELL + c_drug) * life(R * hr)}}
    for own in values.values():
        own["nmb"] = THRESHOLD * own["qalys"] - own["costs"]
    kind = measure.removeprefix("incremental_")
    own = values[name][kind]
    return own - values["usual"][kind] if measure != kind else own


def model_text(*events: str, memory=None, c_drug=C_DRUG) -> str:
    return scenario_text(
        horizon(H), start(well=1.0), state("well", utility=1, cost=C_WELL),
        state("dead", absorbing=True), rate("well", "dead", R, memory=memory),
        *events, parameters(hr=HR, c_drug=c_drug), *STRATEGIES)


EXACT_MODEL = parse_scenario(model_text())


@pytest.mark.parametrize("measure", MEASURES)
def test_each_measure_follows_the_closed_form(measure):
    table = tornado(EXACT_MODEL, patients=20, measure=measure)
    names = ["drug"] if measure.startswith("incremental_") else ["usual", "drug"]
    assert table.strategy.tolist() == [n for n in names for _ in range(2)]
    assert (table.measure == measure).all()
    if measure.startswith("incremental_"):
        assert (table.compared_with == "usual").all()
    else:
        assert table.compared_with.isna().all()
    assert (table.basis == EXACT).all() and table[["se_low", "se_high", "se_base",
                                                   "se_swing"]].isna().all().all()
    for row in table.itertuples():
        setting = {"hr": HR["value"], "c_drug": C_DRUG["value"]}
        base = closed_form(measure, row.strategy, **setting)
        low = closed_form(measure, row.strategy, **{**setting, row.parameter: row.low})
        high = closed_form(measure, row.strategy, **{**setting, row.parameter: row.high})
        np.testing.assert_allclose([row.result_base, row.result_low, row.result_high],
                                   [base, low, high], rtol=1e-7, atol=1e-7)
    for _, rows in table.groupby("strategy"):
        assert rows.swing.is_monotonic_decreasing  # widest first within each strategy


def test_one_strategy_can_be_chosen():
    table = tornado(EXACT_MODEL, patients=20, strategy="usual", measure="costs")
    assert set(table.strategy) == {"usual"}
    # the drug's parameters change nothing for usual care: zero swing (closed form)
    assert (table.swing == 0).all()


@pytest.mark.parametrize("strategy_name, measure, field, phrase", [
    (None, "icer_please", "--measure", "choose one of: " + ", ".join(MEASURES)),
    ("usual", "incremental_nmb", "--strategy", "is the comparator"),
    ("nobody", None, "--strategy", "no strategy 'nobody'; choose one of: drug"),
])
def test_a_bad_choice_is_refused_in_one_line(strategy_name, measure, field, phrase):
    with pytest.raises(ScenarioError) as refused:
        tornado(EXACT_MODEL, patients=20, strategy=strategy_name, measure=measure)
    assert refused.value.path == field and phrase in refused.value.message
    assert "\n" not in str(refused.value)


def test_without_strategies_only_the_model_as_written_is_varied():
    alone = parse_scenario(scenario_text(
        horizon(H), start(well=1.0), state("well", utility=1, cost="c_well"),
        state("dead", absorbing=True), rate("well", "dead", R),
        parameters(c_well=dict(value=C_WELL, low=500.0, high=1500.0))))
    table = tornado(alone, patients=10)  # default: NMB of the model as written
    assert table.strategy.tolist() == ["as written"] and table.measure.tolist() == ["nmb"]
    np.testing.assert_allclose([table.result_low[0], table.result_high[0]],
                               [THRESHOLD * life(R) - c * life(R) for c in (500.0, 1500.0)])
    for choice, field in [(dict(measure="incremental_qalys"), "--measure"),
                          (dict(strategy="drug"), "--strategy")]:
        with pytest.raises(ScenarioError) as refused:
            tornado(alone, patients=10, **choice)
        assert refused.value.path == field


def test_a_simulated_setting_carries_its_monte_carlo_error():
    # A fall at rate 0 never happens, so its two-day window changes nothing and the closed
    # form still holds; but a window in a rate model has no exact counterpart, so every
    # setting is simulated and must agree with the closed form within Z standard errors.
    scenario = parse_scenario(model_text(
        event("fall", ["well"], rate=0.0), memory=[after("fall", within=2.0, multiplier=2.0)],
        c_drug=C_DRUG["value"]))
    table = tornado(scenario, patients=3000, seed=5, measure="incremental_qalys")
    assert (table.basis == SIMULATED).all() and table.parameter.tolist() == ["hr"]
    row = table.iloc[0]
    for result, se, hr in [(row.result_low, row.se_low, HR["low"]),
                           (row.result_high, row.se_high, HR["high"]),
                           (row.result_base, row.se_base, HR["value"])]:
        assert se > 0
        expected = closed_form("incremental_qalys", "drug", hr, C_DRUG["value"])
        assert abs(result - expected) < Z * se, (result, expected, se)
    # the swing has its own, paired standard error (both settings on the same patients and
    # draws) and is within Z of the closed forms' swing; pairing makes it smaller here than
    # the independent sqrt(se_low^2 + se_high^2), since both settings move together
    swing = abs(closed_form("incremental_qalys", "drug", HR["high"], C_DRUG["value"])
                - closed_form("incremental_qalys", "drug", HR["low"], C_DRUG["value"]))
    assert 0 < row.se_swing < math.hypot(row.se_low, row.se_high)
    assert abs(row.swing - swing) < Z * row.se_swing, (row.swing, swing, row.se_swing)


def test_one_way_carries_an_estimates_standard_error():
    parameters_ = {"a": ParameterSpec("a", 1.0, low=0.0, high=2.0)}
    table = one_way(lambda values: values["a"], parameters_,
                    lambda a: Estimate(3.0 * a, 0.1 * a))  # invented linear model, by hand
    row = table.iloc[0]
    assert (row.result_low, row.result_high, row.swing) == (0.0, 6.0, 6.0)
    assert (row.se_low, row.se_high, row.se_base) == pytest.approx((0.0, 0.2, 0.1))


def test_the_command_records_its_choice_and_refuses_an_unknown_measure(tmp_path, capsys):
    import pandas as pd
    path = tmp_path / "drug.toml"
    path.write_text(model_text())
    out = tmp_path / "out"
    assert main(["sensitivity", str(path), "--patients", "10", "--strategy", "drug",
                 "--measure", "incremental_qalys", "--out", str(out)]) == 0
    written = pd.read_parquet(out / "drug" / "latest" / "one_way.parquet")
    assert set(written.strategy) == {"drug"} and set(written.measure) == {"incremental_qalys"}
    assert set(written.compared_with) == {"usual"}
    capsys.readouterr()
    assert main(["sensitivity", str(path), "--measure", "qaly", "--out", str(tmp_path / "o2")]) == 2
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: --measure: no measure 'qaly'")
    assert not (tmp_path / "o2").exists()
