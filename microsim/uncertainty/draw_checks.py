"""PSA draws checked before any is simulated, all draws at once.

Every use of a parameter keeps the role the reader gave it (`Scenario.uses`), so each
draw's values are checked against every use (a probability in [0, 1], a utility at most 1,
a treatment cost at least 0, a rate at least 0, ...), and each draw's rows against the
separate rule's bound (`microsim.scenario.rows.row_bounds`). What happens to an invalid
draw is `uncertainty.invalid_draws`:

- "refuse" (the default): the run is refused in one line naming the draw, the parameters
  and their values;
- "redraw": attempt k of draw d reads occurrence k of the draw's streams, until the draw is
  valid, so every draw stays a pure function of (seed, draw) whatever else is drawn;
- "truncate": each value is clipped to the range of its uses; a row that still exceeds 1
  is refused (redrawing can help there).

A derived parameter is recomputed from each draw (`ParameterSampler.draws`), so it is
checked like any other value, and a draw in which its formula has no finite value (a
division by zero, the log of 0) is invalid too. Truncation clips only the values drawn;
the derived values are computed again from the clipped ones.

The changes come back as a table naming every value not used as first drawn.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from microsim.patients.population import file_ranges
from microsim.scenario.errors import ScenarioError
from microsim.scenario.fields import TOLERANCE, Reference, show
from microsim.scenario.formulas import derived_order, explain, inputs, with_derived
from microsim.scenario.read_parameters import support
from microsim.scenario.rows import RowBound, attribute_ranges, row_bounds, row_names
from microsim.scenario.spec import Scenario
from .draws import ParameterSampler

MAX_ATTEMPTS = 1000
CHANGED_COLUMNS = {"draw": "int64", "policy": "string", "attempts": "int64",
                   "parameter": "string", "drawn": "float64", "used": "float64",
                   "reason": "string"}
SETTING = 'set uncertainty.invalid_draws = "redraw" or "truncate" (or run with --invalid-draws)'


@dataclass(frozen=True)
class CheckedDraws:
    table: pd.DataFrame  # draw, then one column per parameter: what the PSA evaluates
    changed: pd.DataFrame  # CHANGED_COLUMNS: one row per value not used as first drawn


def changes(rows: list[tuple]) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=list(CHANGED_COLUMNS)).astype(CHANGED_COLUMNS)


@dataclass(frozen=True)
class Problem:
    """Something invalid in some draws (`bad`, one flag per row of the table checked)."""
    path: str
    reason: str  # short, the same for every draw
    names: tuple[str, ...]  # the parameters involved
    bad: np.ndarray
    why: Callable[[int], str]  # what is wrong with row k of the table, with its values
    fix: str


def check_draws(s: Scenario, sampler: ParameterSampler, n_draws: int, seed: int) -> CheckedDraws:
    """Draws 0..n_draws-1 of the PSA seeded `seed`, each valid for every use of its values
    and every row."""
    policy = s.uncertainty.invalid_draws
    spec = s.population
    ranges = attribute_ranges(s, file_ranges(spec) if spec and spec.file else None)
    table = sampler.draws(seed, np.arange(n_draws))
    found = problems(s, table, ranges)
    bad = flagged(found, n_draws)
    if not bad.any():
        return CheckedDraws(table, changes([]))
    if policy == "refuse":
        raise refusal(found, table, int(np.argmax(bad)),
                      f"{int(bad.sum())} of {n_draws} draws are invalid; {SETTING}, or ")
    if policy == "redraw":
        return redrawn(s, sampler, seed, table, found, ranges)
    return truncated(s, table, ranges)


def problems(s: Scenario, table: pd.DataFrame, ranges) -> list[Problem]:
    """What is invalid in which rows of a table of draws."""
    found = [formula_problem(s, name, table) for name in derived_order(s.parameters)]
    found = [problem for problem in found if problem.bad.any()]
    for use in s.uses:
        if use.name in table.columns:
            x = table[use.name].to_numpy()
            bad = use.role.outside(x)
            if bad.any():
                found.append(value_problem(s, use, x, table["draw"].to_numpy(), bad))
    values = {c: table[c].to_numpy() for c in table.columns if c != "draw"}
    for bound in row_bounds(s, values, ranges):
        bad = ~(bound.bound <= 1.0 + TOLERANCE)
        if bad.any():
            found.append(row_problem(s, bound, table, bad))
    return found


def value_problem(s: Scenario, use: Reference, x: np.ndarray, draws: np.ndarray,
                  bad: np.ndarray) -> Problem:
    role = use.role
    p = s.parameters[use.name]
    derived = p.formula is not None
    if derived:
        fix = ("choose distributions of the parameters it is computed from that keep it in "
               "that range")
    elif p.distribution is not None and role.holds_on(*support(p.distribution, p.value)):
        fix = ("narrow the distribution away from that end (its range is allowed, but a draw "
               "this near the end rounds onto it in floating point)")
    else:
        fix = "choose a distribution that stays in that range"
    return Problem(
        f"parameters.{use.name}.{'formula' if derived else 'distribution'}",
        f"{use.path}: {role.rule}",
        tuple(inputs(s.parameters, use.name)) if derived else (use.name,), bad,
        lambda k: (f"PSA draw {draws[k]} gives {use.name} = {show(x[k])}, used as {role.noun} "
                   f"at {use.path}: {role.problem(x[k])}"), fix)


def formula_problem(s: Scenario, name: str, table: pd.DataFrame) -> Problem:
    """The draws in which a derived parameter's formula has no finite value."""
    bad = ~np.isfinite(table[name].to_numpy())

    def why(k: int) -> str:
        row = {c: float(table[c].iloc[k]) for c in s.parameters}
        return (f"PSA draw {table['draw'].iloc[k]}: parameters.{name} has no value: "
                f"{explain(s.parameters, name, row)}")

    return Problem(f"parameters.{name}.formula", f"parameters.{name}: its formula has no value",
                   tuple(inputs(s.parameters, name)), bad, why,
                   "choose distributions of the parameters it is computed from that keep "
                   "the formula defined")


def row_problem(s: Scenario, bound: RowBound, table: pd.DataFrame, bad: np.ndarray) -> Problem:
    row = bound.row
    names = tuple(n for n in row_names(s, row) if n in table.columns)

    def why(k: int) -> str:
        values = ", ".join(f"{n} = {show(table[n].iloc[k])}" for n in names)
        return (f"PSA draw {table['draw'].iloc[k]} ({values}) lets the probabilities from "
                f"{row.state!r} other than the remainder sum to {show(float(bound.bound[k]))} "
                "(each at its highest over patients and time), above 1")

    return Problem(row.path, f"{row.path}: can sum above 1", names, bad, why,
                   'narrow the distributions, or set time.probability_rule = "competing"')


def flagged(found: list[Problem], n: int) -> np.ndarray:
    bad = np.zeros(n, bool)
    for problem in found:
        bad |= problem.bad
    return bad


def refusal(found: list[Problem], table: pd.DataFrame, k: int, lead: str) -> ScenarioError:
    """The error for row k of the table: its first problem with its values, then `lead`
    and the problem's fix."""
    problem = next(p for p in found if p.bad[k])
    return ScenarioError(problem.path, f"{problem.why(k)}; {lead}{problem.fix}")


def redrawn(s: Scenario, sampler: ParameterSampler, seed: int, first: pd.DataFrame,
            found: list[Problem], ranges) -> CheckedDraws:
    """Each invalid draw again from the next occurrence of its streams, until it is valid."""
    table, attempts = first.copy(), np.zeros(len(first), np.int64)
    bad, retry, again = flagged(found, len(first)), found, first
    while bad.any():
        if attempts.max() >= MAX_ATTEMPTS:
            stuck = int(np.argmax(flagged(retry, len(again))))
            raise refusal(retry, again, stuck, f"still invalid after {MAX_ATTEMPTS} attempts: "
                          "valid draws are too rare to redraw; ")
        attempts[bad] += 1
        again = sampler.draws(seed, first["draw"].to_numpy()[bad], attempts[bad])
        table.iloc[np.flatnonzero(bad), 1:] = again.iloc[:, 1:].to_numpy()
        retry = problems(s, again, ranges)
        bad[bad] = flagged(retry, len(again))
    rows = []
    for k in np.flatnonzero(attempts):
        mine = [p for p in found if p.bad[k]]
        for name in dict.fromkeys(n for p in mine for n in p.names):
            rows.append((int(first["draw"].iloc[k]), "redraw", int(attempts[k]), name,
                         float(first[name].iloc[k]), float(table[name].iloc[k]),
                         "; ".join(p.reason for p in mine)))
    return CheckedDraws(table, changes(rows))


def truncated(s: Scenario, first: pd.DataFrame, ranges) -> CheckedDraws:
    """Each value clipped to the range of its uses; rows that still exceed 1 are refused."""
    table, rows = first.copy(), []
    for use in s.uses:
        if use.name in table.columns and s.parameters[use.name].formula is None:
            x = table[use.name].to_numpy()
            clipped = use.role.clip(x)
            for k in np.flatnonzero(clipped != x):
                rows.append((int(table["draw"].iloc[k]), "truncate", 0, use.name, float(x[k]),
                             float(clipped[k]), f"{use.path}: {use.role.rule}"))
            table[use.name] = clipped
    values = with_derived(s.parameters, {c: table[c].to_numpy() for c in s.parameters})
    for name in derived_order(s.parameters):
        table[name] = values[name]
    left = problems(s, table, ranges)
    bad = flagged(left, len(table))
    if bad.any():
        raise refusal(left, table, int(np.argmax(bad)), "truncating each value to its range "
                      'cannot mend this; set uncertainty.invalid_draws = "redraw", or ')
    return CheckedDraws(table, changes(rows))
