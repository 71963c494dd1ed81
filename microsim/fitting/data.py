"""Patient-level time-to-event data for a fit: times, events, delayed entry, covariates.

Read from a CSV or Parquet file with the population file's own reader and typing rules
(`microsim.scenario.population_file`; yes/no columns read as 1/0), and refused in one line
naming the option, the column and the first data row: an unknown column, a missing value, a time that is not a
number above 0, an event other than 0 or 1, an entry time not in [0, time), no events at
all, a covariate that is not numbers or takes one value only. Covariates become attributes
of the scenario a fit writes, so their names must be attribute names (and not `age`, which
a scenario reads as the attained age, moving with time).
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from microsim.scenario.errors import ScenarioError
from microsim.scenario.fields import AGE, IDENTIFIER, did_you_mean, listing
from microsim.scenario.population_file import RESERVED, SUFFIXES, raw_table, typed_column


@dataclass(frozen=True)
class SurvivalData:
    """One row per patient: follow-up to `time` (event 1: the event then; 0: censored), seen
    from `entry` (0 without delayed entry); covariates (patients, k) in `covariates`
    order, and their means, at which the fit's base parameters are given."""
    path: Path
    sha256: str
    time_column: str
    event_column: str
    entry_column: str | None
    time: np.ndarray
    event: np.ndarray  # 0.0 or 1.0
    entry: np.ndarray
    covariates: tuple[str, ...]
    values: np.ndarray  # (patients, k)

    @property
    def size(self) -> int:
        return len(self.time)

    @property
    def events(self) -> int:
        return int(self.event.sum())

    @property
    def centres(self) -> np.ndarray:
        return self.values.mean(axis=0)

    @property
    def centred(self) -> np.ndarray:
        return self.values - self.centres

    @property
    def truncated(self) -> bool:
        return bool(np.any(self.entry > 0))

    def frame(self) -> pd.DataFrame:
        """The covariates as a table (one row per patient): the population of a scenario."""
        return pd.DataFrame(self.values, columns=list(self.covariates))


def read_survival_data(path: str | Path, time: str, event: str,
                       covariates: tuple[str, ...] = (), entry: str | None = None) -> SurvivalData:
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
                                "(yes/no is read as 1/0; give a categorical covariate one 0/1 "
                                "column per level but one)")
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
    values = np.column_stack([numbers("--covariates", name) for name in covariates]) \
        if covariates else np.zeros((len(times), 0))
    for k, name in enumerate(covariates):
        check_covariate_name(name)
        if np.all(values[:, k] == values[0, k]):
            raise ScenarioError("--covariates", f"column {name!r} of {where} takes the one "
                                f"value {values[0, k]:g}; its effect cannot be estimated")
    return SurvivalData(path, hashlib.sha256(path.read_bytes()).hexdigest(), time, event, entry,
                        times, events, starts, tuple(covariates), values)


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
    if name in (AGE, RESERVED):
        why = ("a scenario reads `age` as the attained age, which moves with time, while the "
               "data's column is fixed at entry" if name == AGE else
               "`patient` holds the patient id in every population")
        raise ScenarioError("--covariates", f"column {name!r}: {why}; rename the column "
                            "(for example age_at_entry)" if name == AGE else
                            f"column {name!r}: {why}; rename the column")
