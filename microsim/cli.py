"""The command line: thin wrappers that read, call the API, print, and write outputs.

A `ScenarioError` (bad input) becomes one line on stderr and exit code 2, before anything
is written; every command that writes puts its tables and a manifest in
`<out>/<scenario name>/` atomically.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

from microsim import CAUTION
from microsim.present import show
from microsim.scenario import ScenarioError, read_scenario
from microsim.scenario.fields import MAX_PATIENTS

EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130  # the shell's code for Ctrl-C


def out_dir(args, scenario_path: Path) -> Path:
    return Path(args.out) / scenario_path.stem


def write(args, path: Path, tables: dict, started: float, documents: dict | None = None,
          quiet: bool = False, **extra) -> None:
    from microsim.store import manifest, write_run
    target = out_dir(args, path)
    write_run(target, tables, manifest(path, started, args.argv, **extra), documents=documents)
    if not quiet:
        count = f"{len(tables)} table{'s' if len(tables) != 1 else ''}"
        print(f"\nwrote {count} (CSV and Parquet) and manifest.json to {target}/")


def command_check(args) -> int:
    scenario = read_scenario(args.scenario)
    kind = "cycle model (per-cycle probabilities)" if scenario.discrete else "rate model (continuous time)"
    horizon = "lifetime" if scenario.time.horizon is None else f"{scenario.time.horizon:g}"
    print(f"ok: {scenario.title} — {len(scenario.states)} states, {len(scenario.transitions)} "
          f"transitions, {len(scenario.events)} events; {kind}; horizon {horizon} "
          f"{scenario.time.unit}")
    for warning in scenario.warnings:
        print(f"warning: {warning}")
    return 0


def begin(args) -> tuple[float, Path, object]:
    """Start a command's clock and read its scenario (refusing bad input before any work)."""
    started = time.perf_counter()
    path = Path(args.scenario)
    return started, path, read_scenario(path)


def cohort_note(scenario) -> str:
    """Say what the cohort commands' single cohort is when patients differ."""
    if any(t.effects for t in scenario.transitions) or any(e.effects for e in scenario.events):
        return ("\nNote: one uniform cohort, every patient given the population's mean "
                "attributes (the 'average patient'); `microsim validate` or `run` simulates "
                "the heterogeneous population and shows how far this cohort is from it.")
    return ""


def command_trace(args) -> int:
    """The analytic cohort trace."""
    from microsim.cohort.summaries import cohort_trace
    from microsim.binding import bind
    started, path, scenario = begin(args)
    trace = cohort_trace(bind(scenario))
    wide = trace.pivot(index="time", columns="state", values="share")[list(scenario.state_names)]
    show(f"Cohort trace — {scenario.title} (share of the cohort in each state)",
         wide.reset_index(), rows=args.rows)
    write(args, path, {"cohort_trace": trace}, started)
    print(f"{cohort_note(scenario)}\n{CAUTION}")
    return 0


def command_summary(args) -> int:
    """Per-cycle probabilities, steady state, absorption (closed form and/or up to the end)
    and expected outcomes of the cohort; each part says which form it takes and why."""
    from microsim.cohort.summaries import chain_summary, expected_outcomes
    from microsim.binding import bind
    started, path, scenario = begin(args)
    model = bind(scenario)
    summary = chain_summary(model)
    print(f"Summary — {scenario.title}")
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
    show(f"Expected outcomes per patient (discount rates per time unit, {scenario.time.unit}: "
         f"costs {model.discount_costs:g}, effects {model.discount_effects:g}; within-cycle "
         f"correction {model.correction})", outcomes)
    write(args, path, {**summary.tables(), "expected_outcomes": outcomes}, started)
    print(f"{cohort_note(scenario)}\n{CAUTION}")
    return 0


def command_run(args) -> int:
    """The main job: strategies on the same patients, validation, evaluation, PSA."""
    from microsim.present import print_summary, summary
    from microsim.workflow import run_main
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
        print_summary(result)
    write(args, path, result.tables, started, documents={"summary": data}, quiet=args.json,
          seed=result.seed, patients=data["patients"])
    if not args.json:
        print(f"\n{CAUTION}")
    return 0


def command_validate(args) -> int:
    """Simulate the model (or one strategy) and compare it with its analytic counterpart."""
    from microsim.workflow import validate
    started = time.perf_counter()
    path = Path(args.scenario)
    target = out_dir(args, path)
    check = validate(path, args.patients, args.seed, args.strategy,
                     histories=target / "histories.parquet" if args.histories else None,
                     engine=args.engine)
    c = check.comparison
    print(f"Validation — {check.simulation.model.scenario.title}: {check.simulation.size} "
          f"patients, seed {check.simulation.seed}\nCounterpart: {c.counterpart}")
    worst = c.shares.reindex(c.shares.z.abs().sort_values(ascending=False).index)
    show("State shares with the largest |z| (simulated, analytic, Monte-Carlo SE)", worst, rows=12)
    show("Outcomes per patient", c.outcomes)
    print(f"\n{c.verdict}")
    show("The 'average patient' cohort against the simulated population", c.average_patient)
    print(f"\n{c.average_verdict}")
    write(args, path, {"validation_shares": c.shares, "validation_subgroups": c.subgroups,
                       "validation_outcomes": c.outcomes,
                       "average_patient": c.average_patient}, started,
          seed=check.simulation.seed, verdict=c.verdict)
    print(f"\n{CAUTION}")
    return 0


def command_population(args) -> int:
    from microsim.patients.population import describe_population
    from microsim.patients.population import patients_for
    started, path, scenario = begin(args)
    if scenario.population is None:
        raise ScenarioError("population", "the scenario has no population section to preview")
    seed = scenario.simulation.seed if args.seed is None else args.seed
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
    from microsim.uncertainty.one_way import tornado
    started, path, scenario = begin(args)
    table, measure = tornado(scenario, args.patients, args.seed)
    show(f"One-way sensitivity of {measure} (tornado data, widest swing first)", table)
    write(args, path, {"one_way": table}, started)
    print(f"\n{CAUTION}")
    return 0


def command_benchmark(args) -> int:
    from microsim.benchmark import main as benchmark
    return benchmark(quick=args.quick)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
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
        sub.add_argument("--patients", type=int, help="population size (default: the scenario's)")
        sub.add_argument("--seed", type=int, help="run seed (default: the scenario's)")

    def engine_option(sub):
        sub.add_argument("--engine", default="auto", choices=("auto", "simpy", "vectorised"),
                         help="auto (default) or vectorised: the vectorised engine for either "
                              "model kind; simpy: the SimPy engine for either, the reference "
                              "(identical histories for cycle models, the same records for "
                              "rate models; several times slower)")

    add("check", command_check, "Read and check a scenario file; print warnings.", writes=False)
    trace = add("trace", command_trace, "Print and write the analytic cohort trace.")
    trace.add_argument("--rows", type=int, default=30, help="rows of the trace to print (default 30)")
    add("summary", command_summary,
        "Steady state, absorption times and probabilities, expected outcomes of the cohort.")
    validate = add("validate", command_validate, "Simulate the model and compare it, state by "
                   "state and time by time, with its analytic counterpart; say if they agree.")
    population_options(validate)
    engine_option(validate)
    validate.add_argument("--strategy", help="validate this strategy instead of the model as written")
    validate.add_argument("--histories", action="store_true",
                          help="also write every patient's history as histories.parquet")
    population_options(add("population", command_population,
                           "Preview the generated population: summary per attribute, correlations."))
    population_options(add("sensitivity", command_sensitivity,
                           "One-way sensitivity over the parameters' low/high ranges (tornado data)."))
    run = add("run", command_run, "The main job: every strategy on the same simulated patients, "
              "validated against the analytic cohort, with costs, QALYs, increments, frontier, "
              "subgroups, and PSA when asked.")
    population_options(run)
    engine_option(run)
    run.add_argument("--json", action="store_true", help="print a machine-readable JSON summary")
    run.add_argument("--psa", action="store_true", help="also run the probabilistic sensitivity analysis")
    run.add_argument("--draws", type=int, help="PSA outer draws (default: the scenario's)")
    run.add_argument("--psa-patients", type=int, help="PSA inner patients per draw")
    run.add_argument("--workers", type=int, default=1, help="PSA worker processes (default 1)")
    run.add_argument("--backend", choices=("processes", "dask"), default="processes",
                     help="PSA backend: local processes, or Dask (a LocalCluster, or --address)")
    run.add_argument("--address", help="address of a running Dask scheduler")
    bench = commands.add_parser("benchmark", help="Speed and variance ratios, measured in one run.")
    bench.add_argument("--quick", action="store_true", help="a shorter run")
    bench.set_defaults(function=command_benchmark)
    return parser


WHOLE_NUMBERS = {  # option: (smallest allowed, what it is)
    "patients": (1, "a population size"), "seed": (0, "a seed"), "draws": (1, "a number of draws"),
    "psa_patients": (1, "a number of patients"), "workers": (1, "a number of workers"),
    "rows": (0, "a number of rows")}


def check_numbers(args) -> None:
    """Command-line numbers are input too: refuse them like a bad field, in one line."""
    for name, (low, what) in WHOLE_NUMBERS.items():
        value = getattr(args, name, None)
        high = 2**64 - 1 if name == "seed" else MAX_PATIENTS
        if value is not None and not low <= value <= high:
            bound = f"from {low} to {high}"
            raise ScenarioError(f"--{name.replace('_', '-')}",
                                f"{what} must be a whole number {bound}, got {value}")


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    args = build_parser().parse_args(argv)
    args.argv = argv
    try:
        check_numbers(args)
        return args.function(args)
    except ScenarioError as error:
        print(f"error: {error}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("interrupted: finished PSA draws are kept; run the same command again to resume",
              file=sys.stderr)
        return EXIT_INTERRUPTED
