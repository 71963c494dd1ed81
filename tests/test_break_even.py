"""Threshold (break-even) analysis against hand solves of the constant-hazard model of
test_tornado, whose net benefit is closed-form (L(r) = (1 - exp(-r H)) / r, common
practice). The drug's price enters linearly:

    incremental NMB(c) = T (L_d - L_u) - C_well (L_d - L_u) - c L_d,  L_d = L(R hr), L_u = L(R)

so the break-even price is c* = (T - C_well)(L_d - L_u) / L_d, solved by hand. The hazard
ratio enters through L_d; its root is found by scipy.optimize.brentq on the closed form
(reference library)."""
import math

import numpy as np
import pytest
from scipy.optimize import brentq

from microsim.cli import main
from microsim.scenario import parse_scenario
from microsim.uncertainty.break_even import brackets, break_even
from microsim.uncertainty.one_way import EXACT, SIMULATED, Settings
from support import Z, after, event, section
from test_tornado import C_WELL, HR, R, THRESHOLD, closed_form, life, model_text

WIDE_PRICE = dict(value=500.0, low=0.0, high=40000.0)
WIDE_HR = dict(value=0.6, low=0.4, high=1.2)


def price_root(hr: float = HR["value"]) -> float:
    gain = life(R * hr) - life(R)
    return (THRESHOLD - C_WELL) * gain / life(R * hr)


def scenario(*blocks, memory=None, **ranges):
    """The model with the price's range (wide by default) and hr's range, as given."""
    text = model_text(*blocks, memory=memory, c_drug=ranges.get("c_drug", WIDE_PRICE))
    return parse_scenario(text.replace(
        "hr = { value = 0.6, low = 0.4, high = 0.8 }",
        "hr = " + "{ " + ", ".join(f"{k} = {v!r}" for k, v in ranges.get("hr", HR).items()) + " }"))


def test_the_break_even_price_is_the_hand_solve():
    table, curve = break_even(Settings(scenario(), patients=20), "c_drug", 5)
    row = table.iloc[0]
    assert len(table) == 1 and row.crossing == 1 and row.basis == EXACT
    assert row.value == pytest.approx(price_root(), rel=1e-9)
    assert math.isnan(row.se) and abs(row.result_at_value) < 1e-6
    assert row.slope == pytest.approx(-life(R * HR["value"]), rel=1e-9)  # d NMB / dc = -L_d
    assert "positive below, negative above" in row.finding
    assert "higher net monetary benefit below it" in row.finding
    # the scan: 0, 10000, ..., 40000 with the base 500 added, each the closed form
    assert curve.value.tolist() == [0.0, 500.0, 10000.0, 20000.0, 30000.0, 40000.0]
    np.testing.assert_allclose(curve.result, [closed_form("incremental_nmb", "drug",
                                                          HR["value"], c) for c in curve.value])


def test_the_break_even_hazard_ratio_follows_the_closed_form():
    table, _ = break_even(Settings(scenario(hr=WIDE_HR), patients=20), "hr", 9)
    expected = brentq(lambda hr: closed_form("incremental_nmb", "drug", hr, 500.0), 0.4, 1.2,
                      xtol=1e-14)
    assert table.value.item() == pytest.approx(expected, rel=1e-8)
    assert table.slope.item() < 0


def test_no_crossing_within_the_range_is_said_plainly():
    table, _ = break_even(Settings(scenario(c_drug=dict(value=500.0, low=0.0, high=900.0)),
                                   patients=20), "c_drug", 3)
    row = table.iloc[0]
    assert row.crossing == 0 and math.isnan(row.value) and math.isnan(row.se)
    assert row.finding.startswith("no crossing from 0 to 900: the measure is positive")


def test_every_sign_change_of_the_scan_is_a_crossing():
    # hand-made scans: two sign changes, and an exact zero on a scan point
    xs = np.arange(5.0)
    assert brackets(xs, np.array([1.0, -1.0, -2.0, 3.0, 4.0])) == [(0, 1), (2, 3)]
    assert brackets(xs, np.array([1.0, 0.0, -1.0, -1.0, -1.0])) == [(1, 1)]
    assert brackets(xs, np.array([1.0, 2.0, 3.0, 4.0, 5.0])) == []


@pytest.mark.parametrize("parameter, ranges, root", [
    ("c_drug", {}, price_root),
    ("hr", {"hr": WIDE_HR}, lambda: brentq(
        lambda hr: closed_form("incremental_nmb", "drug", hr, 500.0), 0.4, 1.2, xtol=1e-14)),
])
def test_a_simulated_root_agrees_within_its_delta_method_error(parameter, ranges, root):
    # the rate-0 fall's window changes nothing (the closed form holds) but leaves the model
    # without an exact counterpart, so every setting is simulated on the same patients
    simulated = scenario(event("fall", ["well"], rate=0.0),
                         memory=[after("fall", within=2.0, multiplier=2.0)], **ranges)
    table, curve = break_even(Settings(simulated, patients=3000, seed=11), parameter, 5)
    row = table.iloc[0]
    assert row.basis == SIMULATED and (curve.se > 0).all() and row.se > 0
    assert abs(row.value - root()) < Z * row.se, (row.value, root(), row.se)
    assert row.lower < row.value < row.upper


def test_the_function_is_deterministic_on_its_patients():
    simulated = scenario(event("fall", ["well"], rate=0.0),
                         memory=[after("fall", within=2.0, multiplier=2.0)], hr=WIDE_HR)
    first = break_even(Settings(simulated, patients=500, seed=2), "hr", 5)[0]
    again = break_even(Settings(simulated, patients=500, seed=2), "hr", 5)[0]
    assert first.value.item() == again.value.item()


def test_the_key_and_the_option_name_the_parameters(tmp_path, capsys):
    import pandas as pd
    path = tmp_path / "drug.toml"
    path.write_text(model_text(section("sensitivity", break_even=["c_drug"], grid=3),
                               c_drug=WIDE_PRICE))
    out = tmp_path / "out"
    assert main(["sensitivity", str(path), "--patients", "5", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "Break-even values" in printed and "crosses 0 at c_drug" in printed
    written = pd.read_parquet(out / "drug" / "latest" / "break_even.parquet")
    assert written.value.item() == pytest.approx(price_root(), rel=1e-9)
    assert main(["sensitivity", str(path), "--patients", "5", "--break-even", "hr,c_drug",
                 "--out", str(out)]) == 0
    written = pd.read_parquet(out / "drug" / "latest" / "break_even.parquet")
    assert written.parameter.tolist() == ["hr", "c_drug"]
    capsys.readouterr()
    assert main(["sensitivity", str(path), "--break-even", "c_drugs",
                 "--out", str(tmp_path / "o2")]) == 2
    error = capsys.readouterr().err
    assert error.startswith("error: --break-even: no parameter named 'c_drugs' (did you mean "
                            "'c_drug'?)")
