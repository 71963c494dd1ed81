"""microsim: individual-level health microsimulation with a Markov backbone.

The public API is imported lazily, so `import microsim` stays light:

    from microsim import read_scenario, bind, cohort_trace, simulate, compare, run_main
"""

__version__ = "0.1.0"

CAUTION = ("Caution: microsim supports analysis by qualified people. Its results are not "
           "clinical advice; check them against local guidance and review them before they "
           "inform decisions about patients or funding.")

_API = {
    "read_scenario": "microsim.scenario", "parse_scenario": "microsim.scenario",
    "ScenarioError": "microsim.scenario", "bind": "microsim.binding",
    "cohort_trace": "microsim.cohort.summaries", "expected_outcomes": "microsim.cohort.summaries",
    "chain_summary": "microsim.cohort.summaries", "analytic": "microsim.cohort.analytic",
    "draw_population": "microsim.patients.population", "describe_population": "microsim.patients.population",
    "simulate": "microsim.simulation", "compare": "microsim.results.comparison",
    "run_strategies": "microsim.decision.strategies", "decide": "microsim.decision.strategies",
    "parameter_uncertainty": "microsim.uncertainty.psa", "run_main": "microsim.workflow",
}

__all__ = ["CAUTION", "__version__", *_API]


def __getattr__(name: str):
    if name in _API:
        import importlib
        return getattr(importlib.import_module(_API[name]), name)
    raise AttributeError(f"module 'microsim' has no attribute {name!r}")
