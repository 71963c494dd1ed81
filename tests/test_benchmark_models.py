"""The benchmark's own models read as scenarios (a renamed key would otherwise surface only
when `microsim benchmark` runs, which no test does: it measures time)."""
from pathlib import Path

from microsim import benchmark
from microsim.scenario import parse_scenario, read_scenario

SCENARIOS = Path(__file__).resolve().parent.parent / "scenarios"  # installed as microsim.examples


def test_the_benchmark_models_are_valid_scenarios():
    parse_scenario(benchmark.BENCH_MODEL)
    for age in ("", benchmark.AGE_ON_WEIBULL):
        parse_scenario(benchmark.RATE_BENCH_MODEL.replace("AGE_ON_WEIBULL", age))
    assert parse_scenario(benchmark.MARKER_RATE_MODEL).strategies
    assert read_scenario(SCENARIOS / benchmark.DEMO).strategies  # the demo it measures
