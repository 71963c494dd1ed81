"""Result tables as a reader sees them: plain headers, thousands separators, intervals that
say which they are, units and currency from the scenario.

Every cell that shows numbers keeps where they came from (the result table's name, its row
and the raw values), so the page can be checked against the tables it was made from.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable, Mapping, Sequence

import pandas as pd

from microsim.report.style import Z95

CI95 = "95% CI"
MEASURES = {  # column values of the result tables -> what a reader calls them
    "costs_discounted": "costs, discounted", "qalys_discounted": "QALYs, discounted",
    "life_years": "life years", "costs": "costs, undiscounted", "qalys": "QALYs, undiscounted",
    "incremental_costs": "incremental costs, discounted",
    "incremental_qalys": "incremental QALYs, discounted",
    "incremental_nmb": "incremental net monetary benefit",
}


def missing(x) -> bool:
    return x is None or (isinstance(x, float) and math.isnan(x)) or x is pd.NA


def number(x) -> str:
    """Thousands separators; whole units from 100 up, two decimals from 1, three
    significant digits below 1; a dash for a missing value."""
    if missing(x):
        return "–"
    x = float(x)
    if math.isinf(x):
        return "∞" if x > 0 else "−∞"
    if abs(x) >= 100:
        text = f"{x:,.0f}"
    elif abs(x) >= 1:
        text = f"{x:,.2f}"
    else:
        text = f"{x:.3g}"
    return text


def whole(x) -> str:
    return "–" if missing(x) else f"{int(round(float(x))):,}"


def percent(x) -> str:
    return "–" if missing(x) else f"{100 * float(x):.1f}%"


def interval(mean, lower, upper) -> str:
    return f"{number(mean)} ({number(lower)} to {number(upper)})"


def normal_interval(mean, se) -> str:
    """mean (mean - 1.96 SE to mean + 1.96 SE): the 95% normal interval (common practice)."""
    if missing(se):
        return number(mean)
    return interval(mean, mean - Z95 * se, mean + Z95 * se)


def nonnegative_interval(mean, se) -> str:
    """`normal_interval` of a quantity that cannot be below 0 (a value of information):
    its lower end at 0 at least."""
    if missing(se):
        return number(mean)
    return interval(mean, max(mean - Z95 * se, 0.0), mean + Z95 * se)


def plain(x) -> str:
    return "–" if missing(x) else str(x)


@dataclass(frozen=True)
class Cell:
    text: str
    table: str | None = None  # the result table the values come from
    row: int | None = None  # their row there (0-based, as written)
    values: Mapping[str, object] = field(default_factory=dict)  # column -> raw value


@dataclass(frozen=True)
class Table:
    caption: str
    headers: Sequence[str]
    rows: Sequence[Sequence[Cell]]
    note: str = ""


@dataclass(frozen=True)
class Column:
    """A column shown from some of a result table's columns: `show` turns their values
    (in the order of `keys`) into the cell's text."""
    header: str
    keys: tuple[str, ...]
    show: Callable[..., str] = plain


def raw(value):
    """A value for the page's data attributes: plain Python, NaN as null."""
    if missing(value):
        return None
    return value.item() if hasattr(value, "item") else value


def cell(name: str, frame: pd.DataFrame, row, column: Column) -> Cell:
    values = {k: raw(frame.at[row, k]) for k in column.keys}
    return Cell(column.show(*(frame.at[row, k] for k in column.keys)), name, int(row), values)


def table(name: str, frame: pd.DataFrame, columns: Sequence[Column], caption: str,
          note: str = "") -> Table:
    """One row per row of `frame` (a result table read back, or rows chosen from it with
    their positions kept as the index)."""
    return Table(caption, [c.header for c in columns],
                 [[cell(name, frame, row, c) for c in columns] for row in frame.index], note)


def by_strategy(name: str, frame: pd.DataFrame, measures: Sequence[str], value: Column,
                labels: Mapping[str, str], caption: str, first: str = "strategy",
                note: str = "") -> Table:
    """A long table (strategy, measure, ...) shown wide: one row per strategy, one column
    per measure, each cell read from its own row of `frame`."""
    rows = []
    for strategy, group in frame.groupby("strategy", sort=False):
        cells = [Cell(labels.get(strategy, strategy))]
        for measure in measures:
            found = group.index[group.measure == measure]
            cells.append(cell(name, frame, found[0], value) if len(found) else Cell("–"))
        rows.append(cells)
    return Table(caption, [first, *(MEASURES.get(m, m) for m in measures)], rows, note)


def grid(name: str, frame: pd.DataFrame, rows: str, columns: str, value: Column,
         caption: str, corner: str, note: str = "") -> Table:
    """A long table shown as a grid: one row per value of `rows`, one column per value of
    `columns`, each cell read from its own row of `frame` (a two-way analysis)."""
    across = sorted(set(frame[columns]))
    shown = []
    for down in sorted(set(frame[rows])):
        cells = [Cell(number(down))]
        for x in across:
            found = frame.index[(frame[rows] == down) & (frame[columns] == x)]
            cells.append(cell(name, frame, found[0], value) if len(found) else Cell("–"))
        shown.append(cells)
    return Table(caption, [corner, *(number(x) for x in across)], shown, note)
