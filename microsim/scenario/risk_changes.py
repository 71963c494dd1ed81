"""A strategy's change of one risk, as the hazard ratio it amounts to.

A change gives the hazard ratio itself, or the risk on treatment: a constant `rate`, whose
hazard ratio is rate / base rate, or a per-cycle `probability` p, whose hazard ratio is
ln(1 - p) / ln(1 - p_base), so that the rate scale's 1 - (1 - p_base)^HR gives p back
(proportional hazards within a cycle, p = 1 - exp(-h cycle); common practice: Fleurence &
Hollenbeak 2007, "Rates and probabilities in economic modelling", PharmacoEconomics; from
memory). Binding and the row bounds both ask `hazard_ratio`, with numbers or with (D,)
arrays of parameter sets, so engines and the cohort read one hazard ratio, recomputed from
each PSA draw's and sensitivity setting's own values.
"""
from __future__ import annotations

from typing import Any, Callable

import numpy as np

from .spec import ChangeSpec, Ref

TREATED_KEYS = ("hazard_ratio", "rate", "probability")


def treated_key(change: ChangeSpec) -> str:
    """The key a change of a risk gives it by: hazard_ratio, rate or probability."""
    return next(key for key in TREATED_KEYS if getattr(change, key) is not None)


def treated_ref(change: ChangeSpec) -> Ref:
    """The number or parameter name the change gives under its key."""
    return getattr(change, treated_key(change))


def hazard_ratio(change: ChangeSpec, value: Callable[[Ref], Any], base: Ref | None) -> Any:
    """The hazard ratio of `change` on a risk whose base constant rate or per-cycle
    probability is `base` (read only for a treated rate or probability); `value` gives a
    reference's number, or its numbers in every parameter set."""
    key = treated_key(change)
    treated = value(getattr(change, key))
    if key == "rate":
        return treated / value(base)
    if key == "probability":
        return np.log1p(-treated) / np.log1p(-value(base))
    return treated
