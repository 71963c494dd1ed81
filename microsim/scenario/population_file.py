"""Reading a population file (CSV or Parquet) into typed columns, by one rule.

- A column whose values are all numbers is numeric.
- A text column whose values are all yes/no or true/false (any case) is a yes/no column
  (bool, True for yes/true), like a `yesno` attribute.
- Any other text column is categorical; its levels are its distinct values, exact-case and
  sorted, taken from the whole file (so they never depend on which rows a population draws).
- Spaces around a value are ignored. A missing value (an empty cell, a Parquet null) is
  refused, naming the column and the first data row. A text column in which more than half
  of the values are numbers is a number column with typos ("n/a", "12,5"): it is refused,
  naming the column, the first data row that is not a number and its value.

A CSV file is read as text and typed by these rules; in a Parquet file, number and boolean
columns keep their type and text (string or categorical) columns follow the same rules.

The scenario reader reads only the header (`read_header`); every command that draws
patients reads the whole file through `read_population_file`, which parses a file once per
process and reads it again only when it changes on disk.
"""
from __future__ import annotations

import re

import warnings
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd

from .errors import ScenarioError
from .fields import describe, listing

FILE = "population.file"
WEIGHTS = "population.weights"
SUFFIXES = (".csv", ".parquet")
RESERVED = "patient"  # the column of patient ids in every drawn population
YES, NO = ("yes", "true"), ("no", "false")
KIND_WORDS = {"continuous": "numbers", "categorical": "text (categorical)",
              "yesno": "yes/no values"}


@dataclass(frozen=True)
class FileColumn:
    """What one column holds. kind: `continuous` (numbers), `categorical` or `yesno`, the
    kinds the scenario checks know drawn attributes by. levels: a categorical column's
    distinct values, sorted. lowest, highest: the range of the values as covariates
    (numbers: minimum and maximum; yes/no: 0 for no, 1 for yes; categorical: None)."""
    kind: str
    levels: tuple[str, ...] = ()
    lowest: float | None = None
    highest: float | None = None


@dataclass(frozen=True, eq=False)
class PopulationFile:
    """A population file, read and typed. `rows` is shared by every reader of the file:
    take rows or copy it, never change it in place."""
    path: Path
    rows: pd.DataFrame  # the typed columns, without the weights column
    weights: np.ndarray  # the sampling weight of each row (1 without a weights column)
    columns: Mapping[str, FileColumn]  # every column of `rows`, in file order

    def kinds(self) -> dict[str, tuple[str, tuple[str, ...]]]:
        """Column -> (kind, levels), the form `checks.attribute_kinds` gives attributes."""
        return {name: (c.kind, c.levels) for name, c in self.columns.items()}


def check_path(path: Path, given: str) -> None:
    """Refuse a file of the wrong kind or one that does not exist."""
    if path.suffix.lower() not in SUFFIXES:
        raise ScenarioError(FILE, f"must be a .csv or .parquet file, got {given!r}")
    try:
        found = path.is_file()
    except (OSError, ValueError):
        found = False
    if not found:
        raise ScenarioError(FILE, f"no such file: {path} (a relative path is read from the "
                                  "folder of the scenario file)")


def first_line(error: Exception) -> str:
    return (str(error).strip().splitlines() or [type(error).__name__])[0]


def read_header(path: Path, given: str) -> tuple[str, ...]:
    """The column names of a population file (its header only)."""
    check_path(path, given)
    try:
        if path.suffix.lower() == ".csv":
            columns = pd.read_csv(path, nrows=0).columns
        else:
            import pyarrow.parquet
            columns = pyarrow.parquet.read_schema(path).names
    except (OSError, ValueError) as error:
        raise ScenarioError(FILE, f"cannot read the column names of {path.name}: "
                                  f"{first_line(error)}") from None
    names = tuple(str(c) for c in columns)
    refuse_reserved(names, path)
    return names


def refuse_reserved(names: tuple[str, ...], path: Path) -> None:
    if RESERVED in names:
        raise ScenarioError(FILE, f"{path.name} has a column named {RESERVED!r}, which is "
                                  "reserved for the patient id; rename it")


def read_population_file(path: str | Path, weights: str | None = None) -> PopulationFile:
    """The file's typed columns, their kinds and ranges, and the sampling weights from the
    column `weights`; bad values are refused with a `ScenarioError` (module docstring)."""
    path = Path(path)
    check_path(path, str(path))
    status = path.stat()
    return read_unchanged(path.resolve(), weights, status.st_mtime_ns, status.st_size,
                          status.st_ino)


@lru_cache(maxsize=4)
def read_unchanged(path: Path, weights: str | None, modified: int, size: int, inode: int
                   ) -> PopulationFile:
    """Parse and type the file; cached on its modification time, size and inode, so an
    unchanged file is parsed once however many times a command draws from it."""
    table = raw_table(path).reset_index(drop=True)
    if table.empty:
        raise ScenarioError(FILE, f"{path.name} has no data rows")
    refuse_reserved(tuple(str(c) for c in table.columns), path)
    sampling = np.ones(len(table))
    if weights is not None:
        sampling = weight_values(table, weights, path.name)
        table = table.drop(columns=weights)
    rows, columns = {}, {}
    for name in table.columns:
        rows[str(name)], columns[str(name)] = typed_column(str(name), table[name], path.name)
    return PopulationFile(path, pd.DataFrame(rows), sampling, columns)


def raw_table(path: Path, field: str = FILE) -> pd.DataFrame:
    """The file as pandas reads it: a CSV all as text (typed here, by the rule above),
    Parquet with its own column types; `field` is what a refusal names."""
    try:
        with warnings.catch_warnings():
            # a first data row longer than the header would silently lose values
            warnings.simplefilter("error", pd.errors.ParserWarning)
            if path.suffix.lower() == ".csv":
                return pd.read_csv(path, dtype=str, keep_default_na=False, index_col=False)
            return pd.read_parquet(path)
    except Exception as error:  # any failure of the third-party reader is a bad file
        raise ScenarioError(field, f"cannot read {path.name}: {reading_problem(error)}") from None


TOKENIZING = re.compile(r"Expected (\d+) fields in line (\d+), saw (\d+)")


def reading_problem(error: Exception) -> str:
    """What a reader's failure means for the person who wrote the file: a row with more
    values than the header is named by its data row (a decimal comma splits a number)."""
    hint = ("a decimal comma splits a number in two (write 0.77, not 0,77) and a text with a "
            'comma needs quotes ("North, upper")')
    found = TOKENIZING.search(str(error))
    if found:
        expected, line, saw = map(int, found.groups())
        return f"data row {line - 1} has {saw} values but the header names {expected} columns; {hint}"
    if "Length of header or names does not match length of data" in str(error):
        return f"data row 1 has more values than the header names columns; {hint}"
    return first_line(error)


def weight_values(table: pd.DataFrame, column: str, where: str) -> np.ndarray:
    if column not in table.columns:
        raise ScenarioError(WEIGHTS, f"{column!r} is not a column of {where}; columns: "
                                     f"{listing(map(str, table.columns))}")
    values, kind = typed_column(column, table[column], where, WEIGHTS)
    if kind.kind != "continuous":
        raise ScenarioError(WEIGHTS, f"column {column!r} of {where} holds "
                                     f"{KIND_WORDS[kind.kind]}; sampling weights are numbers")
    weights = values.to_numpy(dtype=float)
    negative = np.flatnonzero(weights < 0)
    if negative.size:
        raise ScenarioError(WEIGHTS, f"sampling weights must be >= 0, but data row "
                                     f"{negative[0] + 1} of {where} has {weights[negative[0]]:g}")
    if weights.sum() <= 0:
        raise ScenarioError(WEIGHTS, f"the weights in column {column!r} of {where} are all "
                                     "zero, so no row can be drawn; give some rows a weight > 0")
    return weights


def typed_column(name: str, values: pd.Series, where: str, path: str = FILE
                 ) -> tuple[pd.Series, FileColumn]:
    """A column typed by the rule of the module docstring, with what it holds."""
    missing = values.isna().to_numpy()
    if pd.api.types.is_bool_dtype(values) or pd.api.types.is_numeric_dtype(values):
        refuse_missing(name, missing, where, path)
        if pd.api.types.is_bool_dtype(values):
            return yesno_column(values.astype(bool))
        return number_column(name, values, values, where, path)
    if not (pd.api.types.is_string_dtype(values) or pd.api.types.is_object_dtype(values)
            or isinstance(values.dtype, pd.CategoricalDtype)):
        raise ScenarioError(path, f"column {name!r} of {where} holds {values.dtype} values; "
                                  "a population file's columns hold numbers or text")
    text = values.astype(object).where(~missing, "").astype(str).str.strip()
    refuse_missing(name, missing | (text == "").to_numpy(), where, path)
    numbers = pd.to_numeric(text, errors="coerce")
    if 2 * np.isfinite(numbers.to_numpy(dtype=float)).sum() > len(text):  # mostly numbers
        return number_column(name, numbers, text, where, path)
    lower = text.str.lower()
    if lower.isin(YES + NO).all():
        return yesno_column(lower.isin(YES))
    levels = tuple(sorted(text.unique()))
    return (pd.Series(pd.Categorical(text, categories=levels), index=values.index),
            FileColumn("categorical", levels))


def refuse_missing(name: str, missing: np.ndarray, where: str, path: str) -> None:
    if missing.any():
        raise ScenarioError(path, f"column {name!r} of {where} has no value in data row "
                                  f"{np.flatnonzero(missing)[0] + 1} ({int(missing.sum())} "
                                  "missing in all); fill in every value or drop those rows")


def number_column(name: str, numbers: pd.Series, shown: pd.Series, where: str, path: str
                  ) -> tuple[pd.Series, FileColumn]:
    """Numbers, every one finite; `shown` holds the values as the file wrote them."""
    bad = np.flatnonzero(~np.isfinite(numbers.to_numpy(dtype=float)))
    if bad.size:
        raise ScenarioError(path, f"column {name!r} of {where} holds numbers, but data row "
                                  f"{bad[0] + 1} has {describe(shown.iloc[bad[0]])}; write a "
                                  "finite number there (with a decimal point, like 12.5) or "
                                  "drop the row")
    return numbers, FileColumn("continuous", (), float(numbers.min()), float(numbers.max()))


def yesno_column(values: pd.Series) -> tuple[pd.Series, FileColumn]:
    return values, FileColumn("yesno", (), float(values.min()), float(values.max()))
