"""Two-way sensitivity over a grid of two parameters' ranges, against the closed form of
life expectancy under a constant hazard (see test_tornado: L(r) = (1 - exp(-r H)) / r,
common practice), and against the one-way analysis on the grid's lines through the base
case (the same settings must give the same numbers)."""
import numpy as np
import pandas as pd
import pytest

from microsim.cli import main
from microsim.scenario import parse_scenario
from microsim.uncertainty.deterministic import sensitivity_tables
from microsim.uncertainty.one_way import EXACT, SIMULATED, Settings, tornado
from microsim.uncertainty.two_way import two_way
from support import Z, after, assert_refused, event, section
from test_tornado import C_DRUG, EXACT_MODEL, HR, closed_form, model_text


def test_every_cell_follows_the_closed_form_and_the_grid_holds_the_base():
    table = two_way(Settings(EXACT_MODEL, patients=20), "hr", "c_drug", 5)
    # 5 values from low to high; c_drug's base 500 is not among 300, 450, ..., 900: added
    assert sorted(set(table.first_value)) == pytest.approx([0.4, 0.5, 0.6, 0.7, 0.8])
    assert sorted(set(table.second_value)) == [300.0, 450.0, 500.0, 600.0, 750.0, 900.0]
    assert len(table) == 5 * 6 and (table.basis == EXACT).all() and table.se.isna().all()
    expected = [closed_form("incremental_nmb", "drug", hr, c)
                for hr, c in zip(table.first_value, table.second_value)]
    np.testing.assert_allclose(table.result, expected, rtol=1e-7)
    on_base = (np.isclose(table.first_value, HR["value"]) | (table.second_value == 500.0))
    assert (table.at_base == on_base).all()


@pytest.mark.parametrize("measure", ["incremental_qalys", "incremental_nmb"])
def test_the_lines_through_the_base_case_are_the_one_way_analysis(measure):
    # two analyses on their own evaluations: the grid's lines through the base case must
    # give the one-way table's numbers
    grid = two_way(Settings(EXACT_MODEL, patients=20, measure=measure), "hr", "c_drug", 3)
    one_way = tornado(EXACT_MODEL, patients=20, measure=measure).set_index("parameter")
    at = grid.set_index(["first_value", "second_value"]).result
    base_hr, base_c = HR["value"], C_DRUG["value"]
    pairs = [((HR["low"], base_c), one_way.loc["hr", "result_low"]),
             ((HR["high"], base_c), one_way.loc["hr", "result_high"]),
             ((base_hr, C_DRUG["low"]), one_way.loc["c_drug", "result_low"]),
             ((base_hr, C_DRUG["high"]), one_way.loc["c_drug", "result_high"]),
             ((base_hr, base_c), one_way.loc["hr", "result_base"])]
    for setting, expected in pairs:
        assert at[setting] == pytest.approx(expected, rel=1e-12), setting


def test_without_an_exact_counterpart_each_cell_carries_its_monte_carlo_error():
    # a rate-0 fall never happens, so its window changes nothing and the closed form holds,
    # but a window in a rate model has no exact counterpart: every cell is simulated
    scenario = parse_scenario(model_text(
        event("fall", ["well"], rate=0.0), memory=[after("fall", within=2.0, multiplier=2.0)]))
    table = two_way(Settings(scenario, patients=2000, seed=3, measure="incremental_qalys"),
                    "hr", "c_drug", 3)
    assert (table.basis == SIMULATED).all() and (table.se > 0).all()
    for row in table.itertuples():
        expected = closed_form("incremental_qalys", "drug", row.first_value, row.second_value)
        assert abs(row.result - expected) < Z * row.se, row


def test_the_scenario_keys_choose_the_pair_and_the_grid():
    scenario = parse_scenario(model_text(section("sensitivity", two_way=["c_drug", "hr"],
                                                 grid=3)))
    tables = sensitivity_tables(scenario, patients=10)
    assert set(tables) == {"one_way", "two_way"}
    grid = tables["two_way"]
    assert set(grid.first_parameter) == {"c_drug"} and set(grid.second_parameter) == {"hr"}
    assert len(grid) == 4 * 3  # c_drug: 300, 500 (base, added), 600, 900; hr: 0.4, 0.6, 0.8


@pytest.mark.parametrize("keys, path, phrase", [
    (dict(two_way=["hr"]), "sensitivity.two_way", "varies exactly two"),
    (dict(two_way=["hr", "cost"]), "sensitivity.two_way[1]", "no parameter named 'cost'"),
    (dict(two_way=["hr", "hr"]), "sensitivity.two_way[1]", "appears twice"),
    (dict(two_way=["hr", "c_well"]), "sensitivity.two_way[1]", "has no low..high range"),
    (dict(grid=2), "sensitivity.grid", "at least 3"),
    (dict(grid=7.5), "sensitivity.grid", "whole number"),
    (dict(twoway=["hr", "c_drug"]), "sensitivity.twoway", "did you mean 'two_way'"),
])
def test_bad_keys_are_refused_in_one_line(keys, path, phrase):
    text = model_text(section("sensitivity", **keys)).replace(
        "c_drug = {", 'c_well = 3\nc_drug = {')
    assert_refused(text, path, phrase)


def test_a_point_range_is_refused():
    text = model_text(section("sensitivity", two_way=["hr", "c_drug"]),
                      c_drug=dict(value=500.0, low=500.0, high=500.0))
    assert_refused(text, "sensitivity.two_way[1]", "nothing to vary")


def test_a_grid_corner_whose_row_sums_above_1_is_refused():
    # a cycle model: at each one-way setting the row stays below 1 (0.5 + 0.3, 0.3 + 0.5),
    # at the corner (0.5, 0.5) it reaches 1.0 plus the 0.1 of the third move
    text = f'''title = "t"
provenance = "invented for a test"
[time]
unit = "years"
horizon = 5
[start]
shares = {{ a = 1.0 }}
[[states]]
name = "a"
[[states]]
name = "b"
absorbing = true
[[states]]
name = "c"
absorbing = true
[[states]]
name = "d"
absorbing = true
[[transitions]]
from = "a"
to = "b"
probability = "p"
[[transitions]]
from = "a"
to = "c"
probability = "q"
[[transitions]]
from = "a"
to = "d"
probability = 0.1
[[transitions]]
from = "a"
to = "a"
probability = "remainder"
[parameters]
p = {{ value = 0.3, low = 0.2, high = 0.5 }}
q = {{ value = 0.3, low = 0.2, high = 0.5 }}
[sensitivity]
two_way = ["p", "q"]
'''
    assert_refused(text, "sensitivity.two_way", "(the two-way grid), above 1")


def test_the_option_overrides_the_key_and_a_bad_value_names_the_option(tmp_path, capsys):
    path = tmp_path / "drug.toml"
    path.write_text(model_text(section("sensitivity", two_way=["hr", "c_drug"])))
    out = tmp_path / "out"
    assert main(["sensitivity", str(path), "--patients", "5", "--two-way", "c_drug,hr",
                 "--grid", "3", "--out", str(out)]) == 0
    written = pd.read_parquet(out / "drug" / "latest" / "two_way.parquet")
    assert set(written.first_parameter) == {"c_drug"} and len(written) == 4 * 3
    capsys.readouterr()
    assert main(["sensitivity", str(path), "--two-way", "hr,nothing",
                 "--out", str(tmp_path / "o2")]) == 2
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: --two-way: no parameter named 'nothing'")
    assert not (tmp_path / "o2").exists()


def test_a_row_above_1_at_the_base_case_is_refused_at_its_row_not_at_the_grid():
    from support import horizon, parameters, probability, scenario_text, start, state
    text = scenario_text(
        horizon(5), start(well=1.0), state("well"), state("dead", absorbing=True),
        state("ill"), probability("well", "dead", "p_a"), probability("well", "ill", "p_b"),
        probability("well", "well", "remainder"), probability("ill", "dead", 0.1),
        probability("ill", "ill", "remainder"),
        parameters(p_a=dict(value=0.6, low=0.5, high=0.7), p_b=dict(value=0.5, low=0.4, high=0.6)),
        section("sensitivity", two_way=["p_a", "p_b"]))
    assert_refused(text, "transitions.well->*", "1.1")
