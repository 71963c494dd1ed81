"""Reading [sensitivity]: the pair of parameters of a two-way sensitivity analysis, the
parameters whose break-even value is sought, and how many values of each are tried."""
from __future__ import annotations

import numpy as np

from .errors import ScenarioError
from .fields import TOLERANCE, Node, Reference, show, undefined
from .formulas import derived_order, derived_refusal, explain, with_derived
from .rows import attribute_ranges, row_bounds, too_high
from .spec import ParameterSpec, Scenario, SensitivitySpec

SENSITIVITY_KEYS = ("two_way", "break_even", "grid")
MAX_GRID = 101


def read_sensitivity(node: Node | None) -> SensitivitySpec:
    defaults = SensitivitySpec()
    if node is None:
        return defaults
    pair = node.names("two_way") if node.has("two_way") else ()
    if pair and len(pair) != 2:
        node.fail("two_way", f"names {len(pair)} parameter{'' if len(pair) == 1 else 's'}; "
                             "a two-way analysis varies "
                             "exactly two (two_way = [\"p_a\", \"p_b\"])")
    return SensitivitySpec(
        two_way=pair,
        break_even=node.names("break_even") if node.has("break_even") else (),
        grid=node.whole("grid", defaults.grid, minimum=3, maximum=MAX_GRID))


def grid_values(p: ParameterSpec, points: int) -> np.ndarray:
    """`points` evenly spaced values from low to high, and the base value among them (so
    that the grid's lines through the base case are the one-way analysis)."""
    values = np.linspace(p.low, p.high, points)
    near = np.abs(values - p.value) <= TOLERANCE * (p.high - p.low)
    if near.any():  # 0.6000000000000001 from linspace is the base value 0.6
        values[np.argmax(near)] = p.value
        return values
    return np.sort(np.append(values, p.value))


def check_sensitivity(s: Scenario, references: tuple[Reference, ...] | list = ()) -> None:
    """Every parameter named is defined and has a low..high range wider than a point; on
    every grid, derived parameters suit their uses (`references`), and under the separate
    rule no row can sum above 1 anywhere on the two-way grid (the one-way settings are
    checked with the rows)."""
    spec = s.sensitivity
    for key, names in (("two_way", spec.two_way), ("break_even", spec.break_even)):
        for i, name in enumerate(names):
            path = f"sensitivity.{key}[{i}]"
            if name not in s.parameters:
                raise ScenarioError(path, undefined("parameter", name, list(s.parameters)))
            p = s.parameters[name]
            if p.formula is not None:
                raise derived_refusal(path, s.parameters, name, "vary")
            if p.low is None or p.high is None:
                raise ScenarioError(path, f"{name!r} has no low..high range; give "
                                    f"parameters.{name} a low and a high")
            if p.low == p.high:
                raise ScenarioError(path, f"{name!r} has low = high = {show(p.low)}: there "
                                    f"is nothing to vary; widen parameters.{name}")
    base = {name: np.asarray(p.value) for name, p in s.parameters.items()}
    for i, name in enumerate(spec.break_even):
        grid = grid_values(s.parameters[name], spec.grid)
        check_derived_grid(s, {**base, name: grid}, references, f"sensitivity.break_even[{i}]",
                           lambda k: f" with parameters.{name} = {show(grid[k])} (the "
                                     "break-even scan)")
    if spec.two_way:
        check_grid_rows(s, *(s.parameters[name] for name in spec.two_way), references)


def check_derived_grid(s: Scenario, values: dict, references, path: str, setting) -> None:
    """Refuse a grid on which a derived parameter has no value or one its uses cannot take;
    `setting(k)` names grid point k."""
    values = with_derived(s.parameters, values)
    for name in derived_order(s.parameters):
        x = np.broadcast_to(values[name], np.shape(values[name]) or (1,))
        for use in [None] + [r for r in references if r.name == name]:
            bad = ~np.isfinite(x) if use is None else use.role.outside(x)
            if bad.any():
                k = int(np.argmax(bad))
                point = {n: float(np.ravel(v)[k if np.size(v) > 1 else 0])
                         for n, v in values.items()}
                why = (f"has no value ({explain(s.parameters, name, point)})" if use is None
                       else f"gives {show(x[k])}{setting(k)}, but it is used as "
                            f"{use.role.noun} at {use.path}: {use.role.problem(x[k])}")
                raise ScenarioError(path, f"parameters.{name} {why}; narrow the range or "
                                          "change the formula")


def check_grid_rows(s: Scenario, first: ParameterSpec, second: ParameterSpec,
                    references=()) -> None:
    x, y = (grid_values(p, s.sensitivity.grid) for p in (first, second))
    a, b = (v.ravel() for v in np.meshgrid(x, y, indexing="ij"))
    values = {name: np.full(a.size, p.value) for name, p in s.parameters.items()}
    values[first.name], values[second.name] = a, b
    setting = (lambda k: f" with parameters.{first.name} = {show(a[k])} and parameters."
                         f"{second.name} = {show(b[k])} (the two-way grid)")
    check_derived_grid(s, values, references, "sensitivity.two_way", setting)
    for found in row_bounds(s, values, attribute_ranges(s)):
        above = np.flatnonzero(found.bound > 1.0 + TOLERANCE)
        if above.size:
            k = above[0]
            raise ScenarioError("sensitivity.two_way", too_high(found, k, setting(k)))
