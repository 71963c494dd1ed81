"""Who a strategy's printed summary says spends time on its treatments: with a sequence
(`then`), each treatment's patients and the patients on any of them.

Reference: the patients' states at the cycle points, read by hand (pandas/numpy masks): a
patient is on a treatment when some cycle point finds it in one of that treatment's copies
(`<state>+<name>`), including the horizon's point, which the trapezoidal rule weighs by
half a cycle (common practice).
"""
from __future__ import annotations

import json

import numpy as np

from microsim.binding import bind
from microsim.cli import main
from microsim.patients.population import scenario_patients
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from microsim.workflow import run_population
from support import horizon, nested, outcomes, probability, scenario_text, start, state, strategy

SEQUENCE = scenario_text(
    horizon(6, cycle=1), start(mild=0.6, severe=0.4), state("mild", cost=100.0),
    state("severe", cost=500.0), state("dead", absorbing=True),
    probability("mild", "severe", 0.3), probability("mild", "mild", "remainder"),
    probability("severe", "dead", 0.2), probability("severe", "severe", "remainder"),
    outcomes(correction="trapezoidal"),
    strategy("usual", comparator=True),
    strategy("sequence", start_on="mild", stop_on="severe", changes=[nested(cost=50.0)],
             then=[nested(name="second", changes=[nested(cost=80.0)])]),
    strategy("single", start_on="severe", changes=[nested(cost=80.0)]))


def test_a_sequence_counts_each_treatment_and_any_of_them():
    scenario = parse_scenario(SEQUENCE)
    run = run_population(scenario, 400, 5)
    model = bind(scenario, strategy="sequence")
    sim = simulate(model, scenario_patients(scenario, 5, np.arange(400)), 5)
    names = np.array(model.states)[sim.states]  # every patient's state at each cycle point
    first = (np.char.endswith(names, "+sequence")).any(axis=1)
    second = (np.char.endswith(names, "+second")).any(axis=1)
    assert 0 < first.sum() < 400 and 0 < second.sum() < 400
    assert (first & ~second).any() and (first & second).any()
    assert run.treated_by["sequence"] == {"sequence": first.sum(), "second": second.sum()}
    assert run.treated["sequence"] == (first | second).sum()
    assert "single" not in run.treated_by  # one treatment: nothing to split


def test_the_summary_says_what_it_counts(tmp_path, capsys):
    path = tmp_path / "sequence.toml"
    path.write_text(SEQUENCE)
    out = tmp_path / "out"
    assert main(["run", str(path), "--patients", "200", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    summary = json.loads((out / "sequence" / "latest" / "summary.json").read_text())
    each = summary["treated_by_treatment"]["sequence"]
    assert list(each) == ["sequence", "second"]
    count = summary["treated"]["sequence"]
    assert (f"sequence: {count} of 200 patients ({count / 200:.1%}) spend time on one of its "
            f"treatments (sequence: {each['sequence']}, second: {each['second']})") in printed
    assert f"single: {summary['treated']['single']} of 200 patients" in printed
    assert "spend time on its treatment\n" in printed
