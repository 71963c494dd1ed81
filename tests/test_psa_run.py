"""The PSA as `microsim run --psa` runs it: the seed given keys everything, and a model
without strategies gets its own outcomes per draw.

References outside the project: the closed forms of an exponential sojourn cut at the
horizon H, E[min(T, H)] = (1 - e^{-rH}) / r and E[min(T, H)^2] = 2 (1 - e^{-rH}(1 + rH)) / r^2
(from memory; elementary integrals of the exponential density), for each draw's mean cost,
QALYs and life years; numpy (mean, percentile) for the interval table; DESIGN.md's rules
that a run is a function of its seed and that a refused run leaves nothing behind.
"""
from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

from microsim.cli import main
from microsim.decision.strategies import AS_WRITTEN
from microsim.scenario import ScenarioError, parse_scenario
from microsim.uncertainty import psa
from microsim.uncertainty.psa import parameter_uncertainty
from support import Z, horizon, parameters, rate, scenario_text, section, start, state

DRAWS, PATIENTS, HORIZON, UTILITY, SEED = 8, 400, 20.0, 0.5, 5
MODEL = scenario_text(
    horizon(HORIZON, unit="days"), start(ill=1.0),
    state("ill", cost="c_day", utility=UTILITY), state("dead", absorbing=True),
    rate("ill", "dead", "r_death"),
    parameters(c_day=dict(value=100, distribution=dict(family="gamma", shape=100, scale=1)),
               r_death=dict(value=0.1, distribution=dict(family="gamma", shape=25, scale=0.004))),
    section("uncertainty", draws=DRAWS, patients_per_draw=PATIENTS), section("simulation", seed=SEED),
    title="psa without strategies")
SCENARIO = parse_scenario(MODEL)


def run(tmp_path, seed=None, name="psa"):
    return parameter_uncertainty(SCENARIO, tmp_path / name, seed=seed, progress=False)


def sojourn_moments(r: float) -> tuple[float, float]:
    """Mean and variance of min(T, H) for T exponential with rate r (closed form)."""
    survive = np.exp(-r * HORIZON)
    mean = (1 - survive) / r
    second = 2 * (1 - survive * (1 + r * HORIZON)) / r**2
    return mean, second - mean**2


def test_a_psa_without_strategies_gives_the_model_as_written_per_draw(tmp_path):
    result = run(tmp_path)
    rows = result.results.merge(result.draws, on="draw")
    assert len(rows) == DRAWS and set(rows.strategy) == {AS_WRITTEN}
    assert (rows.patients == PATIENTS).all()
    for row in rows.itertuples():
        mean, variance = sojourn_moments(row.r_death)  # in days
        se = np.sqrt(variance / PATIENTS)  # time alive; cost and QALYs scale it
        years = 1 / 365.25  # life years and QALYs are counted in (Julian) years
        assert abs(row.life_years - years * mean) < Z * years * se, row
        assert abs(row.costs_discounted - row.c_day * mean) < Z * row.c_day * se, row
        assert abs(row.qalys_discounted - UTILITY * years * mean) < Z * UTILITY * years * se, row


def test_its_outcomes_are_the_mean_and_95_percent_interval_of_the_draws(tmp_path):
    result = run(tmp_path)
    table = result.outcomes.set_index("measure")
    for measure in ("costs_discounted", "qalys_discounted", "life_years"):
        values = result.results[measure].to_numpy()
        assert table.loc[measure, "mean"] == pytest.approx(np.mean(values), rel=1e-12)
        low, high = np.percentile(values, [2.5, 97.5])
        assert table.loc[measure, ["lower", "upper"]].tolist() == pytest.approx([low, high])
        assert table.loc[measure, "draws"] == DRAWS


def test_comparisons_of_strategies_are_not_computed_but_explained(tmp_path):
    result = run(tmp_path)
    assert (result.acceptability, result.evpi, result.plane, result.variance) == (None,) * 4
    assert "need at least two" in result.note


def test_run_psa_on_a_scenario_without_strategies_writes_and_says_so(tmp_path, capsys):
    path = tmp_path / "plain.toml"
    path.write_text(MODEL)
    out = tmp_path / "out"
    assert main(["run", str(path), "--patients", "50", "--psa", "--draws", "3",
                 "--patients-per-draw", "40", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "need at least two" in printed
    folder = out / "plain" / "latest"
    assert (folder / "psa_outcomes.parquet").exists() and (folder / "psa_draws.parquet").exists()
    assert not (folder / "acceptability.parquet").exists()
    summary = json.loads((folder / "summary.json").read_text())
    assert "need at least two" in summary["psa"]["note"]
    assert len(summary["psa"]["outcomes"]) == 3  # costs, QALYs, life years


# ------------------------------------------------------------------------------ the seed

def test_the_seed_given_keys_the_draws_and_the_inner_patients(tmp_path):
    first, second = run(tmp_path, seed=1, name="one"), run(tmp_path, seed=2, name="two")
    assert not first.draws.equals(second.draws)
    assert not first.results.equals(second.results)
    # the scenario's own seed, given or not, is the same run
    pd.testing.assert_frame_equal(run(tmp_path, seed=SEED, name="given").results,
                                  run(tmp_path, name="default").results)
    # draw 0's parameter values under the other seed: only the inner patients differ
    def seeded(seed):
        return replace(SCENARIO, simulation=replace(SCENARIO.simulation, seed=seed))

    values = {k: float(v) for k, v in first.draws.iloc[0].drop("draw").items()}
    mine = first.results[first.results.draw == 0].drop(columns="draw").reset_index(drop=True)
    pd.testing.assert_frame_equal(psa.evaluate_draw(seeded(1), PATIENTS, 0, values), mine)
    assert not psa.evaluate_draw(seeded(2), PATIENTS, 0, values).equals(mine)


def test_a_psa_with_another_seed_gets_its_own_folder_and_leaves_the_first_as_it_was(tmp_path):
    first = run(tmp_path, seed=1)
    root = tmp_path / "psa"
    (folder,) = list(root.iterdir())
    before = {p: p.read_bytes() for p in folder.rglob("*") if p.is_file()}
    assert json.loads((folder / "psa.json").read_text())["fingerprint"]["seed"] == 1
    run(tmp_path, seed=2)
    assert len(list(root.iterdir())) == 2
    assert {p: p.read_bytes() for p in folder.rglob("*") if p.is_file()} == before
    pd.testing.assert_frame_equal(run(tmp_path, seed=1).results, first.results)  # reused


def test_a_run_that_reuses_finished_draws_says_so(tmp_path, capsys):
    path = tmp_path / "plain.toml"
    path.write_text(MODEL)
    out = tmp_path / "out"
    options = ["--patients", "20", "--psa", "--patients-per-draw", "10", "--out", str(out)]
    assert main(["run", str(path), "--draws", "2", *options]) == 0
    assert "reused" not in capsys.readouterr().out
    (folder,) = list((out / "plain" / "psa").iterdir())
    assert main(["run", str(path), "--draws", "2", *options]) == 0
    assert (f"PSA: all 2 draws reused from {folder}, finished by an earlier run with the "
            "same scenario, seed, settings and parameter draws.") in capsys.readouterr().out
    summary = json.loads((out / "plain" / "latest" / "summary.json").read_text())
    assert summary["psa"]["reused_draws"] == 2
    # one draw left over from an interrupted run: it is read back, the other evaluated
    (folder / "draws" / "draw-000001.parquet").unlink()
    assert main(["run", str(path), "--draws", "2", *options]) == 0
    assert "PSA: 1 of 2 draws reused from" in capsys.readouterr().out


# ------------------------------------------------------------- nothing half-written

@pytest.mark.parametrize("failure", [ScenarioError("parameters.r_death", "refused (test)"),
                                     KeyboardInterrupt()], ids=["refused", "interrupted"])
def test_a_psa_stopped_before_its_first_draw_leaves_nothing(failure, tmp_path, monkeypatch):
    def fail(*args, **kwargs):
        raise failure

    monkeypatch.setattr(psa, "evaluate_draw", fail)
    with pytest.raises(type(failure)):
        parameter_uncertainty(SCENARIO, tmp_path / "out" / "plain" / "psa", progress=False)
    assert list(tmp_path.iterdir()) == []


def test_a_psa_with_nothing_uncertain_is_refused_before_any_work(tmp_path):
    certain = parse_scenario(MODEL.replace(
        'c_day = { value = 100, distribution = { family = "gamma", shape = 100, scale = 1 } }',
        "c_day = 100").replace(
        'r_death = { value = 0.1, distribution = { family = "gamma", shape = 25, scale = 0.004 } }',
        "r_death = 0.1"))
    with pytest.raises(ScenarioError) as refused:
        parameter_uncertainty(certain, tmp_path / "psa", progress=False)
    assert refused.value.path == "parameters" and "would be the base case" in refused.value.message
    assert not (tmp_path / "psa").exists()


def test_the_split_says_why_when_there_is_nothing_to_split():
    assert "one patient per draw" in psa.split_note(1.0, float("nan"), 1, None)
    assert "nothing to split" in psa.split_note(0.0, 0.0, 100, None)
    # the note's figure is the noise variance of a draw's mean: within / n, and says so
    assert "over 100 patients: 0.05" in psa.split_note(0.01, 5.0, 100, None)


def test_a_value_of_information_interval_stops_at_0():
    from microsim.report.tables import nonnegative_interval, normal_interval
    assert nonnegative_interval(10.0, 80.0).split("(")[1].startswith("0 ")
    assert normal_interval(10.0, 80.0).split("(")[1].startswith("-")
