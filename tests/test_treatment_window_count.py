"""Who a fixed treatment window (a strategy's `start`/`stop`) treats: the patients alive
when it opens, not everyone it was meant for.

Reference: with one way out of `well`, death at a constant rate m (a rate model) or with a
constant probability p per cycle (a cycle model), the share alive at time t is exp(-m t)
or (1 - p)^(t / cycle) (closed form, common practice). The treated count must be a binomial
draw from that share (|z| < 4), and equal, patient for patient, the patients whose written
history shows a treatment start, who are exactly those with no death before the window.
"""
import numpy as np
import pandas as pd
import pytest

from microsim.binding import bind
from microsim.decision.strategies import treated_count
from microsim.patients.population import draw_population
from microsim.scenario import parse_scenario
from microsim.simulation import simulate
from support import (Z, horizon, nested, population, probability, rate, scenario_text, start,
                     state, strategy)

OPENS = 6.0
N = 2000

RATE_MODEL = [horizon(12), start(well=1), state("well", cost=100, utility=0.9),
              state("dead", absorbing=True), rate("well", "dead", 0.15, name="die")]
CYCLE_MODEL = [horizon(12), start(well=1), state("well", cost=100, utility=0.9),
               state("dead", absorbing=True), probability("well", "dead", 0.1, name="die"),
               probability("well", "well", "remainder")]


@pytest.mark.parametrize("blocks, alive_share", [
    (RATE_MODEL, np.exp(-0.15 * OPENS)), (CYCLE_MODEL, 0.9 ** OPENS)],
    ids=["rate", "cycle"])
def test_a_window_treats_only_the_patients_alive_when_it_opens(blocks, alive_share, tmp_path):
    text = scenario_text(*blocks, population(N), strategy("usual", comparator=True),
                         strategy("late", start=OPENS, stop=10.0,
                                  changes=[nested(transition="die", hazard_ratio=0.5),
                                           nested(cost=1000)]))
    scenario = parse_scenario(text)
    model = bind(scenario, strategy="late")
    patients = draw_population(scenario.population, 3, np.arange(N))
    sim = simulate(model, patients, 3, histories=tmp_path / "h.parquet")
    count = treated_count(sim)
    se = np.sqrt(N * alive_share * (1 - alive_share))
    assert abs(count - N * alive_share) < Z * se, (count, N * alive_share)
    records = pd.read_parquet(tmp_path / "h.parquet")
    died = records[records.to_state == "dead"].groupby("patient").time.min()
    started = records.groupby("patient").treatment_start.first().dropna()
    assert (started == OPENS).all() and (records.dropna(subset="treatment_start")
                                         .treatment_stop == 10.0).all()
    alive_then = set(range(N)) - set(died[died <= OPENS].index)
    assert set(started.index) == alive_then
    assert count == len(alive_then)
