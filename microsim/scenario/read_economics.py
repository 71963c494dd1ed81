"""Reading [economics]: the willingness to pay results are judged at, the range of the
acceptability curve, the currency and the precision a PSA aims for."""
from __future__ import annotations

import math

from .fields import NON_NEGATIVE, POSITIVE, TOLERANCE, Node, show
from .spec import EconomicsSpec, Scenario

ECONOMICS_KEYS = ("threshold", "thresholds", "currency", "precision")
THRESHOLDS_KEYS = ("from", "to", "step")
MAX_THRESHOLDS = 10_000


def read_economics(node: Node | None) -> EconomicsSpec:
    defaults = EconomicsSpec()
    if node is None:
        return defaults
    thresholds = defaults.thresholds
    curve = node.node("thresholds", THRESHOLDS_KEYS, default=None)
    if curve is not None:
        low = curve.number("from", defaults.thresholds[0], role=NON_NEGATIVE)
        high = curve.number("to", defaults.thresholds[1], role=NON_NEGATIVE)
        step = curve.number("step", defaults.thresholds[2], role=POSITIVE)
        curve.above("to", high, "from", low)
        points = math.floor((high - low) / step + TOLERANCE) + 1
        if points > MAX_THRESHOLDS:
            curve.fail("step", f"{show(step)} gives {points} thresholds from {show(low)} to "
                               f"{show(high)}; at most {MAX_THRESHOLDS} are supported (use a "
                               "larger step)")
        thresholds = (low, high, step)
    return EconomicsSpec(
        threshold=node.number("threshold", defaults.threshold, role=NON_NEGATIVE),
        thresholds=thresholds,
        currency=node.text("currency", defaults.currency, nonempty=True),
        precision=node.number("precision", None, role=POSITIVE))


def check_economics(s: Scenario) -> list[str]:
    """Warn when the threshold falls outside the acceptability curve."""
    low, high, _ = s.economics.thresholds
    if low <= s.economics.threshold <= high:
        return []
    return [f"economics.threshold: {show(s.economics.threshold)} is outside the "
            f"acceptability-curve range ({show(low)} to {show(high)}); the curve does "
            "not show it"]
