"""A fit written as scenario text: a transition's hazard with its covariate effects, its
parameters, and their joint uncertainty, with where the numbers come from.

The block names its parameters `<name>_<key>` (`event_shape`, `event_fin`): values on the
scenario's scale, so the hazard reads them as they are; the 95% interval of each as `low`
and `high` (for one-way sensitivity); and one `[[uncertainty.multivariate_normal]]` over
all of them on the fit's own scale (log scale, log shape, coefficients) with the fit's
covariance, the log-scale members named in `on_log_scale`. A proportional-hazards fit
writes `coefficient` (a log hazard ratio), an accelerated-failure-time fit
`time_coefficient` (a log time ratio), as the fit estimated them: a column of numbers at its
centre (the data's mean), a level of a categorical covariate at its `level` (against the
reference level), whose attribute, levels and observed shares end the block as a commented
population attribute. Numbers are written with repr, so they read back bit for bit.
"""
from __future__ import annotations

import json
from datetime import datetime, timezone

import numpy as np

from microsim.fitting.data import ENTRY_AGE, SurvivalData
from microsim.fitting.estimate import Fit
from microsim.fitting.families import AFT
from microsim.fitting.kaplan_meier import Z95

FROM, TO = "at_risk", "after_event"  # the states of the scenario around the block


def number(x: float) -> str:
    return repr(float(x))


def parameter_names(fit: Fit, name: str) -> list[str]:
    return [f"{name}_{key}" for key in fit.family.parameters] + [
        f"{name}_{c}" for c in fit.covariates]


def provenance(fit: Fit, data: SurvivalData, unit: str, day: str) -> str:
    entry = f", entry from column {data.entry_column!r}" if data.entry_column else ""
    return (f"Fitted by `microsim fit` on {day} from {data.path.name} (SHA-256 "
            f"{data.sha256}): the {fit.label} model, by maximum likelihood; {data.size} "
            f"patients, {data.events} events, times in {unit} from column "
            f"{data.time_column!r}, events from {data.event_column!r}{entry}; "
            f"log-likelihood {fit.log_likelihood:.4f}, AIC {fit.aic:.2f}.")


def comment(text: str, width: int = 88) -> str:
    lines, line = [], "#"
    for word in text.split():
        if len(line) + 1 + len(word) > width:
            lines.append(line)
            line = "#"
        line += " " + word
    return "\n".join(lines + [line])


def block(fit: Fit, data: SurvivalData, name: str, unit: str, day: str | None = None) -> str:
    """The transition, [parameters] and the multivariate normal of a fit, with a comment
    that says where they come from."""
    day = day or datetime.now(timezone.utc).date().isoformat()
    names = parameter_names(fit, name)
    p = len(fit.family.parameters)
    hazard = ", ".join(f'{key} = "{n}"' for key, n in zip(fit.family.parameters, names))
    lines = [comment(provenance(fit, data, unit, day) + covariate_words(fit, data)),
             "[[transitions]]", f'from = "{FROM}"', f'to = "{TO}"', f'name = "{name}"',
             f'hazard = {{ family = "{fit.family.scenario}", {hazard} }}',
             'clock = "since_entry"']
    key = "time_coefficient" if fit.form == AFT else "coefficient"
    terms = {term.name: term for term in data.terms}
    for covariate, centre, parameter in zip(fit.covariates, fit.centres, names[p:]):
        term = terms[covariate]
        lines += ["", "  [[transitions.effects]]", f'  attribute = "{term.attribute}"']
        if term.level is None:
            lines += [f'  {key} = "{parameter}"', f"  centre = {number(centre)}"]
        else:
            lines += [f"  level = {json.dumps(term.level)}", f'  {key} = "{parameter}"']
    lines += ["", comment("Values on the scenario's scale; low and high: the 95% Wald interval "
                          "of the fit (on its own scale, mapped back)."), "[parameters]"]
    logged = list(fit.family.on_log) + [False] * len(fit.covariates)
    se = fit.se
    for n, estimate, error, log in zip(names, fit.estimate, se, logged):
        back = np.exp if log else float
        low, high = back(estimate - Z95 * error), back(estimate + Z95 * error)
        ranged = f", low = {number(low)}, high = {number(high)}" if np.isfinite(error) else ""
        lines.append(f"{n} = {{ value = {number(back(estimate))}{ranged} }}")
    if fit.covariance is not None:
        rows = ",\n  ".join("[" + ", ".join(number(c) for c in row) + "]"
                            for row in fit.covariance)
        lines += ["", comment("The fit's estimates and covariance (the inverse observed "
                              "information) on the scale it estimated them: the PSA draws "
                              "them together."),
                  "[[uncertainty.multivariate_normal]]", f"parameters = {json.dumps(names)}",
                  f"means = [{', '.join(number(x) for x in fit.estimate)}]",
                  f"covariance = [\n  {rows}]",
                  f"on_log_scale = {json.dumps([n for n, log in zip(names, logged) if log])}"]
    if fit.covariates and data.categorical:
        lines += ["", comment("A population that draws its attributes needs each categorical "
                              "one with its levels; with the shares observed in the data "
                              "(uncomment it under [population]; a population file needs the "
                              "column instead):")]
        for levels in data.categorical:
            lines += ["# [[population.attributes]]", f'# name = "{levels.attribute}"',
                      '# distribution = "categorical"', f"# levels = {json.dumps(levels.levels)}",
                      f"# shares = [{', '.join(number(x) for x in levels.shares)}]"]
    return "\n".join(lines) + "\n"


def covariate_words(fit: Fit, data: SurvivalData) -> str:
    """What the block's covariates stand for: where the base parameters are, which level
    each categorical covariate is compared with, and the age at entry."""
    if not fit.covariates:
        return ""
    words = (" Covariates are centred at the data's means, so the hazard's parameters "
             "describe a patient at those values." if not data.categorical else
             " Numeric covariates are centred at the data's means and each categorical one at "
             "its reference level (" + ", ".join(f"{c.attribute} {c.reference!r}"
                                                 for c in data.categorical)
             + "), so the hazard's parameters describe a patient at those values and each "
             "level's coefficient compares it with its reference.")
    if data.age_at_entry:
        words += (f" The data's column 'age' (fixed at entry) is the attribute '{ENTRY_AGE}': "
                  "a scenario's `age` is the attained age, which moves with time.")
    return words


def nice_cycle(horizon: float) -> float:
    """A report step: the horizon over 50, which divides it exactly in decimal."""
    return horizon / 50.0


def scenario(fit: Fit, data: SurvivalData, name: str, unit: str, horizon: float, seed: int,
             patients_file: str | None = None, day: str | None = None) -> str:
    """A whole scenario around the block: at risk -> after the event, the data's patients as
    the population (their covariates, in `patients_file` beside it: needed with
    covariates), over `horizon`."""
    day = day or datetime.now(timezone.utc).date().isoformat()
    title = f"Time to event fitted to {data.path.name}: {fit.label}"
    population = (f"\n[population]\npatients = {data.size}\nfile = {json.dumps(patients_file)}\n"
                  if fit.covariates else "")
    text = "\n".join([
        f"title = {json.dumps(title)}",
        f"description = {json.dumps('One way out of ' + FROM + ', fitted to patient-level data; the data file is described in the comment above the transition.')}",
        f"provenance = {json.dumps(provenance(fit, data, unit, day))}",
        "", "[time]", f'unit = "{unit}"', f"cycle = {number(nice_cycle(horizon))}",
        f"horizon = {number(horizon)}", "", "[start]", f"shares = {{ {FROM} = 1 }}", "",
        "[[states]]", f'name = "{FROM}"', "", "[[states]]", f'name = "{TO}"', "absorbing = true",
        population, "[simulation]", f"seed = {seed}", "", block(fit, data, name, unit, day)])
    return text
