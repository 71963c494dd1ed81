"""Reading [parameters] (base values, PSA distributions, sensitivity ranges) and [tables]."""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

from .errors import ScenarioError
from .fields import (ANY, IDENTIFIER, NON_NEGATIVE, POSITIVE, Node, describe, did_you_mean,
                     listing, show, undefined, unquoted_number)
from .formulas import FormulaError, derived_order, parse_formula, quoted, settings
from .spec import REMAINDER, DistributionSpec, ParameterSpec, Ref, TableSpec

DISTRIBUTION_KEYS = {
    "beta": ("alpha", "beta"), "gamma": ("shape", "scale"), "lognormal": ("meanlog", "sdlog"),
    "normal": ("mean", "sd"), "uniform": ("lower", "upper"), "fixed": ()}
POSITIVE_DISTRIBUTION_KEYS = {"alpha", "beta", "shape", "scale", "sdlog", "sd"}
PARAMETER_KEYS = ("value", "distribution", "low", "high", "formula")
COMPUTED = ("a derived parameter is computed from its formula (in every PSA draw and "
            "sensitivity setting too)")
TABLE_KEYS = ("by", "starts", "values", "attribute")
TABLE_AXES = ("age", "time", "time_in_state")
ENTRY = "number or parameter name"  # what a table's entry may be


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
        if isinstance(raw, dict) and "formula" in raw:
            parameters[name] = read_formula(node, name)
            continue
        if not isinstance(raw, dict):
            parameters[name] = ParameterSpec(name, node.number(
                name, expect="a number, a table {value = ..., distribution = {...}} or a "
                             'formula {formula = "rate * hazard_ratio"}'))
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
    return with_formulas(parameters)


def read_formula(node: Node, name: str) -> ParameterSpec:
    """A derived parameter: `name = { formula = "<formula>" }`."""
    entry = node.node(name, None)
    for key in entry.data:
        if key != "formula":
            entry.fail(key, f"{COMPUTED}; it takes no {key} (give "
                            f"{'distributions' if key == 'distribution' else key} to the "
                            "parameters it is computed from)" if key in PARAMETER_KEYS
                       else f"unknown key{did_you_mean(key, ['formula'])}; a derived "
                            "parameter has only a formula")
    text = entry.text("formula", nonempty=True)
    try:
        formula = parse_formula(text)
    except FormulaError as error:
        entry.fail("formula", f"column {error.column} of {quoted(text)}: {error.message}")
    return ParameterSpec(name, math.nan, formula=formula)


def with_formulas(parameters: dict[str, ParameterSpec]) -> dict[str, ParameterSpec]:
    """Every name a formula reads is a parameter, no derived parameters form a cycle, and
    each has a finite value at the base case and every one-way setting; the base values of
    derived parameters filled in."""
    for p in parameters.values():
        for used in p.formula.names if p.formula else ():
            if used.name not in parameters:
                raise ScenarioError(
                    f"parameters.{p.name}.formula",
                    f"column {used.column} of {p.formula.text!r}: unknown name "
                    f"{used.name!r}{did_you_mean(used.name, parameters)}; a formula reads "
                    f"parameters ({listing(parameters)})")
    if not derived_order(parameters):
        return parameters
    (_, base), *_ = settings(parameters)  # refuses one without a value at any setting
    return {name: ParameterSpec(name, base[name], formula=p.formula) if p.formula else p
            for name, p in parameters.items()}


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


def read_tables(node: Node | None, parameters: Mapping[str, ParameterSpec]
                ) -> dict[str, TableSpec]:
    tables: dict[str, TableSpec] = {}
    entries = Entries(parameters, tuple(node.data) if node else ())
    for name in (node.data if node else ()):
        name_key(node, name, "table")
        entry = node.node(name, TABLE_KEYS)
        attribute = entry.name("attribute", None)
        if attribute is not None and not entry.has("by"):
            tables[name] = read_level_table(entry, name, attribute, entries)
            continue
        by = entry.text("by", choices=TABLE_AXES)
        starts = entry.numbers("starts", role=NON_NEGATIVE, increasing=True)
        if attribute is None:
            values = band_values(entry, "values", len(starts), entries)
            tables[name] = TableSpec(name, by, starts, values)
            continue
        levels, rows = level_entries(entry, attribute, f"a list of {ENTRY}s, one per start")
        values = tuple(v for level in levels
                       for v in band_values(rows, level, len(starts), entries))
        tables[name] = TableSpec(name, by, starts, values, attribute, levels)
    return tables


@dataclass(frozen=True)
class Entries:
    """What a table's entry may name: a parameter of [parameters] (derived ones too), never
    a table."""
    parameters: Mapping[str, ParameterSpec]
    tables: tuple[str, ...]

    def read(self, node: Node, key: str, value: Any) -> Ref:
        """The entry `value` at `key` of `node`: any number, or a parameter's name (what
        either may be, a rate, a probability, a utility, ..., depends on where the table
        is used: checks.check_reference)."""
        if not isinstance(value, str):
            return node.number_in(value, key, f"a {ENTRY}")
        if value in self.tables:
            node.fail(key, f"{value!r} is a table; a table's entry is a number or the name of "
                           "a parameter, not another table")
        if not IDENTIFIER.fullmatch(value):
            node.fail(key, f"must be a {ENTRY}, got {describe(value)}"
                           f"{unquoted_number(value) or did_you_mean(value, self.parameters)}")
        if value not in self.parameters:
            node.fail(key, undefined("parameter", value, list(self.parameters))
                           + "; a table's entry is a number or the name of a parameter")
        return value


def band_values(node: Node, key: str, n_starts: int, entries: Entries) -> tuple[Ref, ...]:
    """One entry per start (`Entries.read`)."""
    values = node.raw(key, expect=f"a list of {ENTRY}s, one per start")
    if not isinstance(values, list) or not values:
        node.fail(key, f"must be a list of {ENTRY}s, one per start, got "
                       f"{'an empty list' if values == [] else describe(values)}")
    if len(values) != n_starts:
        node.fail(key, f"has {len(values)} values but starts has {n_starts}; "
                       "give one value per start")
    return tuple(entries.read(node, f"{key}[{i}]", v) for i, v in enumerate(values))


def level_entries(entry: Node, attribute: str, each: str) -> tuple[tuple[str, ...], Node]:
    """The levels and the node of `values = { level = ..., ... }` of a table by
    `attribute`'s levels (which levels the attribute has is checked in the second pass)."""
    if entry.has("starts") and not entry.has("by"):
        entry.fail("starts", "needs by; give by and starts for a table by age, time or time "
                             "in state and level, or leave both out for a table by level alone")
    if not isinstance(entry.raw("values", expect=f"a table of {each} per level of {attribute!r}"),
                      dict):
        entry.fail("values", f"must be a table with {each} per level of {attribute!r} "
                             "(values = { level = ..., ... }), got "
                             f"{describe(entry.data['values'])}; or leave out attribute for "
                             "a table that does not vary by level")
    values = entry.node("values", None)
    if not values.data:
        entry.fail("values", f"gives no level; give {each} per level of {attribute!r}")
    return tuple(values.data), values


def read_level_table(entry: Node, name: str, attribute: str, entries: Entries) -> TableSpec:
    """A table by level alone: one number (or parameter) per level, constant in time."""
    levels, rows = level_entries(entry, attribute, f"a {ENTRY}")
    values = tuple(entries.read(rows, level, rows.data[level]) for level in levels)
    return TableSpec(name, None, (0.0,), values, attribute, levels)
