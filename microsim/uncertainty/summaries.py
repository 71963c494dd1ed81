"""PSA summaries from the draws table (draw, strategy, cost, effect): thin wrappers over
`microsim.decision.economics`, checking the user's choices (comparator) on the way in."""
from __future__ import annotations

import pandas as pd

from ..decision import economics
from ..scenario.errors import ScenarioError


def summarise_draws(results: pd.DataFrame, thresholds, comparator: str) -> dict[str, pd.DataFrame]:
    """Acceptability curves, per-person EVPI and the cost-effectiveness plane (vs comparator)."""
    strategies = [str(s) for s in pd.unique(results["strategy"])]
    if comparator not in strategies:
        raise ScenarioError("comparator", f"{comparator!r} is not a strategy; choose one of "
                                          f"{', '.join(strategies)}")
    return {
        "acceptability": economics.acceptability_curve(results, thresholds),
        "evpi": economics.per_person_evpi(results, thresholds),
        "plane": economics.cost_effectiveness_plane(results, comparator),
    }
