"""The benchmark's own models read as scenarios (a renamed key would otherwise surface only
when `microsim benchmark` runs, which no test does: it measures time)."""
from microsim import benchmark
from microsim.scenario import parse_scenario


def test_the_benchmark_models_are_valid_scenarios():
    parse_scenario(benchmark.BENCH_MODEL)
    for age in ("", benchmark.AGE_ON_WEIBULL):
        parse_scenario(benchmark.RATE_BENCH_MODEL.replace("AGE_ON_WEIBULL", age))
    assert benchmark.demo_scenario().strategies  # the installed demo, with its strategies
