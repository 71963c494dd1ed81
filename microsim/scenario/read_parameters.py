"""Reading [parameters] (base values, PSA distributions, sensitivity ranges) and [tables]."""
from __future__ import annotations

import math

from .fields import ANY, IDENTIFIER, NON_NEGATIVE, POSITIVE, Node, show
from .spec import REMAINDER, DistributionSpec, ParameterSpec, TableSpec

DISTRIBUTION_KEYS = {
    "beta": ("alpha", "beta"), "gamma": ("shape", "scale"), "lognormal": ("meanlog", "sdlog"),
    "normal": ("mean", "sd"), "uniform": ("lower", "upper"), "fixed": ()}
POSITIVE_DISTRIBUTION_KEYS = {"alpha", "beta", "shape", "scale", "sdlog", "sd"}
PARAMETER_KEYS = ("value", "distribution", "low", "high")
TABLE_KEYS = ("by", "starts", "values")
TABLE_AXES = ("age", "time", "time_in_state")


def support(distribution: DistributionSpec, value: float) -> tuple[float, float]:
    """The interval a distribution draws from (open ends; `fixed` draws only `value`)."""
    family, p = distribution.family, distribution.params
    if family == "beta":
        return 0.0, 1.0
    if family in ("gamma", "lognormal"):
        return 0.0, math.inf
    if family == "uniform":
        return p["lower"], p["upper"]
    if family == "fixed":
        return value, value
    return -math.inf, math.inf


def name_key(node: Node, name: str, what: str) -> None:
    """Parameter and table names are identifiers and may not be "remainder"."""
    if not IDENTIFIER.fullmatch(name) or name == REMAINDER:
        node.fail(name, f"{name!r} is not a valid {what} name; use lowercase letters, digits "
                        'and underscores, starting with a letter (and not "remainder")')


def read_parameters(node: Node | None) -> dict[str, ParameterSpec]:
    parameters: dict[str, ParameterSpec] = {}
    for name, raw in (node.data.items() if node else ()):
        name_key(node, name, "parameter")
        if not isinstance(raw, dict):
            parameters[name] = ParameterSpec(name, node.number(
                name, expect="a number or a table {value = ..., distribution = {...}}"))
            continue
        entry = node.node(name, PARAMETER_KEYS)
        value = entry.number("value")
        distribution = read_distribution(entry.node("distribution", None, default=None))
        low, high = entry.number("low", None), entry.number("high", None)
        if (low is None) != (high is None):
            entry.fail("high" if high is None else "low", "give both low and high, or neither")
        if low is not None and not low <= value <= high:
            entry.fail("value", f"{show(value)} is outside low..high ({show(low)} to "
                                f"{show(high)}); the base value must lie in the range")
        if distribution is not None:
            lowest, highest = support(distribution, value)
            if not lowest <= value <= highest:
                entry.fail("value", f"{show(value)} is outside the values its "
                                    f"{distribution.family} distribution can take "
                                    f"({show(lowest)} to {show(highest)})")
        parameters[name] = ParameterSpec(name, value, distribution, low, high)
    return parameters


def read_distribution(node: Node | None) -> DistributionSpec | None:
    if node is None:
        return None
    family = node.text("family", choices=tuple(DISTRIBUTION_KEYS))
    keys = DISTRIBUTION_KEYS[family]
    node.only(("family",) + keys, f" for a {family} distribution")
    params = {k: node.number(k, role=POSITIVE if k in POSITIVE_DISTRIBUTION_KEYS else ANY)
              for k in keys}
    if family == "uniform":
        node.above("upper", params["upper"], "lower", params["lower"])
    return DistributionSpec(family, params)


def read_tables(node: Node | None) -> dict[str, TableSpec]:
    tables: dict[str, TableSpec] = {}
    for name in (node.data if node else ()):
        name_key(node, name, "table")
        entry = node.node(name, TABLE_KEYS)
        by = entry.text("by", choices=TABLE_AXES)
        starts = entry.numbers("starts", role=NON_NEGATIVE, increasing=True)
        values = entry.numbers("values", role=NON_NEGATIVE)
        if len(values) != len(starts):
            entry.fail("values", f"has {len(values)} values but starts has {len(starts)}; "
                                 "give one value per start")
        tables[name] = TableSpec(name, by, starts, values)
    return tables
