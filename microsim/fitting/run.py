"""`microsim fit` end to end: read the data, fit every family, choose one, write it as a
scenario, simulate that scenario, and gather the tables a run folder keeps.

The written scenario is read back by the scenario reader and simulated by the engines
before anything is kept: what the run folder holds is a scenario that runs, whose
simulated survival has been set beside the fitted one.
"""
from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from microsim import CAUTION
from microsim.fitting import scenario_text
from microsim.fitting.check import simulated_check
from microsim.fitting.curves import curves_table, grid, horizon_for
from microsim.fitting.data import SurvivalData, read_survival_data
from microsim.fitting.estimate import Fit, fit_all
from microsim.fitting.families import BY_NAME, NONE
from microsim.fitting.kaplan_meier import kaplan_meier
from microsim.fitting.tables import covariance_table, models_table, parameters_table
from microsim.scenario.errors import ScenarioError
from microsim.scenario.fields import IDENTIFIER, did_you_mean
from microsim.scenario.reader import UNIT_WORD, YEARS_PER_UNIT

CHECK_PATIENTS = 5000
Z_LIMIT = 4.0  # |z| of the simulated survival against the fitted one (common practice)


@dataclass(frozen=True)
class FitRun:
    data: SurvivalData
    fits: list[Fit]
    chosen: Fit
    tables: dict[str, pd.DataFrame]
    files: dict[str, Path]  # name in the run folder -> a finished file
    summary: dict  # with "files": the names of the scenario, the block and the patients


def output_names(data: SurvivalData, fit: Fit) -> dict[str, str]:
    """The written files' names after the data file and the fit (`rossi_weibull_ph.toml`),
    so that the scenarios of two fits, and the run folders that running them makes (named
    after the scenario), do not share a name."""
    base = f"{data.path.stem}_{fit.family.name}" + ("" if fit.form == NONE else f"_{fit.form}")
    return {"scenario": f"{base}.toml", "block": f"{base}_block.toml",
            "patients": f"{base}_patients.csv"}


def check_options(unit: str, name: str, family: str | None, form: str | None,
                  covariates: tuple[str, ...], horizon: float | None) -> None:
    """Refuse options that cannot make a scenario, before any work."""
    if not UNIT_WORD.fullmatch(unit):
        raise ScenarioError("--unit", f"must be a single word such as 'years' or 'days', "
                                      f"got {unit!r}")
    if unit.lower().removesuffix("s") not in YEARS_PER_UNIT:
        known = ", ".join(f"{u}s" for u in YEARS_PER_UNIT)
        raise ScenarioError("--unit", f"{unit!r} is not a unit microsim knows ({known}); give "
                                      "the times in one of them")
    if not IDENTIFIER.fullmatch(name):
        raise ScenarioError("--name", f"must be a name (lowercase letters, digits and "
                                      f"underscores, starting with a letter), got {name!r}")
    if family is not None and family not in BY_NAME:
        raise ScenarioError("--family", f"no family {family!r}{did_you_mean(family, BY_NAME)}; "
                                        f"choose from {', '.join(BY_NAME)}")
    if form is not None and not covariates:
        raise ScenarioError("--form", "chooses how covariates act; give --covariates too")
    if horizon is not None and not 0 < horizon < float("inf"):
        raise ScenarioError("--horizon", f"must be a number above 0, got {horizon:g}")


def choose(fits: list[Fit], family: str | None, form: str | None) -> Fit:
    """The best converged fit by AIC among those the options allow (`fits` is ranked)."""
    allowed = [f for f in fits if (family is None or f.family.name == family)
               and (form is None or f.form == form)]
    if not allowed:
        raise ScenarioError("--form", f"the {BY_NAME[family].label} family takes covariates as "
                                      "accelerated failure time only; choose --form aft")
    converged = [f for f in allowed if f.converged]
    if not converged:
        raise ScenarioError("--family" if family else "data", f"no fit converged "
                            f"({allowed[0].label}: {allowed[0].note}); choose another family "
                            "or look at the data")
    return converged[0]


def fit_and_write(path: Path, time: str, event: str, covariates: tuple[str, ...],
                  entry: str | None, unit: str, scratch: Path, *, family: str | None = None,
                  form: str | None = None, name: str = "event", horizon: float | None = None,
                  patients: int = CHECK_PATIENTS, seed: int = 20261201,
                  references: dict[str, str] | None = None) -> FitRun:
    """Everything `microsim fit` keeps; the written files are made in `scratch`.
    `references`: the reference level of categorical covariates ({column: level})."""
    check_options(unit, name, family, form, covariates, horizon)
    data = read_survival_data(path, time, event, covariates, entry, references)
    fits = fit_all(data)
    chosen = choose(fits, family, form)
    horizon = horizon_for(data) if horizon is None else float(horizon)
    times = grid(horizon)
    names = output_names(data, chosen)
    patients_file = names["patients"] if chosen.covariates else None
    files = {names["scenario"]: scratch / names["scenario"],
             names["block"]: scratch / names["block"]}
    day = datetime.now(timezone.utc).date().isoformat()  # one date for both files
    files[names["block"]].write_text(scenario_text.block(chosen, data, name, unit, day))
    files[names["scenario"]].write_text(scenario_text.scenario(
        chosen, data, name, unit, horizon, seed, patients_file, day))
    if patients_file is not None:
        files[patients_file] = scratch / patients_file
        data.frame().to_csv(files[patients_file], index=False)
    check = simulated_check(files[names["scenario"]], chosen, data, patients, seed)
    tables = {"fit_models": models_table(fits, chosen), "fit_parameters": parameters_table(fits),
              "fit_covariance": covariance_table(fits), "kaplan_meier": kaplan_meier(data),
              "fit_curves": curves_table([f for f in fits if f.converged], data, times),
              "fit_check": check}
    written = {**names, "patients": patients_file}
    return FitRun(data, fits, chosen, tables, files, summary(data, fits, chosen, check, unit,
                                                             horizon, patients, seed, written))


def summary(data: SurvivalData, fits: list[Fit], chosen: Fit, check: pd.DataFrame, unit: str,
            horizon: float, patients: int, seed: int, files: dict[str, str | None]) -> dict:
    """What the run found, as a document (fit_summary.json); `files` names the written
    scenario, block and patients file (None without covariates)."""
    worst, limit = float(np.abs(check.z_fitted).max()), Z_LIMIT
    return {
        "data": str(data.path), "data_sha256": data.sha256, "patients": data.size,
        "events": data.events, "time": data.time_column, "event": data.event_column,
        "entry": data.entry_column, "covariates": list(data.covariates),
        "attributes": {t.name: {"attribute": t.attribute, "level": t.level} for t in data.terms},
        "categorical": [{"attribute": c.attribute, "levels": list(c.levels),
                         "shares": list(c.shares), "reference": c.reference}
                        for c in data.categorical], "unit": unit,
        "horizon": horizon, "longest_follow_up": float(data.time.max()),
        "chosen": {"family": chosen.family.name, "form": chosen.form, "label": chosen.label,
                   "aic": chosen.aic, "log_likelihood": chosen.log_likelihood},
        "ranking": [{"family": f.family.name, "form": f.form, "label": f.label,
                     "aic": f.aic, "converged": f.converged} for f in fits],
        "check": {"patients": patients, "seed": seed, "largest_abs_z": worst,
                  "agrees": worst < limit,
                  "words": (f"the written scenario, simulated for {patients} patients, follows "
                            f"the fitted survival within |z| < {limit:g} at every time "
                            f"(largest |z| {worst:.2f})" if worst < limit else
                            f"the written scenario's simulated survival departs from the fitted "
                            f"one (largest |z| {worst:.2f}): look into it before using it")},
        "files": files, "caution": CAUTION,
    }
