"""PSA summaries from the draws table (draw, strategy, cost, effect): the spread of each
outcome over the draws, and thin wrappers over `microsim.decision.economics`, checking the
user's choices (comparator) on the way in."""
from __future__ import annotations

import numpy as np
import pandas as pd

from ..decision import economics
from ..scenario.errors import ScenarioError


def summarise_draws(results: pd.DataFrame, thresholds, comparator: str,
                    inner_noise: bool = True) -> dict[str, pd.DataFrame]:
    """Acceptability curves (also with the inner patients' noise taken out, where the
    draws have inner noise and carry their within-draw variances; the exact basis has none,
    `inner_noise` False, and gets no such columns), per-person EVPI and the
    cost-effectiveness plane (vs comparator)."""
    strategies = [str(s) for s in pd.unique(results["strategy"])]
    if comparator not in strategies:
        raise ScenarioError("comparator", f"{comparator!r} is not a strategy; choose one of "
                                          f"{', '.join(strategies)}")
    acceptability = economics.acceptability_curve(results, thresholds)
    if inner_noise and set(economics.WITHIN) <= set(results.columns):
        without = economics.acceptability_without_noise(results, thresholds)
        acceptability = acceptability.merge(
            without.rename(columns={"probability_best": "probability_best_noise_removed"}),
            on=["threshold", "strategy"], how="left", sort=False)
    return {
        "acceptability": acceptability,
        "evpi": economics.per_person_evpi(results, thresholds),
        "plane": economics.cost_effectiveness_plane(results, comparator),
    }


MEASURES = ("costs_discounted", "qalys_discounted", "life_years")  # columns of the draws


def draw_intervals(results: pd.DataFrame) -> pd.DataFrame:
    """Per strategy and measure: the mean of the per-draw means and the 95% interval of the
    draws (their 2.5th and 97.5th percentiles, common practice for a PSA). The inner
    patients' Monte-Carlo noise widens it a little; the variance split says how much."""
    rows = []
    for name, group in results.groupby("strategy", sort=False):
        for measure in MEASURES:
            values = group[measure].to_numpy(dtype=float)
            lower, upper = np.percentile(values, [2.5, 97.5])
            rows.append((name, measure, float(values.mean()), float(lower), float(upper),
                         len(values)))
    return pd.DataFrame(rows, columns=["strategy", "measure", "mean", "lower", "upper", "draws"])
