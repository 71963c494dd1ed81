"""Every use of a population file's columns, checked once the file is read.

The scenario reader knows only a file's column names, so it accepts any use of a column.
When a command reads the file (`population_file.read_population_file`), the columns' kinds
and levels take the names' place and the reader's own checks of effects and eligibility run
again with them, so a file column obeys exactly the rules of a drawn attribute. Bands, age
and names are checked against the columns here.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from .checks import check_effects, check_level_tables, check_table_covers, table_uses
from .errors import ScenarioError
from .fields import AGE, Reading, show
from .population_file import FILE, KIND_WORDS, PopulationFile
from .read_population import band_gap
from .read_strategies import check_conditions, under
from .spec import DerivedSpec, PopulationSpec, Scenario


def check_column_uses(s: Scenario, file: PopulationFile) -> None:
    """Effects, eligibility conditions and tables by level on the file's columns, by the
    rules of drawn attributes (a level the column has, a test that suits its kind), and
    tables by age from the file's youngest age."""
    reading = Reading(file_columns=file.kinds())
    check_effects(s, reading)
    check_level_tables(s, reading)
    ages = file.columns.get(AGE)
    for use in table_uses(s) if ages is not None else ():
        check_table_covers(s, s.tables[use.name], use, youngest=ages.lowest)
    for strategy in s.strategies:
        prefix = f"strategies.{strategy.name}"
        if strategy.eligible is not None:
            check_conditions(s, reading, strategy.eligible, f"{prefix}.eligible")
        for treatment, here in ((strategy, prefix), *((line, f"{prefix}.then.{line.name}")
                                                      for line in strategy.then)):
            with under(here):  # a treatment's added transitions and events, as a model
                check_effects(replace(s, transitions=treatment.transitions,
                                      events=treatment.events), reading)


def check_file_population(spec: PopulationSpec, file: PopulationFile) -> None:
    """The population's own uses of the file's columns: names, bands and age (numbers,
    none below 0: a drawn age that can go below 0 is warned of, `checks.negative_ages`)."""
    for attribute in spec.attributes:
        if attribute.name in file.columns:
            raise ScenarioError(f"population.attributes.{attribute.name}",
                                f"is also a column of {file.path.name}; rename one of them")
    for derived in spec.derived:
        check_band(spec, derived, file)
    age = file.columns.get(AGE)
    if age is not None and age.kind != "continuous":
        raise ScenarioError(FILE, f"column {AGE!r} of {file.path.name} is the age at time 0 "
                                  f"and must hold numbers, but it holds {KIND_WORDS[age.kind]}")
    if age is not None and age.lowest < 0:
        row = int(np.flatnonzero(file.rows[AGE].to_numpy(dtype=float) < 0)[0])
        raise ScenarioError(FILE, f"column {AGE!r} of {file.path.name} is the age at time 0 "
                                  f"and cannot be negative, but data row {row + 1} has "
                                  f"{show(file.rows[AGE].iloc[row])}; correct it or drop the row")


def check_band(spec: PopulationSpec, derived: DerivedSpec, file: PopulationFile) -> None:
    """A band of a column needs numbers, and a first edge at or below the column's
    lowest value (bands of drawn attributes are checked by `check_population`)."""
    path = f"population.derived.{derived.name}"
    if derived.name in file.columns:
        raise ScenarioError(path, f"is also a column of {file.path.name}; rename one of them")
    column = file.columns.get(derived.source)
    if column is None:
        if not any(a.name == derived.source for a in spec.attributes):
            raise ScenarioError(f"{path}.from", f"{derived.source!r} is neither an attribute "
                                f"nor a column of {file.path.name}")
        return
    if column.kind != "continuous":
        raise ScenarioError(f"{path}.from", f"column {derived.source!r} of {file.path.name} "
                            f"holds {KIND_WORDS[column.kind]}; bands need a column of numbers")
    gap = band_gap(derived.source, derived.edges[0], column.lowest)
    if gap:
        raise ScenarioError(f"{path}.edges", gap)
