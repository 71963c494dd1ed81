"""The main job, end to end: read, simulate every strategy on the same patients, compare
with the cohort, evaluate, report, write.

Kept apart from the CLI so that scripts and tests run exactly what `microsim run` runs.
"""
from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from microsim import CAUTION
from microsim.api import cohort_trace
from microsim.binding import bind
from microsim.compare import Comparison, compare
from microsim.decision import Decision, decide, run_strategies
from microsim.population import draw_population
from microsim.psa import PsaResult, parameter_uncertainty
from microsim.scenario import Scenario, ScenarioError, read_scenario
from microsim.simulate import Simulation, cohort_patients, report_grid, simulate

DEFAULT_PATIENTS = 2000


def patients_for(scenario: Scenario, size: int | None, seed: int) -> pd.DataFrame:
    spec = scenario.population
    n = size if size is not None else (spec.size if spec else DEFAULT_PATIENTS)
    if spec is not None and (spec.attributes or spec.file):
        return draw_population(spec, seed, np.arange(n))
    return cohort_patients(n)


@dataclass(frozen=True)
class Validation:
    simulation: Simulation
    comparison: Comparison


def validate(path: Path, patients: int | None = None, seed: int | None = None,
             strategy: str | None = None, histories: Path | None = None,
             engine: str = "auto") -> Validation:
    """Simulate the scenario (or one strategy) and compare it with its analytic counterpart."""
    scenario = read_scenario(path)
    if strategy is not None and strategy not in {s.name for s in scenario.strategies}:
        names = ", ".join(s.name for s in scenario.strategies) or "none"
        raise ScenarioError("--strategy", f"no strategy {strategy!r}; the scenario has: {names}")
    seed = scenario.simulation.seed if seed is None else seed
    model = bind(scenario, strategy=strategy)
    sim = simulate(model, patients_for(scenario, patients, seed), seed,
                   batch_size=scenario.simulation.batch_size,
                   grid=report_grid(model, scenario.simulation.grid), histories=histories,
                   engine=engine)
    return Validation(sim, compare(sim))


@dataclass(frozen=True)
class MainResult:
    scenario: Scenario
    seed: int
    simulations: dict[str, Simulation]
    validations: dict[str, Comparison]
    decision: Decision | None
    psa: PsaResult | None = None
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)


def run_main(path: Path, patients: int | None = None, seed: int | None = None,
             psa: dict | None = None, engine: str = "auto") -> MainResult:
    """Every strategy (or the model as written) on the same patients, validated against
    the analytic counterpart, evaluated, and with PSA when `psa` settings are given."""
    scenario = read_scenario(path)
    seed = scenario.simulation.seed if seed is None else seed
    people = patients_for(scenario, patients, seed)
    if scenario.strategies:
        sims = run_strategies(scenario, people, seed, engine=engine)
        decision = decide(scenario, sims)
    else:
        model = bind(scenario)
        sims = {"as written": simulate(model, people, seed,
                                       batch_size=scenario.simulation.batch_size,
                                       grid=report_grid(model, scenario.simulation.grid),
                                       engine=engine)}
        decision = None
    validations = {name: compare(sim) for name, sim in sims.items()}
    psa_result = None
    if psa is not None:
        psa_result = parameter_uncertainty(scenario, **psa)
    return MainResult(scenario, seed, sims, validations, decision, psa_result,
                      result_tables(scenario, sims, validations, decision, psa_result))


def result_tables(scenario, sims, validations, decision, psa) -> dict[str, pd.DataFrame]:
    first = next(iter(sims))
    tables = {"cohort_trace": cohort_trace(bind(scenario))}
    tables["validation_shares"] = pd.concat(
        [v.shares.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
    tables["validation_subgroups"] = pd.concat(
        [v.subgroups.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
    tables["validation_outcomes"] = pd.concat(
        [v.outcomes.assign(strategy=n) for n, v in validations.items()], ignore_index=True)
    tables["average_patient"] = validations[first].average_patient
    if decision is not None:
        tables.update({"patient_outcomes": decision.outcomes, "strategies": decision.strategies,
                       "increments": decision.increments,
                       "incremental_analysis": decision.analysis,
                       "net_benefit": decision.net_benefit, "subgroups": decision.subgroups,
                       "precision": decision.precision})
    if psa is not None:
        tables.update({"psa_draws": psa.results, "psa_parameters": psa.draws,
                       "acceptability": psa.acceptability, "evpi": psa.evpi,
                       "ce_plane": psa.plane, "psa_variance": psa.variance})
    return tables


def summary(result: MainResult) -> dict:
    """A machine-readable summary (for scripts): what the printed summary says."""
    s, d = result.scenario, result.decision
    out = {"scenario": s.title, "provenance": s.provenance, "seed": result.seed,
           "patients": len(next(iter(result.simulations.values())).patients),
           "validation": {n: {"agrees": v.agrees, "verdict": v.verdict,
                              "average_patient": v.average_verdict}
                          for n, v in result.validations.items()},
           "caution": CAUTION}
    if d is not None:
        out.update({
            "comparator": d.comparator, "threshold": d.threshold, "treated": d.treated,
            "currency": s.economics.currency,
            "strategies": records(d.strategies), "increments": records(d.increments),
            "incremental_analysis": records(d.analysis),
            "best_at_threshold": str(d.net_benefit.loc[d.net_benefit.best, "strategy"].iloc[0]),
            "subgroups": records(d.subgroups), "precision": records(d.precision)})
    if result.psa is not None:
        at = result.psa.acceptability
        near = at.loc[(at.threshold - s.economics.threshold).abs().idxmin(), "threshold"]
        out["psa"] = {"draws": int(result.psa.draws.shape[0]),
                      "acceptability_at_threshold": records(at[at.threshold == near]),
                      "evpi_at_threshold": records(result.psa.evpi[result.psa.evpi.threshold == near]),
                      "variance_split": records(result.psa.variance)}
    return out


def records(table: pd.DataFrame) -> list[dict]:
    return json.loads(table.to_json(orient="records"))


def print_summary(result: MainResult, show) -> None:
    s, d = result.scenario, result.decision
    first = next(iter(result.simulations.values()))
    print(f"microsim run — {s.title}\n{s.provenance}")
    print(f"{first.size} patients, seed {result.seed}" + (
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
            print(f"{spec.name}: treats {count} of {first.size} patients ({count / first.size:.1%})"
                  + ("" if count else " — warning: nobody is treated; check its eligibility "
                                      "and uptake"))
        table = d.strategies[d.strategies.measure.isin(["costs_discounted", "qalys_discounted",
                                                          "life_years"])]
        order = list(dict.fromkeys(table.strategy))
        means = table.pivot(index="strategy", columns="measure", values="mean").loc[order]
        errors = table.pivot(index="strategy", columns="measure", values="se").loc[order]
        show(f"Per strategy: mean per patient (Monte-Carlo SE); costs in {cur}, discounted",
             means.join(errors.add_suffix("_se")).reset_index())
        show(f"Increments against {d.comparator} on the same patients (95% CI)", d.increments)
        show("Incremental analysis (dominance, ICERs along the frontier)", d.analysis)
        best = d.net_benefit.loc[d.net_benefit.best, "strategy"].iloc[0]
        show(f"Net benefit at {d.threshold:g} {cur} per QALY — best: {best}", d.net_benefit)
        print("\nWho benefits (incremental NMB against the comparator, by subgroup):")
        for line in subgroup_headlines(d.subgroups):
            print(f"  {line}")
        show("Incremental net monetary benefit by subgroup (all)", d.subgroups, rows=60)
        target = ("the scenario's economics.precision" if s.economics.precision else
                  "a half-width equal to the estimate, i.e. until its sign is clear")
        show(f"Precision: patients needed for a 95% CI of incremental NMB with {target}",
             d.precision)
    for name, v in result.validations.items():
        print(f"\nValidation ({name}): {v.verdict}")
    first_validation = next(iter(result.validations.values()))
    print(f"\n{first_validation.average_verdict}")
    if result.psa is not None:
        p = result.psa
        near = (p.acceptability.threshold - s.economics.threshold).abs()
        at = p.acceptability[near == near.min()]
        show(f"PSA ({len(p.draws)} draws): probability each strategy is best", at)
        show("Expected value of perfect information per patient",
             p.evpi[(p.evpi.threshold - s.economics.threshold).abs() == near.min()])
        show("Inner/outer sample split (O'Hagan, Stevenson & Madan 2007)", p.variance)


def subgroup_headlines(subgroups: pd.DataFrame) -> list[str]:
    """One line per strategy: the subgroups where it clearly pays and clearly does not."""
    lines = []
    for name, rows in subgroups.groupby("strategy", sort=False):
        def listed(rows):
            return "; ".join(f"{r.attribute} = {r.level} ({r.incremental_nmb:+,.0f} +- "
                             f"{1.96 * r.se:,.0f})" for r in rows.itertuples()) or "none"
        pays = rows[rows.verdict.str.startswith("pays")]
        loses = rows[rows.verdict.str.startswith("does not pay")]
        lines.append(f"{name} pays for: {listed(pays)}")
        lines.append(f"{name} does not pay for: {listed(loses)}")
    return lines


def run_scenario(args) -> int:
    from microsim.cli import show, write
    started = time.perf_counter()
    path = Path(args.scenario)
    psa = None
    if args.psa:
        psa = {"run_dir": Path(args.out) / path.stem / "psa", "draws": args.draws,
               "patients": args.psa_patients, "workers": args.workers, "backend": args.backend,
               "address": args.address, "progress": not args.json}
    result = run_main(path, args.patients, args.seed, psa, args.engine)
    data = summary(result)
    if args.json:
        print(json.dumps(data, indent=2))
    else:
        print_summary(result, show)
    write(args, path, result.tables, started, documents={"summary": data}, quiet=args.json,
          seed=result.seed, patients=data["patients"])
    if not args.json:
        print(f"\n{CAUTION}")
    return 0
