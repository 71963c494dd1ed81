"""A capacity scenario end to end: the warm-up rule, the outcomes of a service against the
independent model's, common random numbers across strategies, and what `microsim run` and
`microsim validate` print, write and refuse.

References: MSER written out from its definition with numpy (White 1997; White, Cobb &
Spratt 2000, from memory); `microsim.results.outcomes.outcome_values` on the event engine's
own histories (`microsim.results.aggregate.exposure`) for a capacity that never binds; the
closed form of a constant discounted cost, c (1 - e^(-delta T)) / delta with delta =
ln(1 + d) (common practice); pandas reading back the written tables; json.loads.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from microsim.capacity.binding import bind_capacity
from microsim.capacity.outcomes import capacity_cost, window_outcomes
from microsim.capacity.run import BATCHES, REFERENCE, replication, run_service, windows
from microsim.capacity.warm_up import RULE, mser_truncation
from microsim.cli import main
from microsim.engines.event_engine import simulate_events
from microsim.patients.population import patients_for
from microsim.patients.treatment import patient_multipliers
from microsim.results.aggregate import exposure
from microsim.results.outcomes import outcome_values
from microsim.scenario import ScenarioError, parse_scenario
from microsim.simulation import simulate
from support import (arrivals, edited, horizon, outcomes, rate, replications, resource,
                     scenario_text, start, state, strategy)
from test_capacity_engine import RICH, SEED

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "scenarios" / "fenmoor_joint_waiting.toml"


# ---------------------------------------------------------------------------- MSER-5

def mser_by_definition(series, batch=5):
    z = np.asarray(series[:len(series) // batch * batch]).reshape(-1, batch).mean(axis=1)
    m = len(z)
    scores = [np.sum((z[d:] - z[d:].mean()) ** 2) / (m - d) ** 2 for d in range(m // 2 + 1)]
    return batch * int(np.argmin(scores))


def test_mser5_against_its_definition():
    rng = np.random.default_rng(3)
    for _ in range(20):
        settled = rng.normal(5.0, 1.0, 300)
        transient = 5.0 * (1 - np.exp(-np.arange(300) / rng.uniform(5, 40)))
        series = transient + settled - 5.0
        assert mser_truncation(series)[0] == mser_by_definition(series)


def test_mser5_on_a_settled_a_constant_and_a_growing_series():
    step = np.r_[np.full(25, 10.0), np.tile([1.0, 1.2], 50)]
    assert mser_truncation(step) == (25, False)  # the five batches at 10 go
    assert mser_truncation(np.zeros(100)) == (0, False)
    cut, unsettled = mser_truncation(np.arange(100.0))
    assert unsettled and cut == 50  # still climbing at the end of the search


def test_an_estimated_warm_up_names_its_rule_and_stays_in_the_first_half():
    s = parse_scenario(edited(open_service(), ("warm_up = 10", 'warm_up = "estimate"')))
    result = run_service(s, SEED)
    assert result.warm_up.rule == RULE and 0 < result.warm_up.length <= s.time.end / 2
    assert result.windows[0].lo == result.warm_up.length


def test_mser5_needs_a_fine_enough_grid():
    s = parse_scenario(edited(open_service(), ("warm_up = 10", 'warm_up = "estimate"'))
                       + "\n[simulation]\ngrid = 20\n")
    result = run_service(s, SEED, strategies=["two"])
    assert result.warm_up.length == 0 and "at least 10 report-grid intervals" in result.warm_up.note


def test_one_replication_is_cut_into_batches():
    spans = windows(1, 10.0, 110.0)
    assert len(spans) == BATCHES and spans[0].lo == 10.0 and spans[-1].hi == 110.0
    assert all(a.hi == b.lo for a, b in zip(spans, spans[1:]))
    assert [w.lo for w in windows(3, 10.0, 110.0)] == [10.0] * 3


# ----------------------------------------------------------------------- outcomes

@pytest.mark.parametrize("name", [None, "drug"])
def test_outcomes_of_a_capacity_that_never_binds_are_the_independent_models(name):
    text = RICH + "\n" + outcomes(discount_costs=0.01, discount_effects=0.02)
    s = parse_scenario(text)
    cm = bind_capacity(s, name)
    run = replication(s, cm, SEED, 0, 300)
    mine = window_outcomes(run, cm, 0.0, cm.end, 0.0)
    people = patients_for(s, 300, SEED)
    mult = patient_multipliers(cm.model, people, SEED)
    histories = simulate_events(cm.model, mult, people.patient.to_numpy(), SEED)
    theirs = outcome_values(cm.model, exposure(cm.model, histories, mult))
    for measure in ("life_years", "qalys", "qalys_discounted"):
        assert mine[measure] == pytest.approx(theirs[measure].sum(), rel=1e-9), measure
    patient_costs = theirs["costs_discounted"].sum()
    assert mine["patient_costs_discounted"] == pytest.approx(patient_costs, rel=1e-9)
    assert mine["capacity_costs_discounted"] == 0.0  # the beds have no cost of their own here


def test_the_cost_of_capacity_by_period():
    s = parse_scenario(edited(open_service(), ("capacity = 2", 'capacity = "chairs"'))
                       + "\n[tables.chairs]\nby = \"time\"\nstarts = [0, 40]\nvalues = [2, 3]\n"
                       + outcomes(discount_costs=0.05))
    cm = bind_capacity(s)
    delta = math.log(1.05) / 365.25  # 5% a year, continuously per day (the unit)

    def discounted(a, b):
        return (math.exp(-delta * a) - math.exp(-delta * b)) / delta

    undiscounted, costed = capacity_cost(cm, 10.0, 100.0, 10.0)
    assert undiscounted == pytest.approx(7 * (2 * 30 + 3 * 60))
    assert costed == pytest.approx(7 * (2 * discounted(0, 30) + 3 * discounted(30, 90)))


def open_service(**fields) -> str:
    return scenario_text(
        horizon(100, unit="days"), start(treatment=1.0),
        state("treatment", cost=50, utility=0.6), state("waiting", cost=5, utility=0.4),
        state("home", utility=0.9), state("dead", absorbing=True),
        rate("treatment", "home", 1.0), rate("waiting", "dead", 0.05), rate("home", "dead", 0.01),
        arrivals(rate=1.5),
        resource("chairs", capacity=2, state="treatment", waiting=["waiting"], cost=7, **fields),
        replications(count=4, warm_up=10),
        strategy("two", comparator=True), strategy("three", resources={"chairs": {"capacity": 3}}),
        strategy("busier", arrivals={"rate": 1.8}), title="open service")


def test_strategies_share_patients_and_draws_replication_by_replication():
    result = run_service(parse_scenario(open_service()), SEED)
    two, three, busier = (result.strategies[n].runs for n in ("two", "three", "busier"))
    for a, b, c in zip(two, three, busier):
        assert np.array_equal(a.arrival, b.arrival)
        assert np.array_equal(a.patients.patient, b.patients.patient)
        shared = min(len(a.arrival), len(c.arrival))
        assert c.arrival[:shared] == pytest.approx(a.arrival[:shared] * 1.5 / 1.8, rel=1e-12)
    increments = result.increments.set_index(["strategy", "measure"])
    assert increments.loc[("three", "incremental_costs"), "groups"] == 4
    waits = result.queues.set_index(["strategy", "measure"]).loc[:, "mean"]
    assert waits[("three", "mean_wait")] < waits[("two", "mean_wait")] < waits[("busier", "mean_wait")]
    assert set(result.outcomes.strategy) == {"two", "three", "busier", REFERENCE}


def test_a_strategy_that_changes_nothing_has_no_increment():
    s = parse_scenario(edited(open_service(), ("capacity = 3 } }", "capacity = 2 } }")))
    result = run_service(s, SEED, strategies=["two", "three"])
    same = result.increments[result.increments.strategy == "three"]
    assert np.allclose(same["mean"], 0.0) and np.allclose(same["se"], 0.0)


def test_the_engines_of_independent_patients_refuse_a_shared_service():
    s = parse_scenario(open_service())
    with pytest.raises(ScenarioError, match="share capacity"):
        simulate(bind_capacity(s).model, patients_for(s, 10, SEED), SEED)


# -------------------------------------------------------------------- the command line

def written(tmp_path, text: str) -> Path:
    path = tmp_path / "service.toml"
    path.write_text(text)
    return path


def test_run_prints_and_writes_the_service_tables(tmp_path, capsys):
    path = written(tmp_path, open_service(wait_target=1.0))
    assert main(["run", str(path), "--out", str(tmp_path / "out")]) == 0
    out = capsys.readouterr().out
    for words in ("Waiting for chairs", "Service outcomes per day", "Increments against two",
                  "What a cohort model would have missed", "Validation against queueing theory",
                  "over_target", "Caution"):
        assert words in out, words
    folder = tmp_path / "out" / "service" / "latest"
    for name in ("queue_summary", "queue_groups", "queue_over_time", "queue_validation",
                 "service_outcomes", "service_groups", "warm_up", "service_increments",
                 "incremental_analysis", "net_benefit"):
        parquet, csv = pd.read_parquet(folder / f"{name}.parquet"), pd.read_csv(folder / f"{name}.csv")
        assert list(parquet.columns) == list(csv.columns) and len(parquet) == len(csv) > 0, name
    over_time = pd.read_parquet(folder / "queue_over_time.parquet")
    assert set(over_time.strategy) == {"two", "three", "busier"}
    assert over_time.time.max() == 100


def test_run_json_and_validate(tmp_path, capsys):
    path = written(tmp_path, open_service())
    assert main(["run", str(path), "--json", "--out", str(tmp_path / "out")]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["per"] == "day" and data["comparator"] == "two" and "caution" in data
    assert set(data["validation"]) == {"two", "three", "busier"}
    assert main(["validate", str(path), "--strategy", "three", "--out", str(tmp_path / "v")]) == 0
    out = capsys.readouterr().out
    assert "Simulated queues against queueing theory (three)" in out
    assert "No exact counterpart for chairs: patients can leave the queue" in out
    table = pd.read_csv(tmp_path / "v" / "service" / "latest" / "queue_validation.csv")
    assert list(table.quantity) == ["little_gap"]


@pytest.mark.parametrize("argv, start", [
    (["run", "--psa"], "error: --psa: "), (["run", "--engine", "vectorised"], "error: --engine: "),
    (["validate", "--histories"], "error: --histories: "), (["sensitivity"], "error: sensitivity: ")])
def test_options_a_shared_service_cannot_take_are_refused(argv, start, tmp_path, capsys):
    path = written(tmp_path, open_service())
    out = tmp_path / "out"
    assert main([argv[0], str(path), *argv[1:], "--out", str(out)]) == 2
    captured = capsys.readouterr()
    assert captured.err.startswith(start) and len(captured.err.splitlines()) == 1, captured.err
    assert not out.exists()


def test_the_cohort_commands_say_they_ignore_the_queue(tmp_path, capsys):
    path = written(tmp_path, open_service())
    assert main(["trace", str(path), "--out", str(tmp_path / "out")]) == 0
    assert "the cohort ignores [arrivals] and [[resources]]" in capsys.readouterr().out
    assert main(["population", str(DEMO), "--out", str(tmp_path / "out")]) == 0  # no size
    assert "2000 patients" in capsys.readouterr().out  # an open population: the default


def test_the_demo_runs_for_other_seeds_and_sizes(tmp_path, capsys):
    for argv in (["--seed", "2", "--patients", "60"], ["--seed", "987654321", "--patients", "3"]):
        assert main(["run", str(DEMO), *argv, "--out", str(tmp_path / "out")]) == 0, argv
        out = capsys.readouterr().out
        assert "Waiting for treatment places" in out and "best:" in out
    assert "arrivals stopped at the limit on patients" in out
