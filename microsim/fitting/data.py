"""Patient-level time-to-event data for a fit: times, events, delayed entry, covariates.

Read from a CSV or Parquet file with the population file's own reader and typing rules
(`microsim.scenario.population_file`; yes/no columns read as 1/0), and refused in one line
naming the option, the column and the first data row: an unknown column, a missing value, a
time that is not a number above 0, an event other than 0 or 1, an entry time not in
[0, time), no events at all, a covariate that takes one value only.

Covariates become attributes of the scenario a fit writes. A column of numbers (or yes/no)
is one covariate; a column of text is categorical and becomes one 0/1 indicator per level
but the reference (the first level in sorted order, or the one given), whose coefficient
the scenario reads as the effect of that level (`{ attribute = "tgrade", level = "II" }`).
A column `age` is the age at entry, fixed, while a scenario's `age` is the attained age,
moving with time: it is written as the attribute `age_at_entry`.
"""
from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from microsim.scenario.errors import ScenarioError
from microsim.scenario.fields import AGE, IDENTIFIER, did_you_mean, listing
from microsim.scenario.population_file import RESERVED, SUFFIXES, raw_table, typed_column

ENTRY_AGE = "age_at_entry"  # the attribute a data column `age` is written as
MAX_LEVELS = 20  # levels of a categorical covariate; more is likelier an id than a covariate


@dataclass(frozen=True)
class Covariate:
    """One column of the fit's design and how the written scenario reads it: `name` names
    its coefficient (`event_<name>`), `attribute` the scenario's attribute, and `level`,
    for a categorical column, the level whose indicator it is (1 at the level, else 0)."""
    name: str
    attribute: str
    level: str | None = None


@dataclass(frozen=True)
class Levels:
    """A categorical covariate: its levels (sorted), their shares in the data, and the
    reference level, which has no indicator (its patients have the base hazard)."""
    attribute: str
    levels: tuple[str, ...]
    shares: tuple[float, ...]
    reference: str


@dataclass(frozen=True)
class SurvivalData:
    """One row per patient: follow-up to `time` (event 1: the event then; 0: censored), seen
    from `entry` (0 without delayed entry); the design (patients, k) in `terms` order,
    centred at the means of numbers and at the reference of each categorical covariate,
    where the fit's base parameters are given; `population` holds the covariates as the
    scenario's attributes (numbers, and text for the categorical ones)."""
    path: Path
    sha256: str
    time_column: str
    event_column: str
    entry_column: str | None
    time: np.ndarray
    event: np.ndarray  # 0.0 or 1.0
    entry: np.ndarray
    terms: tuple[Covariate, ...]
    values: np.ndarray  # (patients, k)
    population: pd.DataFrame  # one column per attribute
    categorical: tuple[Levels, ...] = ()
    columns: tuple[str, ...] = ()  # the data's covariate columns, as given

    @property
    def age_at_entry(self) -> bool:
        """Whether the data's column `age` is written as the attribute `age_at_entry`."""
        return AGE in self.columns

    @property
    def covariates(self) -> tuple[str, ...]:
        return tuple(term.name for term in self.terms)

    @property
    def size(self) -> int:
        return len(self.time)

    @property
    def events(self) -> int:
        return int(self.event.sum())

    @property
    def centres(self) -> np.ndarray:
        means = self.values.mean(axis=0)
        return np.array([0.0 if t.level is not None else m for t, m in zip(self.terms, means)])

    @property
    def centred(self) -> np.ndarray:
        return self.values - self.centres

    @property
    def truncated(self) -> bool:
        return bool(np.any(self.entry > 0))

    def frame(self) -> pd.DataFrame:
        """The covariates as a table (one row per patient): the population of a scenario."""
        return self.population


def parse_references(text: str | None) -> dict[str, str]:
    """`--reference tgrade=II,menostat=Pre` as {column: level}."""
    found: dict[str, str] = {}
    for item in (text or "").split(","):
        if not item.strip():
            continue
        column, equals, level = item.partition("=")
        if not equals or not column.strip() or not level.strip():
            raise ScenarioError("--reference", f"{item.strip()!r} is not COLUMN=LEVEL (for "
                                "example tgrade=II)")
        found[column.strip()] = level.strip()
    return found


def read_survival_data(path: str | Path, time: str, event: str,
                       covariates: tuple[str, ...] = (), entry: str | None = None,
                       references: dict[str, str] | None = None) -> SurvivalData:
    """The data of a fit; `references` names the reference level of categorical columns
    (default: the first level in sorted order)."""
    path = Path(path)
    where = path.name
    if path.suffix.lower() not in SUFFIXES:
        raise ScenarioError(str(path), "must be a .csv or .parquet file")
    if not path.is_file():
        raise ScenarioError(str(path), "no such file")
    table = raw_table(path, str(path)).reset_index(drop=True)
    if table.empty:
        raise ScenarioError(str(path), f"{where} has no data rows")
    columns = [str(c) for c in table.columns]
    roles = [("--time", time), ("--event", event)] + ([("--entry", entry)] if entry else []) + [
        ("--covariates", name) for name in covariates]
    seen: dict[str, str] = {}
    for option, name in roles:
        if name not in columns:
            raise ScenarioError(option, f"no column {name!r} in {where}"
                                f"{did_you_mean(name, columns)}; columns: {listing(columns)}")
        if name in seen:
            raise ScenarioError(option, f"column {name!r} is already given to {seen[name]}; "
                                "give each column one role")
        seen[name] = option

    def numbers(option: str, name: str) -> np.ndarray:
        """A column of numbers; yes/no (true/false, booleans) as 1/0."""
        values, kind = typed_column(name, table[name], where, option)
        if kind.kind == "categorical":
            raise ScenarioError(option, f"column {name!r} of {where} holds text "
                                f"({listing(list(kind.levels)[:4])}); it must hold numbers "
                                "(yes/no is read as 1/0)")
        return values.to_numpy(dtype=float)

    times = numbers("--time", time)
    first_bad(times <= 0, "--time", time, where, times, "must be above 0 (a time of 0 carries "
              "no follow-up; drop such rows)")
    events = numbers("--event", event)
    first_bad((events != 0) & (events != 1), "--event", event, where, events,
              "must be 0 (censored) or 1 (the event); recode the column")
    if not events.any():
        raise ScenarioError("--event", f"column {event!r} of {where} has no events (every "
                            "value is 0): there is nothing to fit")
    starts = np.zeros_like(times)
    if entry:
        starts = numbers("--entry", entry)
        first_bad((starts < 0) | (starts >= times), "--entry", entry, where, starts,
                  f"must be at least 0 and below the time in column {time!r} (the patient is "
                  "seen from entry to time)")
    terms, values, population, categorical = design(table, covariates, dict(references or {}),
                                                    where, len(times))
    return SurvivalData(path, hashlib.sha256(path.read_bytes()).hexdigest(), time, event, entry,
                        times, events, starts, terms, values, population, categorical,
                        tuple(covariates))


def design(table: pd.DataFrame, covariates: tuple[str, ...], references: dict[str, str],
           where: str, size: int):
    """The fit's design (terms and their values, patients x k), the covariates as the
    scenario's attributes (a table), and each categorical one's levels: a column of numbers
    (yes/no as 1/0) is one term, a column of text one indicator per level but the reference."""
    terms, columns, population, categorical = [], [], {}, []
    for name in covariates:
        check_covariate_name(name)
        attribute = ENTRY_AGE if name == AGE else name
        if attribute in population:  # a column `age_at_entry` beside `age`
            raise ScenarioError("--covariates", f"columns 'age' and {ENTRY_AGE!r} would both "
                                f"be the attribute {ENTRY_AGE!r} ('age' is written so: a "
                                "scenario's age is the attained age); rename one of them")
        values, kind = typed_column(name, table[name], where, "--covariates")
        if kind.kind == "categorical":
            levels = category(name, attribute, values, kind.levels, references.pop(name, None),
                              where)
            categorical.append(levels)
            text = values.astype(str)
            population[attribute] = text.to_numpy()
            for level in levels.levels:
                if level != levels.reference:
                    terms.append(Covariate(level_name(attribute, level, levels.levels),
                                           attribute, level))
                    columns.append((text == level).to_numpy(dtype=float))
            continue
        column = values.to_numpy(dtype=float)
        if np.all(column == column[0]):
            raise ScenarioError("--covariates", f"column {name!r} of {where} takes the one "
                                f"value {column[0]:g}; its effect cannot be estimated")
        population[attribute] = column
        terms.append(Covariate(attribute, attribute))
        columns.append(column)
    if references:
        column = next(iter(references))
        raise ScenarioError("--reference", f"column {column!r} is not a categorical covariate "
                            "(a column of text given to --covariates)"
                            f"{did_you_mean(column, [c.attribute for c in categorical])}")
    check_distinct(terms)
    values = np.column_stack(columns) if columns else np.zeros((size, 0))
    return (tuple(terms), values, pd.DataFrame(population, columns=list(population)),
            tuple(categorical))


def category(name: str, attribute: str, values: pd.Series, levels: tuple[str, ...],
             reference: str | None, where: str) -> Levels:
    """A categorical covariate's levels, shares and reference level, or a refusal."""
    if len(levels) == 1:
        raise ScenarioError("--covariates", f"column {name!r} of {where} takes the one value "
                            f"{levels[0]!r}; its effect cannot be estimated")
    if len(levels) > MAX_LEVELS:
        raise ScenarioError("--covariates", f"column {name!r} of {where} holds text of "
                            f"{len(levels)} levels (at most {MAX_LEVELS} as a categorical "
                            "covariate); is it an identifier? Group its levels or leave it out")
    if reference is None:
        reference = levels[0]
    elif reference not in levels:
        raise ScenarioError("--reference", f"{reference!r} is not a level of column {name!r} "
                            f"(levels: {listing(levels)}){did_you_mean(reference, levels)}")
    counts = values.astype(str).value_counts()
    shares = tuple(float(counts[level]) / len(values) for level in levels)
    return Levels(attribute, levels, shares, reference)


def level_name(attribute: str, level: str, levels: tuple[str, ...]) -> str:
    """The name of a level's indicator (`tgrade_ii`): the level in lowercase letters,
    digits and underscores, or its place among the levels (`tgrade_level2`) when that is
    empty or two levels would share it."""
    def plain(text: str) -> str:
        return re.sub(r"[^a-z0-9]+", "_", text.lower()).strip("_")
    words = [plain(other) for other in levels]
    mine = plain(level)
    if not mine or words.count(mine) > 1:
        mine = f"level{levels.index(level) + 1}"
    return f"{attribute}_{mine}"


def check_distinct(terms: list[Covariate]) -> None:
    """Two covariates must not name one coefficient (`tgrade_ii` of a level and a column)."""
    seen: dict[str, Covariate] = {}
    for term in terms:
        if term.name in seen:
            first = seen[term.name]
            raise ScenarioError("--covariates", f"{term.name!r} names both "
                                f"{describe_term(first)} and {describe_term(term)}; rename a "
                                "column")
        seen[term.name] = term


def describe_term(term: Covariate) -> str:
    return (f"column {term.attribute!r}" if term.level is None
            else f"level {term.level!r} of column {term.attribute!r}")


def first_bad(bad: np.ndarray, option: str, name: str, where: str, values: np.ndarray,
              rule: str) -> None:
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise ScenarioError(option, f"column {name!r} of {where} has {values[row]:g} in data "
                            f"row {row + 1} ({int(bad.sum())} such rows in all); it {rule}")


def check_covariate_name(name: str) -> None:
    """A covariate becomes an attribute of the scenario the fit writes."""
    if not IDENTIFIER.fullmatch(name):
        raise ScenarioError("--covariates", f"column {name!r} cannot name an attribute of a "
                            "scenario (lowercase letters, digits and underscores, starting "
                            "with a letter); rename the column")
    if name == RESERVED:
        raise ScenarioError("--covariates", f"column {name!r}: `patient` holds the patient id "
                            "in every population; rename the column")
