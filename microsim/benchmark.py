"""Speed and variance figures measured as ratios within one run (machines here are shared
and noisy, so absolute timings mean little; ratios taken seconds apart mean more).

- engine ratio: the SimPy event engine's transitions per second over bare SimPy timeouts
  per second in the same process (target: at least 0.3);
- cycle engine: patient-cycles per second over bare timeouts per second;
- common random numbers: the standard error of incremental QALYs with shared draws over
  the same with independent draws (added by the strategy comparison).
"""
from __future__ import annotations

import time

import numpy as np
import simpy

from microsim.binding import bind
from microsim.scenario import parse_scenario
from microsim.simulate import cohort_patients, simulate

BENCH_MODEL = """
title = "benchmark: a progressive condition with competing risks"
provenance = "All numbers are invented for benchmarking."
[time]
unit = "years"
horizon = 200
[start]
shares = { well = 1.0 }
[[states]]
name = "well"
[[states]]
name = "ill"
[[states]]
name = "dead"
absorbing = true
[[transitions]]
from = "well"
to = "ill"
rate = 0.3
[[transitions]]
from = "ill"
to = "well"
rate = 0.5
[[transitions]]
from = "well"
to = "dead"
rate = 0.01
[[transitions]]
from = "ill"
to = "dead"
rate = 0.05
"""


def bare_timeouts_per_second(n: int) -> float:
    """Timeouts per second of one SimPy process doing nothing else."""
    env = simpy.Environment()

    def ticker():
        for _ in range(n):
            yield env.timeout(1.0)

    env.process(ticker())
    started = time.perf_counter()
    env.run()
    return n / (time.perf_counter() - started)


def engine_transitions_per_second(scenario_text: str, patients: int) -> tuple[float, int]:
    model = bind(parse_scenario(scenario_text))
    started = time.perf_counter()
    sim = simulate(model, cohort_patients(patients), seed=1, batch_size=patients)
    return sim.transitions / (time.perf_counter() - started), sim.transitions


def engine_ratio(patients: int = 4000, repeats: int = 3) -> dict:
    """Median over interleaved repeats of engine rate / bare rate, measured side by side."""
    ratios, rates, bares = [], [], []
    for _ in range(repeats):
        bare = bare_timeouts_per_second(200_000)
        rate, transitions = engine_transitions_per_second(BENCH_MODEL, patients)
        ratios.append(rate / bare)
        rates.append(rate)
        bares.append(bare)
    return {"ratio": float(np.median(ratios)), "engine_per_second": float(np.median(rates)),
            "bare_timeouts_per_second": float(np.median(bares)), "transitions": transitions}


def main() -> int:
    print("microsim benchmark (ratios measured in one run)")
    e = engine_ratio()
    print(f"SimPy event engine: {e['engine_per_second']:,.0f} transitions/s "
          f"({e['transitions']:,} transitions); bare SimPy: {e['bare_timeouts_per_second']:,.0f} "
          f"timeouts/s; ratio {e['ratio']:.2f} (target >= 0.30)")
    return 0
