"""Reading scenario files: TOML in, frozen specs out, bad input refused with a field path."""
from .errors import ScenarioError
from .reader import parse_scenario, read_scenario
from .spec import Scenario

__all__ = ["ScenarioError", "Scenario", "parse_scenario", "read_scenario"]
