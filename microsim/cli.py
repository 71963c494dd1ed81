"""The command line: thin wrappers that read, call the API, print, and write outputs.

Bad input (a `ScenarioError`, a bad option, an --out that cannot take files) becomes one
line on stderr and exit code 2, before any work and before anything is written; every
command that writes puts its tables and a manifest in `<out>/<scenario name>/` atomically.
Results that cannot be stored (a full disk) are one line and exit code 74.
"""
from __future__ import annotations

import argparse
import os
import json
import re
import sys
import time
from contextlib import nullcontext
from pathlib import Path

from microsim import CAUTION
from microsim.present import show
from microsim.scenario import ScenarioError, read_scenario
from microsim.scenario.fields import did_you_mean, MAX_PATIENTS
from microsim.store import OutputError
from microsim.scenario.spec import INVALID_DRAWS
from microsim.decision.measures import MEASURES

EXIT_BAD_INPUT = 2
# EX_IOERR of BSD's sysexits.h (common practice): the input was fine, the results could
# not be stored; distinct from 2 so that a script can tell "fix the command" from "free
# the disk and run the same command again".
EXIT_NOT_WRITTEN = 74
EXIT_INTERRUPTED = 130  # the shell's code for Ctrl-C
EXIT_BROKEN_PIPE = 141  # 128 + SIGPIPE: what a shell reports for a closed pipe


def out_dir(args, scenario_path: Path) -> Path:
    return Path(args.out) / scenario_path.stem


def psa_dir(args) -> Path:
    return out_dir(args, Path(args.scenario)) / "psa"


def check_output(args) -> None:
    """Refuse an --out that cannot take the command's files, before any work."""
    from microsim.store import unwritable
    if not str(args.out).strip():
        raise ScenarioError("--out", "is empty; give the folder the run folders go under "
                                     "(default: outputs)")
    folders = [out_dir(args, Path(args.data if args.command == "fit" else args.scenario))]
    if getattr(args, "psa", False):
        folders.append(psa_dir(args))
    for folder in folders:
        problem = unwritable(folder)
        if problem:
            raise ScenarioError("--out", problem)


def run_seed(args, scenario) -> int:
    return scenario.simulation.seed if args.seed is None else args.seed


def write(args, path: Path, tables: dict, started: float, documents: dict | None = None,
          quiet: bool = False, files: dict | None = None, data_file: bool = False,
          **extra) -> Path:
    """A new run folder under `<out>/<scenario>/` with the command's tables, documents and
    files, a copy of the scenario and the manifest; `latest` points at it. With
    `data_file`, `path` is a data file: the manifest names it and its hash, and it is not
    copied."""
    from microsim.store import file_hash, manifest, write_run
    if data_file:
        extra = {"data": str(path), "data_sha256": file_hash(path), **extra}
    folder = write_run(out_dir(args, path), args.command, tables,
                       manifest(None if data_file else path, started, args.argv, **extra),
                       documents=documents, files=files, scenario=None if data_file else path)
    if not quiet:
        count = f"{len(tables)} table{'s' if len(tables) != 1 else ''}"
        others = "".join(f", {name}" for name in (files or {}))
        print(f"\nwrote {count} (CSV and Parquet){others} and manifest.json to {folder}/")
    return folder


def command_check(args) -> int:
    from microsim.patients.population import check_population_file
    scenario = read_scenario(args.scenario)
    check_population_file(scenario)  # a population file's columns against their uses
    kind = "cycle model (per-cycle probabilities)" if scenario.discrete else "rate model (continuous time)"
    horizon = "lifetime" if scenario.time.horizon is None else f"{scenario.time.horizon:g}"
    print(f"ok: {scenario.title} — {len(scenario.states)} states, {len(scenario.transitions)} "
          f"transitions, {len(scenario.events)} events; {kind}; horizon {horizon} "
          f"{scenario.time.unit}")
    for warning in scenario.warnings:
        print(f"warning: {warning}")
    reasons = counterpart_reasons(scenario)
    if reasons:
        print(f"note: no exact analytic counterpart ({'; '.join(reasons)}): validation shows "
              "the simulation beside an approximation and tests nothing, and the PSA's exact "
              "basis is refused")
    return 0


def counterpart_reasons(scenario) -> list[str]:
    """Why the model (under any strategy) has no exact counterpart; none for a service with
    shared capacity, whose validation is of another kind."""
    from microsim.binding import bind
    from microsim.cohort.expand import expand
    from microsim.decision.strategies import strategy_names
    if scenario.capacity is not None:
        return []
    reasons = [r for name in strategy_names(scenario) or [None]
               for r in expand(bind(scenario, strategy=name)).reasons]
    return list(dict.fromkeys(reasons))


def scenario_options(args) -> dict:
    """The options given that override scenario keys, as the keys' values."""
    from microsim.scenario.options import KEYS, toml_values
    return toml_values({key: getattr(args, key, None) for key in KEYS})


def begin(args) -> tuple[float, Path, object]:
    """Start a command's clock and read its scenario (refusing bad input before any work)."""
    started = time.perf_counter()
    path = Path(args.scenario)
    scenario = read_scenario(path, options=scenario_options(args))
    say_warnings(scenario)
    return started, path, scenario


def say_warnings(scenario) -> None:
    for warning in scenario.warnings:  # what `check` warns of, said before the work too
        print(f"warning: {warning}", file=sys.stderr)


def cohort_note(scenario) -> str:
    """Say what the cohort commands' single cohort is when patients differ (or share
    capacity, which a cohort cannot)."""
    if scenario.capacity is not None:
        return ("\nNote: the cohort ignores [arrivals] and [[resources]]: it follows one "
                "patient who never waits; `microsim run` simulates the service with its "
                "queues.")
    if any(t.effects for t in scenario.transitions) or any(e.effects for e in scenario.events) \
            or scenario.start.effects:
        return ("\nNote: one uniform cohort, every patient given the population's mean "
                "attributes (the 'average patient'); `microsim validate` or `run` simulates "
                "the heterogeneous population and shows how far this cohort is from it.")
    return ""


def strategy_model(scenario, strategy: str | None):
    """The model the cohort commands follow: one strategy's (`--strategy`), or the model as
    written; an unknown name is refused as `validate --strategy` refuses it."""
    from microsim.binding import bind
    from microsim.workflow import refuse_unknown_strategy
    refuse_unknown_strategy(scenario, strategy)
    return bind(scenario, strategy=strategy)


def of_strategy(strategy: str | None) -> str:
    return "" if strategy is None else f", strategy {strategy}"


def command_trace(args) -> int:
    """The analytic cohort trace."""
    from microsim.cohort.summaries import cohort_trace
    started, path, scenario = begin(args)
    model = strategy_model(scenario, args.strategy)
    trace = cohort_trace(model)
    wide = trace.pivot(index="time", columns="state", values="share")[list(model.states)]
    show(f"Cohort trace — {scenario.title}{of_strategy(args.strategy)} (share of the cohort "
         "in each state)",
         wide.reset_index(), rows=args.rows)
    write(args, path, {"cohort_trace": trace}, started)
    print(f"{cohort_note(scenario)}\n{CAUTION}")
    return 0


def command_chain(args) -> int:
    """Per-cycle probabilities, steady state, absorption (closed form and/or up to the end)
    and expected outcomes of the cohort; each part says which form it takes and why."""
    from microsim.cohort.summaries import chain_summary, expected_outcomes
    started, path, scenario = begin(args)
    model = strategy_model(scenario, args.strategy)
    summary = chain_summary(model)
    print(f"Summary — {scenario.title}{of_strategy(args.strategy)}")
    for note in summary.notes:
        print(f"\nNote: {note}")
    for part in summary.parts:
        if part.table is None:
            print(f"\n{part.heading}: {part.note}")
            continue
        show(part.heading, part.table)
        if part.note:
            print(part.note)
    outcomes = expected_outcomes(model)
    rule = f"; within-cycle correction {model.correction}" if model.discrete else ""
    show(f"Expected outcomes per patient (discounted as [outcomes] says: effective rates per "
         f"{scenario.time.unit.rstrip('s')} of {model.discount_costs:g} for costs and "
         f"{model.discount_effects:g} for effects{rule})", outcomes)
    write(args, path, {**summary.tables(), "expected_outcomes": outcomes}, started)
    print(f"{cohort_note(scenario)}\n{CAUTION}")
    return 0


PSA_OPTIONS = ("draws", "patients_per_draw", "workers", "backend", "address", "invalid_draws",
               "evppi", "evpi_years", "evpi_discount", "basis")
ANALYSIS_OPTIONS = {"psa": ("the PSA", PSA_OPTIONS),
                    "sensitivity": ("the sensitivity analysis", ("two_way", "break_even", "grid")),
                    "budget": ("the budget impact", ("budget_years", "prevalent_patients"))}


def refuse_idle_options(args) -> None:
    """An option of an analysis the run does not do is refused, not ignored."""
    for flag, (what, names) in ANALYSIS_OPTIONS.items():
        if getattr(args, flag):
            continue
        given = next((name for name in names if getattr(args, name) is not None), None)
        if given is not None:
            option = "--" + given.replace("_", "-")
            raise ScenarioError(option, f"only acts on {what}; add --{flag}, or leave it out")
    if args.incidence is not None and not (args.psa or args.budget):
        raise ScenarioError("--incidence", "only acts on population EVPI (--psa) and the "
                                           "budget impact (--budget); add one, or leave it out")


def check_analyses(scenario, sensitivity: bool = False, budget: bool = False) -> None:
    """The sensitivity analysis and the budget impact are refused before any work: not yet
    for a service with shared capacity, nor without what they need."""
    for asked, name, what in ((sensitivity, "sensitivity", "sensitivity analysis"),
                              (budget, "budget", "the budget impact")):
        if asked and scenario.capacity is not None:
            raise ScenarioError(name, f"{what} of a service with shared capacity "
                                "([arrivals], [[resources]]) is not available yet")
    if sensitivity:
        from microsim.uncertainty.one_way import ranged_parameters
        ranged_parameters(scenario.parameters)
    if budget:
        from microsim.decision.budget_impact import check_budget
        check_budget(scenario)


def command_run(args) -> int:
    """The main job: strategies on the same patients, validation, evaluation, PSA."""
    refuse_idle_options(args)
    from microsim.capacity.present import print_service, service_summary
    from microsim.capacity.run import ServiceResult
    from microsim.present import print_summary, summary
    from microsim.workflow import run_main
    started = time.perf_counter()
    path = Path(args.scenario)
    scenario = read_scenario(path, options=scenario_options(args))
    say_warnings(scenario)
    check_analyses(scenario, args.sensitivity, args.budget)  # they follow the run
    psa = None
    if args.psa:
        psa = {"run_dir": psa_dir(args), "draws": args.draws,
               "patients": args.patients_per_draw, "workers": args.workers or 1,
               "backend": args.backend or "processes", "address": args.address,
               "progress": not args.json}
    result = run_main(scenario, args.patients, args.seed, psa, args.engine)
    tables = dict(result.tables)
    if isinstance(result, ServiceResult):  # shared capacity: its own summary
        data, report = service_summary(result), print_service
    else:
        data, report = summary(result), print_summary
        if args.sensitivity:
            from microsim.uncertainty.deterministic import sensitivity_tables
            tables.update(sensitivity_tables(result.scenario, args.patients, result.seed))
        if args.budget:
            from microsim.decision.budget_impact import budget_tables
            tables.update(budget_tables(result.scenario, args.patients, result.seed))
    if args.json:
        print(json.dumps(data, indent=2))
    else:
        report(result)
        if not isinstance(result, ServiceResult):  # what --sensitivity and --budget added
            from microsim.present import print_budget, print_sensitivity
            if args.sensitivity:
                print_sensitivity(result.scenario, tables)
            if args.budget:
                print_budget(result.scenario, tables)
    folder = write(args, path, tables, started, documents={"summary": data},
                   quiet=args.json, seed=result.seed, patients=data["patients"])
    if args.report:
        report = make_report(folder)
        if not args.json:
            print(f"wrote {report}")
    if not args.json:
        print(f"\n{CAUTION}")
    return 0


def make_report(folder: Path) -> Path:
    """report.html (and figures/) in a run folder, or fit.html again in a fit's; the
    manifest then lists them too."""
    from microsim.report.builder import build_report
    from microsim.report.fit_page import SUMMARY, rebuild_fit_page
    from microsim.store import add_to_manifest
    report = rebuild_fit_page(folder) if (folder / SUMMARY).is_file() else build_report(folder)
    add_to_manifest(folder)
    return report


def command_report(args) -> int:
    """The HTML page of an existing run folder: report.html of a run, fit.html of a fit (an
    output folder means its newest run, else its newest fit)."""
    from microsim.store import latest_run
    folder = Path(args.folder)
    print(f"wrote {make_report(latest_run(folder, 'run') or latest_run(folder, 'fit') or folder)}")
    return 0


def command_validate(args) -> int:
    """Simulate the model (or one strategy) and compare it with its analytic counterpart.
    Histories stream into a scratch folder and move in with the run's other files, or
    vanish with it when the run is refused or stopped."""
    from microsim.store import scratch_folder
    started = time.perf_counter()
    path = Path(args.scenario)
    scenario = read_scenario(path)
    say_warnings(scenario)
    with scratch_folder(out_dir(args, path)) if args.histories else nullcontext() as scratch:
        histories = scratch / "histories.parquet" if args.histories else None
        return validation_report(args, path, scenario, started, histories)


def validation_report(args, path: Path, scenario, started: float,
                      histories: Path | None) -> int:
    from microsim.capacity.present import VALIDATION_TABLES, print_validation
    from microsim.capacity.run import ServiceResult
    from microsim.workflow import validate
    check = validate(scenario, args.patients, args.seed, args.strategy, histories=histories,
                     engine=args.engine)
    if isinstance(check, ServiceResult):  # shared capacity: queues against queueing theory
        print_validation(check)
        write(args, path, {k: check.tables[k] for k in VALIDATION_TABLES}, started,
              seed=check.seed, verdict=next(iter(check.validations.values())).verdict)
        print(f"\n{CAUTION}")
        return 0
    c = next(iter(check.validations.values()))
    subject = "the model as written" if args.strategy is None else f"strategy {args.strategy}"
    seed = run_seed(args, scenario)
    print(f"Validation — {scenario.title}, {subject}: {check.size} patients, "
          f"seed {seed}\nCounterpart: {c.counterpart}")
    worst = c.shares.sort_values("p_value", kind="stable")
    show("State shares furthest from the counterpart, smallest p-value first (simulated, "
         "analytic, Monte-Carlo SE, z, p-value)", worst, rows=12)
    show("Outcomes per patient", c.outcomes)
    print(f"\n{c.verdict}")
    show("The 'average patient' cohort against the simulated population", c.average_patient)
    print(f"\n{c.average_verdict}")
    write(args, path, {"validation_shares": c.shares, "validation_subgroups": c.subgroups,
                       "validation_outcomes": c.outcomes, "validation_survival": c.survival,
                       "average_patient": c.average_patient}, started,
          files={"histories.parquet": histories} if histories else None,
          seed=seed, verdict=c.verdict)
    print(f"\n{CAUTION}")
    return 0


def command_population(args) -> int:
    from microsim.patients.population import describe_population
    from microsim.patients.population import patients_for
    started, path, scenario = begin(args)
    if scenario.population is None:
        raise ScenarioError("population", "the scenario has no population section to preview")
    seed = run_seed(args, scenario)
    people = patients_for(scenario, args.patients, seed)
    summary = describe_population(people)
    print(f"Population preview — {scenario.title}: {len(people)} patients, seed {seed}")
    show("Attributes", summary.attributes, rows=80)
    if len(summary.correlations):
        show("Correlations (Pearson, Spearman)", summary.correlations)
    write(args, path, {"population": people, "population_summary": summary.attributes,
                       "population_correlations": summary.correlations}, started, seed=seed)
    return 0


def command_sensitivity(args) -> int:
    from microsim.present import print_sensitivity
    from microsim.uncertainty.deterministic import sensitivity_tables
    started, path, scenario = begin(args)
    check_analyses(scenario, sensitivity=True)
    seed = run_seed(args, scenario)
    tables = sensitivity_tables(scenario, args.patients, seed, args.strategy, args.measure)
    print_sensitivity(scenario, tables)
    write(args, path, tables, started, seed=seed)
    print(f"\n{CAUTION}")
    return 0


def command_budget(args) -> int:
    from microsim.decision.budget_impact import budget_tables
    from microsim.present import print_budget
    started, path, scenario = begin(args)
    check_analyses(scenario, budget=True)
    seed = run_seed(args, scenario)
    tables = budget_tables(scenario, args.patients, seed)
    print_budget(scenario, tables)
    write(args, path, tables, started, seed=seed)
    print(f"\n{CAUTION}")
    return 0


def command_fit(args) -> int:
    """Fit every family to time-to-event data; write the chosen fit as a scenario, with its
    tables, figures and page."""
    from microsim.fitting.data import parse_references
    from microsim.fitting.run import CHECK_PATIENTS, fit_and_write
    from microsim.report.fit_page import write_fit_page
    from microsim.scenario.spec import SimulationSpec
    from microsim.store import scratch_folder
    started = time.perf_counter()
    path = Path(args.data)
    covariates = tuple(c.strip() for c in (args.covariates or "").split(",") if c.strip())
    seed = SimulationSpec().seed if args.seed is None else args.seed
    with scratch_folder(out_dir(args, path)) as scratch:
        run = fit_and_write(path, args.time, args.event, covariates, args.entry, args.unit,
                            scratch, family=args.family, form=args.form, name=args.name,
                            horizon=args.horizon, patients=args.patients or CHECK_PATIENTS,
                            seed=seed, references=parse_references(args.reference))
        print_fit(run)
        written = run.summary["files"]
        block = run.files[written["block"]].read_text()
        page, figures = write_fit_page(scratch, run.tables, run.summary, block)
        folder = write(args, path, run.tables, started, documents={"fit_summary": run.summary},
                       files={**run.files, page.name: page, figures.name: figures},
                       data_file=True, seed=seed)
    print(f"wrote {folder / written['scenario']} and {folder / page.name}")
    print(f"\n{CAUTION}")
    return 0


def print_fit(run) -> None:
    """The models ranked, a table of parameters per model, the written fit's covariance."""
    s = run.summary
    print(f"Fit — {s['data']}: {s['patients']} patients, {s['events']} events "
          f"(times in {s['unit']})")
    models = run.tables["fit_models"]
    show("Models by AIC (log-likelihood, AIC, BIC; converged fits first)",
         models[["rank", "label", "parameters", "log_likelihood", "aic", "bic", "delta_aic",
                 "converged"]])
    table = run.tables["fit_parameters"]
    for model in models.itertuples():
        mine = table[(table.family == model.family) & (table.form == model.form)]
        written = "; written to the scenario" if model.chosen else ""
        show(f"{model.rank}. {model.label}: log-likelihood {model.log_likelihood:.4f}, "
             f"AIC {model.aic:.2f}, BIC {model.bic:.2f}{written}",
             mine[["parameter", "estimate", "se", "lower", "upper", "natural",
                   "natural_value"]])
    chosen = run.chosen
    covariance = run.tables["fit_covariance"]
    mine = covariance[(covariance.family == chosen.family.name) & (covariance.form == chosen.form)]
    if len(mine):
        wide = mine.pivot(index="row", columns="column", values="covariance")
        show("Covariance of the written fit's estimates (inverse observed information; the "
             "PSA's multivariate normal)", wide.loc[list(chosen.names), list(chosen.names)]
             .rename_axis(None, axis=1).reset_index().rename(columns={"row": ""}))
    print("\nEstimates on the fit's scale with their standard errors (observed information) "
          "and 95% Wald intervals; natural: the value as the scenario reads it.")
    for c in s["categorical"]:
        print(f"\n{c['attribute']}: levels {', '.join(c['levels'])}; each level's coefficient "
              f"against the reference level {c['reference']!r} (--reference to choose another)")
    if run.data.age_at_entry:
        print("\nThe column 'age' (fixed at entry) is written as the attribute 'age_at_entry': "
              "a scenario's age is the attained age, which moves with time.")
    print(f"\nCheck: {s['check']['words']}.")


def command_benchmark(args) -> int:
    from microsim.benchmark import main as benchmark
    return benchmark(quick=args.quick)


def whole_number(low: int, high: int = MAX_PATIENTS):
    """An argparse type: a whole number from low to high, refused in words of our own."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be a whole number, got {text!r}") from None
        if not low <= value <= high:
            raise argparse.ArgumentTypeError(f"must be a whole number from {low} to {high}, "
                                             f"got {value}")
        return value
    return parse


COUNT, SEED, ROWS = whole_number(1), whole_number(0, 2**64 - 1), whole_number(0)

# argparse's complaints, reworded as (what, problem); {prog} is the command's name
ARGPARSE_WORDING = (
    (r"argument (?P<what>[^:]+): expected one argument", "needs a value after it"),
    (r"argument (?P<what>[^:]+): (?P<problem>.+)", "{problem}"),
    (r"the following arguments are required: (?P<what>[^,]+).*", "missing; see `{prog} --help`"),
    (r"ambiguous option: (?P<what>\S+?)(=\S*)? could match (?P<options>.+)",
     "could be any of {options}; spell it out"),
)


CHOICE = re.compile(r"argument (?P<what>[^:]+): invalid choice: '(?P<given>[^']*)' "
                    r"\(choose from (?P<choices>.+)\)")


class Parser(argparse.ArgumentParser):
    """argparse whose refusals are one line, like every other refusal, not the usage text."""

    def error(self, message: str):
        choice = CHOICE.fullmatch(message)
        if choice:
            options = re.findall(r"'([^']*)'", choice["choices"])
            raise ScenarioError(choice["what"], f"no {choice['given']!r}"
                                f"{did_you_mean(choice['given'], options)}; choose from "
                                f"{', '.join(options)}")
        for pattern, problem in ARGPARSE_WORDING:
            match = re.fullmatch(pattern, message)
            if match:
                raise ScenarioError(match["what"],
                                    problem.format(prog=self.prog, **match.groupdict()))
        raise ScenarioError(self.prog, f"{message}; see `{self.prog} --help`")


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(
        prog="microsim",
        description="Individual-level health microsimulation with a Markov backbone. " + CAUTION)
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def add(name, function, help_text, writes=True):
        sub = commands.add_parser(name, help=help_text, description=help_text)
        sub.add_argument("scenario", help="path to a scenario TOML file")
        sub.set_defaults(function=function)
        if writes:
            sub.add_argument("--out", default="outputs", help="output folder (default: outputs)")
        return sub

    def population_options(sub):
        sub.add_argument("--patients", type=COUNT, help="population size (default: the scenario's); "
                         "with [arrivals], the most arrivals per replication")
        sub.add_argument("--seed", type=SEED, help="run seed (default: the scenario's)")

    def sensitivity_options(sub):
        sub.add_argument("--two-way", metavar="A,B", help="also vary these two parameters "
                         "together over a grid of their ranges (sensitivity.two_way)")
        sub.add_argument("--break-even", metavar="NAME[,NAME]", help="also find where the "
                         "measure crosses 0 as each of these parameters runs over its range "
                         "(sensitivity.break_even)")
        sub.add_argument("--grid", help="values of each parameter from low to high, the base "
                         "value added (sensitivity.grid, default 7)")

    def population_reached(sub):
        sub.add_argument("--incidence", metavar="N[,N]", help="new patients a year, one "
                         "number or one per year (economics.incidence)")

    def budget_options(sub):
        sub.add_argument("--budget-years", help="calendar years of the budget impact "
                         "(economics.budget_years)")
        sub.add_argument("--prevalent-patients", help="patients already there at the start "
                         "of year 1 (economics.prevalent_patients)")

    def engine_option(sub):
        sub.add_argument("--engine", default="auto", choices=("auto", "simpy", "vectorised"),
                         help="auto (default): the vectorised engine for either model kind "
                              "(the SimPy capacity engine where patients share capacity); "
                              "vectorised: that engine, refused where patients share capacity; "
                              "simpy: the SimPy engine for either, the reference "
                              "(identical histories for cycle models, the same records for "
                              "rate models; tens of times slower: see the benchmark)")

    add("check", command_check, "Read and check a scenario file; print warnings.", writes=False)
    trace = add("trace", command_trace, "Print and write the analytic cohort trace.")
    trace.add_argument("--rows", type=ROWS, default=30, help="rows of the trace to print (default 30)")
    chain = add("chain", command_chain,
                "The cohort's Markov chain in figures: per-cycle probabilities, steady state, "
                "absorption (time in each state, where patients end), expected outcomes.")
    for sub in (trace, chain):
        sub.add_argument("--strategy", help="follow this strategy's cohort instead of the "
                         "model as written")
    validate = add("validate", command_validate, "Simulate the model and compare it, state by "
                   "state and time by time, with its analytic counterpart; say if they agree.")
    population_options(validate)
    engine_option(validate)
    validate.add_argument("--strategy", help="validate this strategy instead of the model as written")
    validate.add_argument("--histories", action="store_true",
                          help="also write every patient's history as histories.parquet")
    population_options(add("population", command_population,
                           "Preview the generated population: summary per attribute, correlations."))
    sensitivity = add("sensitivity", command_sensitivity,
                      "One-way sensitivity over the parameters' low/high ranges (tornado data).")
    population_options(sensitivity)
    sensitivity.add_argument("--strategy", help="the strategy whose result is varied (default: "
                             "every strategy the measure applies to)")
    sensitivity.add_argument("--measure", help=f"what is varied, one of: {', '.join(MEASURES)} "
                             "(default: incremental_nmb against the comparator; nmb for a "
                             "scenario without strategies)")
    sensitivity_options(sensitivity)
    budget = add("budget", command_budget, "Budget impact: each strategy's yearly cost to a "
                 "payer for the stated population, undiscounted, and its difference from the "
                 "comparator.")
    population_options(budget)
    population_reached(budget)
    budget_options(budget)
    run = add("run", command_run, "The main job: every strategy on the same simulated patients, "
              "validated against the analytic cohort, with costs, QALYs, increments, frontier, "
              "subgroups, and PSA when asked.")
    population_options(run)
    engine_option(run)
    run.add_argument("--json", action="store_true", help="print a machine-readable JSON summary")
    run.add_argument("--psa", action="store_true", help="also run the probabilistic sensitivity analysis")
    run.add_argument("--draws", type=COUNT, help="PSA outer draws (default: the scenario's)")
    run.add_argument("--patients-per-draw", type=COUNT, help="PSA: patients per draw "
                     "(uncertainty.patients_per_draw; default population.patients); on the "
                     "exact basis, the patients every draw shares")
    run.add_argument("--workers", type=COUNT, help="PSA worker processes (default 1)")
    run.add_argument("--backend", choices=("processes", "dask"),
                     help="PSA backend: local processes, or Dask (a LocalCluster, or --address)")
    run.add_argument("--address", help="address of a running Dask scheduler")
    run.add_argument("--invalid-draws", choices=INVALID_DRAWS,
                     help="what the PSA does with a draw whose values or rows are invalid "
                          "(default: the scenario's uncertainty.invalid_draws, else refuse)")
    run.add_argument("--basis", help="PSA: 'exact' evaluates each draw on the patients' "
                     "analytic expectations (no inner noise; models with an exact "
                     "counterpart), 'simulated' simulates it (uncertainty.basis)")
    run.add_argument("--evppi", action="append", metavar="NAME[,NAME]",
                     help="PSA: also the EVPPI of this parameter or group (repeat for more; "
                          "uncertainty.evppi)")
    run.add_argument("--evpi-years", help="PSA: years the decision holds, for population EVPI "
                     "(economics.evpi_years)")
    run.add_argument("--evpi-discount", help="PSA: yearly discount rate of population EVPI "
                     "(economics.evpi_discount)")
    population_reached(run)
    run.add_argument("--sensitivity", action="store_true",
                     help="also run the deterministic sensitivity (tornado data, incremental "
                          "NMB of every strategy; two-way and break-even when asked) and keep "
                          "it with the run")
    sensitivity_options(run)
    run.add_argument("--budget", action="store_true",
                     help="also the budget impact (economics.budget_years) with the run")
    budget_options(run)
    run.add_argument("--report", action="store_true",
                     help="also write report.html (figures, tables, verdicts) into the run folder")
    fit = commands.add_parser(
        "fit", help="Fit hazards to time-to-event data and write them as a scenario.",
        description="Fit the exponential, Weibull, Gompertz, log-normal, log-logistic and "
                    "generalised gamma families by maximum likelihood (right censoring, "
                    "delayed entry), covariates as proportional hazards where the family "
                    "allows it and as accelerated failure time for all; rank them by AIC and "
                    "write the chosen one as a scenario, with its covariance for the PSA. "
                    + CAUTION)
    fit.add_argument("data", metavar="DATA", help="a CSV or Parquet file, one row per patient")
    fit.add_argument("--time", required=True, help="the column of follow-up times (> 0)")
    fit.add_argument("--event", required=True,
                     help="the column of events: 1 (the event at that time) or 0 (censored); "
                          "yes/no reads as 1/0")
    fit.add_argument("--covariates", help="columns, comma-separated (A,B,...): numbers "
                     "(yes/no reads as 1/0), or text, one coefficient per level against a "
                     "reference level")
    fit.add_argument("--reference", metavar="COL=LEVEL,...",
                     help="the reference level of a text covariate (default: its first level "
                          "in sorted order)")
    fit.add_argument("--entry", help="the column of entry times (delayed entry, in [0, time))")
    fit.add_argument("--unit", default="years", help="the unit of the times (default years)")
    fit.add_argument("--family", choices=("exponential", "weibull", "gompertz", "lognormal",
                                          "loglogistic", "generalised_gamma"),
                     help="the family to write (default: the best by AIC)")
    fit.add_argument("--form", choices=("ph", "aft"), help="how the written fit's covariates "
                     "act: proportional hazards or accelerated failure time (default: the "
                     "better by AIC)")
    fit.add_argument("--name", default="event", help="the written transition's name, and the "
                     "prefix of its parameters (default event)")
    fit.add_argument("--horizon", type=float, help="the horizon of the curves and of the "
                     "written scenario (default: twice the longest follow-up, rounded up)")
    fit.add_argument("--patients", type=COUNT, help="patients simulated to check the written "
                     "scenario (default 5000)")
    fit.add_argument("--seed", type=SEED, help="seed of that simulation (and of the scenario)")
    fit.add_argument("--out", default="outputs", help="output folder (default: outputs)")
    fit.set_defaults(function=command_fit)
    report = commands.add_parser(
        "report", help="Write report.html for an existing run folder (fit.html for a fit's).",
        description="Write report.html (and figures/) for an existing run folder: the "
                    "decision, the figures, the tables, the verdicts and the manifest. For "
                    "a folder `microsim fit` wrote, make its fit.html (and figures/) again "
                    "from the fit's tables.")
    report.add_argument("folder", help="a folder `microsim run` or `microsim fit` wrote (e.g. "
                        "outputs/<scenario>, outputs/<data file>; its newest run, else fit)")
    report.set_defaults(function=command_report)
    bench = commands.add_parser("benchmark", help="Speed and variance ratios, measured in one run.")
    bench.add_argument("--quick", action="store_true", help="a shorter run")
    bench.set_defaults(function=command_benchmark)
    return parser


def interrupted(args) -> str:
    """What a stopped command leaves: its PSA's finished draws, or nothing new at all."""
    if getattr(args, "psa", False):
        return (f"interrupted: the PSA draws finished so far are kept in {psa_dir(args)}; "
                "run the same command again to resume")
    if hasattr(args, "out"):
        return "interrupted: nothing was written; outputs already there are unchanged"
    return "interrupted"


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    args = None
    try:
        args, unknown = build_parser().parse_known_args(argv)
        args.argv = argv
        if unknown:
            raise ScenarioError(unknown[0], f"unknown option or extra argument; see "
                                            f"`microsim {args.command} --help`")
        if hasattr(args, "out"):
            check_output(args)
        return args.function(args)
    except ScenarioError as error:
        from microsim.scenario.options import named_by_option  # a key an option gave
        given = {} if args is None else scenario_options(args)
        print(f"error: {named_by_option(error, given)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OutputError as error:
        print(f"error: --out: could not write {error.filename} ({error.strerror}); free some "
              "space or choose another --out, then run the same command again", file=sys.stderr)
        return EXIT_NOT_WRITTEN
    except KeyboardInterrupt:
        print(interrupted(args), file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # the reader of our output went away (`microsim trace ... | head`): stop quietly;
        # point stdout at nothing so the interpreter's final flush cannot fail again
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_BROKEN_PIPE
