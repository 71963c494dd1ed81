"""Reading [economics]: the willingness to pay results are judged at, the range of the
acceptability curve, the currency, the precision a PSA aims for, and the people a decision
reaches (new patients a year, for population EVPI and the budget impact)."""
from __future__ import annotations

import math

from .errors import ScenarioError
from .fields import NON_NEGATIVE, POSITIVE, TOLERANCE, Node, show
from .spec import EconomicsSpec, Scenario

ECONOMICS_KEYS = ("threshold", "thresholds", "currency", "precision", "incidence",
                  "evpi_years", "evpi_discount", "prevalent_patients", "budget_years")
THRESHOLDS_KEYS = ("from", "to", "step")
MAX_THRESHOLDS = 10_000
MAX_YEARS = 1000  # population EVPI and budget impact: calendar years


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
        precision=node.number("precision", None, role=POSITIVE),
        incidence=read_incidence(node),
        evpi_years=node.whole("evpi_years", None, minimum=1, maximum=MAX_YEARS),
        evpi_discount=node.number("evpi_discount", None, role=NON_NEGATIVE),
        prevalent_patients=node.whole("prevalent_patients", 0, minimum=0),
        budget_years=node.whole("budget_years", None, minimum=1, maximum=MAX_YEARS))


def read_incidence(node: Node) -> tuple[float, ...]:
    """New patients a year: one number for every year, or a list with one per year."""
    if isinstance(node.raw("incidence", None), list):
        return node.numbers("incidence", role=NON_NEGATIVE)
    value = node.number("incidence", None, role=NON_NEGATIVE,
                        expect="a number of patients a year, or a list with one per year")
    return () if value is None else (value,)


def check_economics(s: Scenario) -> list[str]:
    """Refuse population settings that cannot be used; warn when the threshold falls
    outside the acceptability curve."""
    check_population_settings(s.economics)
    low, high, _ = s.economics.thresholds
    if low <= s.economics.threshold <= high:
        return []
    return [f"economics.threshold: {show(s.economics.threshold)} is outside the "
            f"acceptability-curve range ({show(low)} to {show(high)}); the curve does "
            "not show it"]


def check_population_settings(e: EconomicsSpec) -> None:
    """Population EVPI needs incidence, evpi_years and evpi_discount together; a budget
    needs patients (incidence or prevalent_patients). Whether a list of incidences covers
    the years is asked where they are used (`check_incidence_covers`): a budget of 3 years
    needs no list as long as the population EVPI's 10."""
    evpi = {"evpi_years": e.evpi_years, "evpi_discount": e.evpi_discount}
    given = [key for key, value in evpi.items() if value is not None]
    if given and (len(given) < 2 or not e.incidence):
        missing = [key for key, value in evpi.items() if value is None]
        missing += [] if e.incidence else ["incidence"]
        raise ScenarioError(f"economics.{given[0]}", "population EVPI also needs "
                            + " and ".join(f"economics.{key}" for key in missing))
    if e.budget_years is not None and not e.incidence and not e.prevalent_patients:
        raise ScenarioError("economics.budget_years", "a budget needs patients: give "
                            "economics.incidence (new patients a year) and/or "
                            "economics.prevalent_patients")


def check_incidence_covers(e: EconomicsSpec, key: str) -> None:
    """A list of incidences has a number for each of the years `key` (evpi_years or
    budget_years) asks for, checked before the analysis that reads them runs."""
    years = getattr(e, key)
    if len(e.incidence) > 1 and years is not None and len(e.incidence) < years:
        raise ScenarioError("economics.incidence", f"lists {len(e.incidence)} years but "
                            f"economics.{key} is {years}; give one number for every year, "
                            f"or at least one for each of the {years} years")
