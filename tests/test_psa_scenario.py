"""PSA of a scenario end to end: the same table whatever runs it, and after an interruption.

References: the randomness contract of DESIGN.md ("a patient's history does not change
with ... worker count"), checked by exact equality of the tables (pandas.testing as the
reference comparison); the folder layout of microsim.uncertainty.folder for what an
interrupted run leaves behind. Strategies are built as specs (StrategySpec) on a parsed
base model; everything the workers receive is module level, so it pickles.
"""
from __future__ import annotations

import sys
from dataclasses import replace
from pathlib import Path

import pandas as pd
import pytest

from microsim.uncertainty import psa
from microsim.uncertainty.psa import parameter_uncertainty
from microsim.scenario import parse_scenario
from microsim.scenario.spec import ChangeSpec, StrategySpec, UncertaintySpec
from microsim.uncertainty import parameter_draws
from microsim.uncertainty import folder
from support import (attribute, effect, horizon, parameters, population, rate, scenario_text,
                     section, start, state)

DRAWS, PATIENTS = 6, 100

MODEL = scenario_text(
    horizon(30, unit="days"), start(ward=1.0),
    state("ward", cost="c_ward", utility=0.7), state("home", absorbing=True),
    state("dead", absorbing=True),
    rate("ward", "home", "r_home", effects=[effect("frail", 0.7)]), rate("ward", "dead", "r_death"),
    parameters(
        c_ward=dict(value=600, distribution=dict(family="gamma", shape=100, scale=6)),
        r_home=dict(value=0.2, distribution=dict(family="gamma", shape=200, scale=0.001)),
        r_death=dict(value=0.004, distribution=dict(family="beta", alpha=4, beta=996)),
        hr_rehab=dict(value=1.3, distribution=dict(family="lognormal", meanlog=0.26, sdlog=0.1))),
    population(100, attribute("frail", "yesno", prevalence=0.3)),
    section("simulation", seed=99),
    title="psa test")


def small_scenario():
    s = parse_scenario(MODEL)
    rehab = StrategySpec("rehab", "early rehabilitation", uptake=0.8, changes=(
        ChangeSpec(risk="ward->home", hazard_ratio="hr_rehab"), ChangeSpec(cost=90.0)))
    return replace(s, strategies=(StrategySpec("usual", "usual care", comparator=True), rehab),
                   uncertainty=UncertaintySpec(draws=DRAWS, patients=PATIENTS))


SCENARIO = small_scenario()


def psa_tables(result) -> dict[str, pd.DataFrame]:
    return {"draws": result.draws, "results": result.results, "acceptability": result.acceptability,
            "evpi": result.evpi, "plane": result.plane, "variance": result.variance}


def assert_same(a, b):
    for name, table in psa_tables(a).items():
        pd.testing.assert_frame_equal(table, psa_tables(b)[name], obj=name)


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    return parameter_uncertainty(SCENARIO, tmp_path_factory.mktemp("reference"), workers=1, progress=False)


def test_the_reference_run_is_complete(reference):
    assert sorted(reference.results.draw.unique()) == list(range(DRAWS))
    assert (reference.results.patients == PATIENTS).all()
    assert set(reference.results.strategy) == {"usual", "rehab"}
    assert reference.results.costs_discounted.nunique() == 2 * DRAWS  # the draws really differ


def test_two_worker_processes_give_the_same_tables(reference, tmp_path):
    assert_same(parameter_uncertainty(SCENARIO, tmp_path, workers=2, progress=False), reference)


def test_dask_gives_the_same_tables(reference, tmp_path):
    pytest.importorskip("dask.distributed")
    assert_same(parameter_uncertainty(SCENARIO, tmp_path, workers=2, backend="dask", progress=False), reference)


# ------------------------------------------------------------------ interrupt and resume

ORIGINAL_EVALUATE = psa.evaluate_draw
MARKER: Path | None = None  # set by the test; its existence means "already interrupted"
EVALUATED: list[int] = []


def interrupting_evaluate(scenario, n, draw, values):
    """Like psa.evaluate_draw, but Ctrl-C arrives during draw 3 the first time."""
    if draw == 3 and not MARKER.exists():
        MARKER.touch()
        raise KeyboardInterrupt
    EVALUATED.append(draw)
    return ORIGINAL_EVALUATE(scenario, n, draw, values)


def test_an_interrupted_run_resumes_to_the_same_tables(reference, tmp_path, monkeypatch):
    monkeypatch.setattr(sys.modules[__name__], "MARKER", tmp_path / "interrupted")
    monkeypatch.setattr(psa, "evaluate_draw", interrupting_evaluate)
    EVALUATED.clear()
    root = tmp_path / "run"
    with pytest.raises(KeyboardInterrupt):
        parameter_uncertainty(SCENARIO, root, workers=1, progress=False)
    (run_dir,) = root.iterdir()  # the PSA's own folder, named by its settings
    # finished draws stay on disk, the interrupted one and the total do not
    kept = sorted(p.name for p in (run_dir / folder.DRAWS).iterdir())
    assert kept == [folder.draw_path(run_dir, d).name for d in (0, 1, 2)]
    assert not (run_dir / folder.RESULTS).exists()
    EVALUATED.clear()
    resumed = parameter_uncertainty(SCENARIO, root, workers=1, progress=False)
    assert EVALUATED == [3, 4, 5]  # only the draws not yet on disk
    assert_same(resumed, reference)


# -------------------------------------------------------------------- parameter draws

def test_a_draw_does_not_depend_on_how_many_draws_are_asked_for(reference):
    seed = SCENARIO.simulation.seed
    six = parameter_draws(SCENARIO.parameters, seed, 6)
    twelve = parameter_draws(SCENARIO.parameters, seed, 12)
    pd.testing.assert_frame_equal(six, twelve.iloc[:6])
    pd.testing.assert_frame_equal(reference.draws, six)
    # and the results of draw 2 are those of evaluating draw 2 on its own
    values = {k: float(v) for k, v in twelve.iloc[2].drop("draw").items()}
    alone = psa.evaluate_draw(SCENARIO, PATIENTS, 2, values)
    mine = reference.results[reference.results.draw == 2].drop(columns="draw").reset_index(drop=True)
    pd.testing.assert_frame_equal(mine, alone)
