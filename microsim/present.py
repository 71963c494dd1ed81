"""Printing results for a person: tables on the terminal, the run's summary in words, and
the same summary as a machine-readable document.

The CLI and scripts call these; nothing here computes a result.
"""
from __future__ import annotations

import json
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from microsim import CAUTION

if TYPE_CHECKING:
    from microsim.workflow import MainResult


def show(title: str, table: pd.DataFrame, rows: int = 40) -> None:
    print(f"\n{title}")
    if table.empty:
        print("(none)")
        return
    if len(table) <= rows:
        print(table.to_string(index=False, float_format=lambda x: f"{x:.6g}"))
        return
    hidden = len(table) - rows
    note = f"... ({hidden:,} row{'s' if hidden > 1 else ''} not shown)"
    if rows == 0:
        print(note)
        return
    head = (rows + 1) // 2  # exactly `rows` rows: the first half and the last
    shown = pd.concat([table.head(head), table.tail(rows - head)])
    lines = shown.to_string(index=False, float_format=lambda x: f"{x:.6g}").splitlines()
    cut = len(lines) - len(shown) + head  # below the header and the first rows
    print("\n".join(lines[:cut] + [note] + lines[cut:]))


def summary(result: MainResult) -> dict:
    """A machine-readable summary (for scripts): what the printed summary says."""
    s, d = result.scenario, result.decision
    out = {"scenario": s.title, "provenance": s.provenance, "seed": result.seed,
           "patients": result.population.size,
           "validated_patients": result.population.validated,
           "validation": {n: {"agrees": v.agrees, "verdict": v.verdict,
                              "average_patient": v.average_verdict}
                          for n, v in result.validations.items()},
           "caution": CAUTION}
    if d is not None:
        out.update({
            "comparator": d.comparator, "threshold": d.threshold, "treated": d.treated,
            "treated_by_treatment": result.population.treated_by,
            "currency": s.economics.currency,
            "strategies": records(d.strategies), "increments": records(d.increments),
            "incremental_analysis": records(d.analysis),
            "best_at_threshold": str(d.net_benefit.loc[d.net_benefit.best, "strategy"].iloc[0]),
            "subgroups": records(d.subgroups), "precision": records(d.precision)})
    if result.psa is not None:
        p = result.psa
        out["psa"] = {"draws": int(p.draws.shape[0]), "basis": p.basis,
                      "outcomes": records(p.outcomes), "tables_varied": list(p.tables[0]),
                      "tables_held_fixed": list(p.tables[1])}
        if p.note is not None:
            out["psa"]["note"] = p.note
        else:
            at = p.acceptability
            near = at.loc[(at.threshold - s.economics.threshold).abs().idxmin(), "threshold"]
            out["psa"].update({
                "acceptability_at_threshold": records(at[at.threshold == near]),
                "evpi_at_threshold": records(p.evpi[p.evpi.threshold == near]),
                "variance_split": None if p.variance is None else records(p.variance)})
            if "probability_best_noise_removed" in at:
                out["psa"]["noise_removed"] = NOISE_REMOVED
            if p.evppi is not None:
                out["psa"]["evppi_at_threshold"] = records(p.evppi[p.evppi.threshold == near])
            if "population_evpi" in p.evpi:
                out["psa"]["population"] = population_words(s.economics)
        out["psa"]["reused_draws"] = p.reused[0]
        if p.sampling is not None:
            out["psa"]["shared_patients_sampling_error"] = {
                "table": records(p.sampling), "summary": sampling_words(p, s.economics.currency)}
        out["psa"]["invalid_draws"] = {"policy": s.uncertainty.invalid_draws,
                                       "changed_draws": int(p.changed.draw.nunique()),
                                       "changes": records(p.changed),
                                       "summary": changed_draws(p)}
    return out


def records(table: pd.DataFrame) -> list[dict]:
    """The rows as JSON records, each number to its last digit (pandas' own JSON keeps 10,
    which wrote a value truncated to 0.9999999999999999 as 1.0); missing and infinite
    numbers as null, as pandas writes them."""
    rows = table.astype(object).to_dict(orient="records")
    return [{key: plain(value) for key, value in row.items()} for row in rows]


def plain(value):
    """A cell as JSON holds it: numpy scalars as Python numbers, nan and inf as None."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    if value is None or isinstance(value, bool | int | float | str):
        return value
    return None if pd.isna(value) else str(value)


def print_summary(result: MainResult) -> None:
    s, d = result.scenario, result.decision
    size = result.population.size
    print(f"microsim run — {s.title}\n{s.provenance}")
    print(f"{size} patients, seed {result.seed}" + (
        "; every strategy on the same patients with common random numbers." if d is not None
        else "; the model as written (the scenario defines no strategies)."))
    if d is None:
        v = next(iter(result.validations.values()))
        show("Outcomes per patient: simulated (Monte-Carlo SE) and the analytic counterpart",
             v.outcomes)
    if d is not None:
        cur = s.economics.currency
        for spec in s.strategies:
            if spec.comparator:
                continue
            count = d.treated[spec.name]
            each = result.population.treated_by.get(spec.name, {})
            print(f"{spec.name}: {count} of {size} patients ({count / size:.1%}) spend time "
                  f"on {'one of its treatments' if each else 'its treatment'}"
                  + (" (" + ", ".join(f"{t}: {n}" for t, n in each.items()) + ")" if each
                     else "")
                  + ("" if count else " — warning: nobody is treated; check its eligibility "
                                      "and uptake"))
        table = d.strategies[d.strategies.measure.isin(["costs_discounted", "qalys_discounted",
                                                          "life_years"])]
        order = list(dict.fromkeys(table.strategy))
        means = table.pivot(index="strategy", columns="measure", values="mean").loc[order]
        errors = table.pivot(index="strategy", columns="measure", values="se").loc[order]
        show(f"Per strategy: mean per patient (Monte-Carlo SE); costs in {cur}, discounted",
             means.join(errors.add_suffix("_se")).reset_index())
        roundoff_line(table, "_se")
        show(f"Increments against {d.comparator} on the same patients (95% CI)",
             d.increments.drop(columns="error"))
        roundoff_line(d.increments, " standard_error")
        show("Incremental analysis (dominance, ICERs along the frontier)", d.analysis)
        best = d.net_benefit.loc[d.net_benefit.best, "strategy"].iloc[0]
        show(f"Net benefit at {d.threshold:g} {cur} per QALY — best: {best}", d.net_benefit)
        if d.subgroups.empty:
            print("\nWho benefits: no subgroups, as the patients carry no category, yes/no "
                  "attribute or band (a [[population.derived]] band of a continuous attribute "
                  "makes one).")
        else:
            print("\nWho benefits (incremental NMB against the comparator, by subgroup):")
            for line in subgroup_headlines(d.subgroups):
                print(f"  {line}")
            show("Incremental net monetary benefit by subgroup (all)", d.subgroups, rows=60)
        target = ("the scenario's economics.precision" if s.economics.precision else
                  "a half-width equal to the estimate, i.e. until its sign is clear")
        show(f"Precision: patients needed for a 95% CI of incremental NMB with {target}",
             d.precision)
    if result.population.validated < size:
        print(f"\nValidation compares the first {result.population.validated:,} of the {size:,} "
              "patients with the analytic counterpart (simulation.validation_patients; "
              "`microsim validate` compares all).")
    for name, v in result.validations.items():
        print(f"\nValidation ({name}): {v.verdict}")
    for name, v in result.validations.items():
        print(f"\nAverage patient ({name}): {v.average_verdict}")
    if result.psa is not None:
        p = result.psa
        show(f"PSA ({len(p.draws)} draws; {p.basis}): mean per patient over the draws and the "
             "95% interval of the draws (2.5th to 97.5th percentile); costs discounted",
             p.outcomes)
        if any(p.tables):
            print(held_fixed(p))
        if p.reused[0]:
            print(reused_words(p))
        if p.sampling is not None:
            print(sampling_words(p, s.economics.currency))
        if p.note is not None:
            print(f"\nPSA: {p.note}.")
            print(f"\n{changed_draws(p)}")
            return
        near = (p.acceptability.threshold - s.economics.threshold).abs()
        at = p.acceptability[near == near.min()]
        show(f"PSA ({len(p.draws)} draws): probability each strategy is best", at)
        if "probability_best_noise_removed" in at:
            print(f"probability_best_noise_removed: {NOISE_REMOVED}.")
        show("Expected value of perfect information per patient"
             + (f"; population EVPI for {population_words(s.economics)}"
                if "population_evpi" in p.evpi else ""),
             p.evpi[(p.evpi.threshold - s.economics.threshold).abs() == near.min()])
        if p.evppi is not None:
            from microsim.uncertainty.evppi import cap_words
            rows = p.evppi[(p.evppi.threshold - s.economics.threshold).abs() == near.min()]
            show("Expected value of partial perfect information per patient (regression on "
                 "the PSA sample, Strong, Oakley & Brennan 2014; SE by wild bootstrap and "
                 "over the draws)", rows.drop(columns=["method", "edf", "edf_fits", "above_evpi"]))
            capped = cap_words(p.evppi, s.economics.currency,
                               simulated=s.uncertainty.basis == "simulated")
            if capped:
                print(capped)
            for group, method in rows[["group", "method"]].drop_duplicates().itertuples(index=False):
                print(f"  {group}: {method}")
        if p.variance is not None:
            show("Inner/outer sample split (O'Hagan, Stevenson & Madan 2007)", p.variance)
        print(f"\n{changed_draws(p)}")


def roundoff_line(table: pd.DataFrame, column: str) -> None:
    """Under a table shown: which of its standard errors are round-off shown as 0 (the
    `error` column of `strategies` and `increments`), each named by strategy, measure and
    the `column` it is printed in."""
    from microsim.decision.strategies import ROUNDOFF_SE
    still = table[table.error == ROUNDOFF_SE]
    if len(still):
        which = "every SE above" if len(still) == len(table) else ", ".join(
            f"{r.strategy} {r.measure}{column}" for r in still.itertuples())
        print(f"Monte-Carlo error of {which}: {ROUNDOFF_SE}.")


def print_sensitivity(scenario, tables: dict[str, pd.DataFrame]) -> None:
    """The deterministic sensitivity analyses: one-way (tornado data), the two-way grid,
    the break-even values."""
    from microsim.decision.measures import MEASURES
    from microsim.uncertainty.one_way import AS_WRITTEN
    table = tables["one_way"]
    first = table.iloc[0]
    what = MEASURES[first.measure]
    against = f" against {first.compared_with}" if isinstance(first.compared_with, str) else ""
    at = (f" at {scenario.economics.threshold:g} {scenario.economics.currency} per QALY"
          if first.measure.endswith("nmb") else "")
    for name, rows in table.groupby("strategy", sort=False):
        exact = rows.se_base.isna().all()
        hidden = ["strategy", "measure", "compared_with", "basis",
                  *(["se_low", "se_high", "se_base", "se_swing"] if exact else [])]
        subject = "the model as written" if name == AS_WRITTEN else name
        show(f"One-way sensitivity of {what} of {subject}{against}{at} "
             f"({rows.basis.iloc[0]}; tornado data, widest swing first)",
             rows.drop(columns=hidden))
    if "two_way" in tables:
        for name, rows in tables["two_way"].groupby("strategy", sort=False):
            a, b = rows.first_parameter.iloc[0], rows.second_parameter.iloc[0]
            grid = rows.pivot(index="first_value", columns="second_value", values="result")
            subject = "the model as written" if name == AS_WRITTEN else name
            show(f"Two-way sensitivity of {what} of {subject}{against}{at} ({rows.basis.iloc[0]}): "
                 f"rows {a}, columns {b}", grid.rename_axis(index=a, columns=b).reset_index())
    if "break_even" in tables:
        found = tables["break_even"]
        show(f"Break-even values: where {what}{against}{at} crosses 0 ({found.basis.iloc[0]}; "
             "SE by the delta method where simulated)",
             found[["strategy", "parameter", "low", "high", "value", "se", "lower", "upper"]])
        for row in found.itertuples():
            print(f"  {row.strategy}, {row.parameter}: {row.finding}")


def print_budget(scenario, tables: dict[str, pd.DataFrame]) -> None:
    """The budget impact: cost per patient by year since entry, then the payer's yearly
    cost of each strategy for the stated population."""
    e, cur = scenario.economics, scenario.economics.currency
    per_patient, impact = tables["budget_costs_by_year"], tables["budget_impact"]
    basis = per_patient.basis.iloc[0]
    show(f"Cost per patient by year since entry ({cur}, undiscounted; {basis})",
         per_patient.drop(columns=["basis"]) if basis.startswith("simulated")
         else per_patient.drop(columns=["basis", "se"]))
    shown = ["year", "strategy", "new_patients", "patients_entered", "cost", "impact"]
    if impact.se.notna().any():
        shown[5:5] = ["se"]
        shown.append("impact_se")
    show(f"Budget impact ({cur} a year, undiscounted): {e.prevalent_patients:,} patients at "
         "the start and the new patients of each year, each cohort entering at the start of "
         "its year; impact against " + (impact.compared_with.iloc[0]
                                        if isinstance(impact.compared_with.iloc[0], str)
                                        else "no comparator (no strategies)"),
         impact[shown])
    from microsim.decision.budget_impact import ROUNDOFF_IMPACT
    if ((impact.impact == 0) & (impact.strategy != impact.compared_with)).any():
        print(f"Budget impact: {ROUNDOFF_IMPACT}.")


NOISE_REMOVED = ("the share of draws in which each strategy is best after each draw's "
                 "incremental net benefit is moved towards the mean by noise_scale = "
                 "sqrt(between / (between + within / n)), the inner patients' Monte-Carlo "
                 "noise taken out by the variance split (O'Hagan, Stevenson & Madan 2007; "
                 "constrained Bayes, Louis 1984)")


def population_words(e) -> str:
    """Who population EVPI counts, in words."""
    incidence = (f"{e.incidence[0]:,g} new patients a year" if len(e.incidence) == 1 else
                 "new patients a year of " + ", ".join(f"{x:,g}" for x in
                                                      e.incidence_by_year(e.evpi_years)))
    return (f"{incidence} over {e.evpi_years} years, discounted at {e.evpi_discount:g} a year "
            "(EVPI x sum of I_t / (1 + r)^t, t = 1..T)")


def reused_words(psa) -> str:
    """One line: the draws an earlier run of the same PSA had finished, read back."""
    found, where = psa.reused
    n = len(psa.draws)
    what = f"all {n} draws" if found == n else f"{found} of {n} draws"
    return (f"PSA: {what} reused from {where}, finished by an earlier run with the same "
            "scenario, seed, settings and parameter draws" + (
                "" if found == n else f"; the other {n - found} evaluated now") + ".")


def held_fixed(psa) -> str:
    """Which of the model's tables the PSA varies and which it holds fixed, in one line."""
    return "".join(tables_in_words(*psa.tables))


def tables_in_words(varied: list, fixed: list) -> list:
    """The sentence on the PSA's tables as text and names in order (a table varies only
    through the drawn parameters its entries name); the names are whatever is given, so
    the report can put in each as a key number tied to summary.json."""
    def joined(names: list) -> list:
        return [part for i, name in enumerate(names) for part in ([", "] if i else []) + [name]]
    parts = ["PSA tables: "]
    if varied:
        parts += ["varied through the drawn parameters they name: ", *joined(varied)]
    if fixed:
        parts += [*(["; "] if varied else []), "held fixed in every draw: ", *joined(fixed),
                  " (no entry names a drawn parameter; an entry that names one varies with it)"]
    return parts + ["."]


def sampling_words(psa, currency: str) -> str:
    """One line: the sampling error the exact basis carries in every draw alike (its
    shared patients are a sample of the population), by strategy and for each increment
    over the comparator, in the base case."""
    n = int(psa.results.patients.iloc[0])
    table = psa.sampling
    errors = table[["qalys_discounted_se", "costs_discounted_se"]].to_numpy()
    if not np.any(errors):  # nan (a single patient) is not 0, and is shown
        return (f"Exact basis: no inner Monte-Carlo noise, and the {n:,} patients every draw "
                "shares have the same values in the base case, so no sampling error either.")
    levels = "; ".join(f"{r.strategy} {r.qalys_discounted_se:.3g} QALYs and "
                       f"{r.costs_discounted_se:,.3g} {currency}" for r in table.itertuples())
    others = table.iloc[1:]
    increments = "" if others.empty else (
        f"; of the increments over {table.strategy.iloc[0]}, paired by patient: " + "; ".join(
            f"{r.strategy} {r.incremental_qalys_se:.3g} QALYs, {r.incremental_costs_se:,.3g} "
            f"{currency}, net monetary benefit {r.incremental_nmb_se:,.3g} {currency}"
            for r in others.itertuples()))
    return (f"Exact basis: no inner Monte-Carlo noise, but the {n:,} patients every draw shares "
            "are a sample of the population, so every draw's means are off the population's by "
            f"the same sampling error; its standard error in the base case: {levels}"
            f"{increments} (discounted; more patients per draw, --patients-per-draw, shrink it: "
            "no simulation, but more computing).")


def changed_draws(psa, listed: int = 5) -> str:
    """One line: which PSA draws were redrawn or truncated, and why (every draw is checked
    against every use of its values and every row before anything is simulated)."""
    changed, n = psa.changed, len(psa.draws)
    if changed.empty:
        return f"PSA draws: all {n} valid as drawn (every value in its range, every row at most 1)."
    first = changed.drop_duplicates("draw")
    if first.policy.iloc[0] == "redraw":
        items = [f"draw {r.draw} after {r.attempts} attempt{'s' if r.attempts > 1 else ''} "
                 f"({r.reason})" for r in first.itertuples()]
        what = f"{len(first)} of {n} draws were invalid and were drawn again"
    else:
        items = []
        for (parameter, reason), group in changed.groupby(["parameter", "reason"], sort=False):
            draws = group.draw.tolist()
            more = f" and {len(draws) - listed} more" if len(draws) > listed else ""
            r = group.iloc[0]
            items.append(f"{parameter} in draw{'s' if len(draws) > 1 else ''} "
                         f"{', '.join(map(str, draws[:listed]))}{more} (draw {r.draw}: "
                         f"{' -> '.join(apart(r.drawn, r.used))}; {reason})")
        what = (f"{len(changed)} value(s) in {len(first)} of {n} draws were outside their "
                "range and were truncated to it")
    more = f"; {len(items) - listed} more" if len(items) > listed else ""
    return (f"PSA draws: {what}: {'; '.join(items[:listed])}{more} (all in the "
            "psa_changed_draws table).")


def apart(a: float, b: float) -> tuple[str, str]:
    """a and b to the fewest significant digits (at least 6) that tell them apart."""
    for digits in range(6, 18):
        shown = f"{a:.{digits}g}", f"{b:.{digits}g}"
        if shown[0] != shown[1] or a == b:
            return shown
    return shown


def subgroup_headlines(subgroups: pd.DataFrame) -> list[str]:
    """Per strategy, the subgroups where its incremental NMB is clearly positive, clearly
    negative, and those where the 95% CI spans 0 (each with the estimate and its CI)."""
    lines = []
    for name, rows in subgroups.groupby("strategy", sort=False):
        def listed(rows):
            return "; ".join(f"{r.attribute} = {r.level} ({r.incremental_nmb:+,.0f}, 95% CI "
                             f"{r.incremental_nmb - 1.96 * r.se:+,.0f} to "
                             f"{r.incremental_nmb + 1.96 * r.se:+,.0f})"
                             for r in rows.itertuples()) or "none"
        for words, start in (("gains (95% CI above 0) in", "pays"),
                             ("loses (95% CI below 0) in", "does not pay"),
                             ("is uncertain (95% CI spans 0) in", "uncertain")):
            lines.append(f"{name} {words}: {listed(rows[rows.verdict.str.startswith(start)])}")
    return lines
