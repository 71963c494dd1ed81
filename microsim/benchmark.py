"""Speed and variance figures measured as ratios within one run (machines here are shared
and noisy, so absolute timings mean little; ratios of interleaved timings mean more).

- engine / bare SimPy: the event engine's transitions per second over bare SimPy timeouts
  per second, against two baselines measured beside it: one SimPy process doing nothing
  but timeouts (the cheapest SimPy can be), and the same timeouts replayed by one bare
  process per patient in the engine's grouping (SimPy's own cost for this workload);
- cycle engines: the SimPy cycle engine's patient-cycles per second over bare timeouts per
  second, and the compiled cycle engine's over the SimPy one's (their histories are
  identical, draw for draw), after a first tiny run that loads the compiled code;
- event engines: the SimPy event engine's time over the vectorised event engine's on the
  same rate model, patients and seed (the same records), for Weibull hazards with
  covariates and memory, and for the same with attained age acting on the Weibull hazards
  (a numerical root per draw), after a first tiny run of each that loads the compiled code;
- the cycle engine against numpy: the demo's patient-cycles per second as the main job
  simulates them (engine, aggregation, batches of simulation.batch_size), over the
  uniform numbers per second numpy's default generator fills in the same process (on one
  thread, and on every thread `microsim.threads` gives a run);
- exact against simulated PSA: time per draw of the demo's PSA on the exact basis over
  the simulated one at the same patients per draw, and the inner noise the exact basis
  removes (the simulated draw means' noise variance over the between-draw variance);
- exact products: the time of the demo's exact per-patient results (`analytic.cycle_result`)
  by the numpy reference over the compiled default (`microsim.cohort.compiled_products`),
  the same numbers to rounding;
- exact against simulated PSA on a rate model: the same ratio for a memoryless rate model
  whose patients differ by a continuous marker on two transitions (every patient its own
  generator: the exact basis costs matrix exponentials for each of them);
- PSA workers: the same PSA's time on one worker process over its time on two, each of one
  thread (every figure but the cycle engine's on all threads is taken on one thread; a
  bigger PSA than the others: with draws of a fraction of a second, starting workers would weigh most);
- memory: peak resident memory of `microsim run` on the demo (no histories; its tables
  written) in a fresh process at two population sizes; the growth per patient per
  strategy is the slope between them;
- common random numbers: the standard error of incremental QALYs on the demo scenario
  with shared draws, over the same with independent draws for the two strategies.

Targets (issue 8) are printed beside each figure with "met" or "missed".
"""
from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from importlib import resources
from pathlib import Path

import numpy as np
import simpy

from microsim import threads
from microsim.binding import bind
from microsim.patients.multipliers import cohort_multipliers
from microsim.engines import event_engine
from microsim.engines.histories import Histories
from microsim.engines.plan import paused_gc
from microsim.scenario import Scenario, parse_scenario, read_scenario
from microsim.patients.population import cohort_patients
from microsim.simulation import simulate

DEMO = "lakemoor_kidney.toml"


def demo_scenario() -> Scenario:
    """The demo scenario, read from the installed package: scenarios/ ships as the data
    package microsim.examples (see pyproject.toml), so this works wherever microsim runs."""
    with resources.as_file(resources.files("microsim.examples") / DEMO) as path:
        return read_scenario(path)

BENCH_MODEL = """
title = "benchmark: a relapsing condition with competing risks"
provenance = "All numbers are invented for benchmarking."
[time]
unit = "years"
horizon = 200
[start]
shares = { well = 1.0 }
[[states]]
name = "well"
[[states]]
name = "ill"
[[states]]
name = "dead"
absorbing = true
[[transitions]]
from = "well"
to = "ill"
rate = 0.3
[[transitions]]
from = "ill"
to = "well"
rate = 0.5
[[transitions]]
from = "well"
to = "dead"
rate = 0.01
[[transitions]]
from = "ill"
to = "dead"
rate = 0.05
"""


# Weibull progression and recovery by time in state, covariates, count memory, and flares
# whose effect wears off ('within' memory: change points); mortality by attained age has a
# closed form (Gompertz and constant bases). AGE_ON_WEIBULL adds attained age to both
# Weibull hazards, which then need a numerical root for every draw.
RATE_BENCH_MODEL = """
title = "benchmark: a relapsing condition with Weibull sojourns, covariates and memory"
provenance = "All numbers are invented for benchmarking."
[time]
unit = "years"
horizon = 40
[start]
shares = { well = 1.0 }
[[states]]
name = "well"
[[states]]
name = "ill"
[[states]]
name = "dead"
absorbing = true
[[transitions]]
from = "well"
to = "ill"
hazard = { family = "weibull", shape = 1.3, scale = 6 }
effects = [{ attribute = "diabetes", hazard_ratio = 1.5 },
           { attribute = "sex", level = "male", hazard_ratio = 1.2 }AGE_ON_WEIBULL]
memory = [{ after = "flare", multipliers = [1, 1.3, 1.8] }]
[[transitions]]
from = "ill"
to = "well"
hazard = { family = "weibull", shape = 0.8, scale = 2 }
effects = [{ attribute = "diabetes", hazard_ratio = 0.8 }AGE_ON_WEIBULL]
memory = [{ after = "ill", multipliers = [1, 1, 0.8, 0.6] }]
[[transitions]]
from = "well"
to = "dead"
hazard = { family = "gompertz", rate = 0.002, shape = 0.05 }
clock = "since_start"
effects = [{ attribute = "age", hazard_ratio = 1.05, centre = 60 }]
[[transitions]]
from = "ill"
to = "dead"
rate = 0.05
effects = [{ attribute = "age", hazard_ratio = 1.03, centre = 60 },
           { attribute = "diabetes", hazard_ratio = 1.4 }]
[[events]]
name = "flare"
states = ["well", "ill"]
rate = 0.6
memory = [{ after = "flare", within = 0.5, multiplier = 2 }]
[population]
patients = 5000
[[population.attributes]]
name = "age"
distribution = "normal"
mean = 60
sd = 9
lower = 35
upper = 90
[[population.attributes]]
name = "sex"
distribution = "categorical"
levels = ["female", "male"]
shares = [0.5, 0.5]
[[population.attributes]]
name = "diabetes"
distribution = "yesno"
prevalence = 0.3
"""
AGE_ON_WEIBULL = ', { attribute = "age", hazard_ratio = 1.03, centre = 60 }'

# Constant rates (memoryless), and a marker that differs continuously between patients on
# two transitions: the exact basis has a generator of its own for every patient.
MARKER_RATE_MODEL = """
title = "benchmark: a memoryless rate model with a continuous marker on two transitions"
provenance = "All numbers are invented for benchmarking."
[time]
unit = "years"
horizon = 30
[start]
shares = { well = 1.0 }
[[states]]
name = "well"
cost = 500
utility = 0.9
[[states]]
name = "ill"
cost = "c_ill"
utility = 0.6
[[states]]
name = "severe"
cost = 9000
utility = 0.4
[[states]]
name = "dead"
absorbing = true
[[transitions]]
from = "well"
to = "ill"
name = "onset"
rate = "r_onset"
effects = [{ attribute = "marker", hazard_ratio = "hr_marker", centre = 1.0 }]
[[transitions]]
from = "ill"
to = "severe"
rate = "r_worse"
effects = [{ attribute = "marker", hazard_ratio = "hr_marker", centre = 1.0 }]
[[transitions]]
from = "ill"
to = "well"
rate = 0.2
[[transitions]]
from = "well"
to = "dead"
rate = 0.01
[[transitions]]
from = "ill"
to = "dead"
rate = 0.03
[[transitions]]
from = "severe"
to = "dead"
rate = 0.15
[parameters]
r_onset = { value = 0.08, distribution = { family = "gamma", shape = 100, scale = 0.0008 } }
r_worse = { value = 0.1, distribution = { family = "gamma", shape = 100, scale = 0.001 } }
hr_marker = { value = 1.5, distribution = { family = "lognormal", meanlog = 0.405, sdlog = 0.05 } }
c_ill = { value = 3000, distribution = { family = "gamma", shape = 100, scale = 30 } }
hr_drug = { value = 0.7, distribution = { family = "lognormal", meanlog = -0.357, sdlog = 0.1 } }
[outcomes]
discount_costs = 0.035
discount_effects = 0.035
[population]
patients = 5000
[[population.attributes]]
name = "marker"
distribution = "lognormal"
meanlog = 0.0
sdlog = 0.4
[[strategies]]
name = "usual"
comparator = true
[[strategies]]
name = "drug"
  [[strategies.changes]]
  transition = "onset"
  hazard_ratio = "hr_drug"
  [[strategies.changes]]
  cost = 800
[economics]
threshold = 20000
[simulation]
seed = 5
"""


def event_engines_ratio(patients: int, repeats: int, attained_age: bool) -> dict:
    """Medians over interleaved repeats: the SimPy event engine's time over the vectorised
    one's, both given the same model, multipliers, patient ids and seed in one batch, after
    one warm-up run of each on a few patients (numba compiles the vectorised engine's loops,
    or loads them from its cache, once per process)."""
    from microsim.engines.vectorised_events import simulate_events_vectorised
    from microsim.patients.population import draw_population
    from microsim.patients.treatment import patient_multipliers
    text = RATE_BENCH_MODEL.replace("AGE_ON_WEIBULL", AGE_ON_WEIBULL if attained_age else "")
    model = bind(parse_scenario(text))
    ids = np.arange(patients)
    mult = patient_multipliers(model, draw_population(model.scenario.population, 1, ids), 1)
    ratios, vectorised = [], []
    for engine in (event_engine.simulate_events, simulate_events_vectorised):
        engine(model, mult.take(ids[:10]), ids[:10], seed=1)
    for _ in range(repeats):
        started = time.perf_counter()
        h = event_engine.simulate_events(model, mult, ids, seed=1)
        middle = time.perf_counter()
        simulate_events_vectorised(model, mult, ids, seed=1)
        ended = time.perf_counter()
        ratios.append((middle - started) / (ended - middle))
        vectorised.append(ended - middle)
    records = int(np.sum(h.risk >= 0))
    return {"ratio": float(np.median(ratios)), "records": records,
            "vectorised": records / float(np.median(vectorised))}


def bare_single(n: int) -> float:
    """Timeouts per second of one SimPy process doing nothing else."""
    env = simpy.Environment()

    def ticker():
        for _ in range(n):
            yield env.timeout(1.0)

    env.process(ticker())
    started = time.perf_counter()
    with paused_gc():  # the same conditions as the engines
        env.run()
    return n / (time.perf_counter() - started)


def bare_replay(h: Histories) -> float:
    """Timeouts per second when bare SimPy processes, one per patient, in the engine's
    groups, wait exactly the engine's sojourn times and do nothing else."""
    delays: list[list[float]] = [[] for _ in range(h.n_patients)]
    for b, dt in zip(h.patient[1:][h.patient[1:] == h.patient[:-1]],
                     np.diff(h.time)[h.patient[1:] == h.patient[:-1]]):
        delays[b].append(float(dt))
    n = sum(map(len, delays))

    def replay(waits, timeout):
        for dt in waits:
            yield timeout(dt)

    started = time.perf_counter()
    with paused_gc():  # the same conditions as the engines
        for lo in range(0, h.n_patients, event_engine.GROUP):
            env = simpy.Environment()
            for waits in delays[lo:lo + event_engine.GROUP]:
                env.process(replay(waits, env.timeout))
            env.run()
    return n / (time.perf_counter() - started)


def engine_ratio(patients: int, repeats: int) -> dict:
    """Medians over interleaved repeats of engine rate over each bare rate."""
    model = bind(parse_scenario(BENCH_MODEL))
    mult = cohort_multipliers(model).repeated(patients)
    ids = np.arange(patients)
    single, replayed, rates = [], [], []
    for _ in range(repeats):
        started = time.perf_counter()
        h = event_engine.simulate_events(model, mult, ids, seed=1)
        rate = int(np.sum(h.risk >= 0)) / (time.perf_counter() - started)
        rates.append(rate)
        single.append(rate / bare_single(100_000))
        replayed.append(rate / bare_replay(h))
    return {"engine": float(np.median(rates)), "vs_single": float(np.median(single)),
            "vs_replay": float(np.median(replayed)), "transitions": int(np.sum(h.risk >= 0))}


def cycle_ratio(patients: int) -> dict:
    """The cycle engines on the demo: patient-cycles per second of the SimPy cycle engine
    (over bare single-process timeouts) and of the vectorised one (over the SimPy one)."""
    model = bind(demo_scenario())
    people = cohort_patients(patients)
    rates = {}
    simulate(model, people.head(10), seed=1, engine="vectorised")  # loads the compiled code
    for engine in ("simpy", "vectorised"):
        started = time.perf_counter()
        sim = simulate(model, people, seed=1, engine=engine)
        elapsed = time.perf_counter() - started
        alive = ~model.absorbing[sim.states[:, :-1]]
        rates[engine] = int(alive.sum()) / elapsed
    return {"simpy": rates["simpy"], "vectorised": rates["vectorised"],
            "vs_single": rates["simpy"] / bare_single(100_000),
            "speedup": rates["vectorised"] / rates["simpy"]}


def crn_ratio(patients: int) -> dict:
    """SE of incremental QALYs with common random numbers over independent streams."""
    from microsim.decision.strategies import EFFECT, patient_outcomes, run_strategies, strategy_names
    from microsim.patients.population import patients_for
    scenario = demo_scenario()
    names = strategy_names(scenario)
    if len(names) < 2:
        return {}
    people = patients_for(scenario, patients, scenario.simulation.seed)
    shared = patient_outcomes(run_strategies(scenario, people, seed=11))
    other = patient_outcomes(run_strategies(scenario, people, seed=12))
    rows = {}
    for name in names[1:]:
        base = shared[shared.strategy == names[0]][EFFECT].to_numpy()
        paired = shared[shared.strategy == name][EFFECT].to_numpy() - base
        independent = other[other.strategy == name][EFFECT].to_numpy() - base
        rows[name] = float(np.std(paired, ddof=1) / np.std(independent, ddof=1))
    return rows


def uniform_rate(repeats: int = 5) -> float:
    """Uniform numbers per second of numpy's default generator filling a 1M buffer (the
    median of `repeats`)."""
    rng, out, rates = np.random.default_rng(1), np.empty(1_000_000), []
    rng.random(out=out)
    for _ in range(repeats):
        started = time.perf_counter()
        for _ in range(10):
            rng.random(out=out)
        rates.append(10 * out.size / (time.perf_counter() - started))
    return float(np.median(rates))


def cycle_against_numpy(patients: int) -> dict:
    """The demo's patient-cycles per second through `simulate` (the main job's path, in
    batches of simulation.batch_size) over numpy's uniform rate, measured before and after."""
    from microsim.patients.population import patients_for
    scenario = demo_scenario()
    model = bind(scenario, strategy=strategy_of(scenario))
    people = patients_for(scenario, patients, 1)
    simulate(model, people.head(10), seed=1, engine="vectorised")  # loads the compiled code
    before = uniform_rate()
    started = time.perf_counter()
    sim = simulate(model, people, seed=1, engine="vectorised",
                   batch_size=scenario.simulation.batch_size)
    elapsed = time.perf_counter() - started
    uniform = (before + uniform_rate()) / 2
    cycles = int((~model.absorbing[sim.states[:, :-1]]).sum())
    return {"rate": cycles / elapsed, "uniform": uniform, "ratio": cycles / elapsed / uniform,
            "seconds": elapsed}


def strategy_of(scenario: Scenario) -> str | None:
    """The demo's last strategy (the one that changes the most), or the model as written."""
    return scenario.strategies[-1].name if scenario.strategies else None


def psa_timings(draws: int, patients: int, runs=(("one", "simulated", 1), ("two", "simulated", 2),
                                                ("exact", "exact", 1))) -> dict:
    """Seconds of the demo's PSA for each of `runs` (name, basis, workers), with the same
    draws and patients per draw; and the first run's inner noise variance over its
    between-draw variance (the first strategy against the comparator)."""
    from microsim.uncertainty.psa import parameter_uncertainty
    scenario = demo_scenario()
    scenario = replace(scenario, uncertainty=replace(scenario.uncertainty, evppi=()))
    seconds, results = {}, {}
    with tempfile.TemporaryDirectory() as folder:
        for name, basis, workers in runs:
            model = replace(scenario, uncertainty=replace(scenario.uncertainty, basis=basis))
            started = time.perf_counter()
            results[name] = parameter_uncertainty(model, Path(folder) / name, draws=draws,
                                                  patients=patients, workers=workers,
                                                  progress=False)
            seconds[name] = time.perf_counter() - started
    split = results[runs[0][0]].variance.iloc[0]
    noise = split.within_draw_variance / split.patients_per_draw
    between = split.between_draw_variance
    if not between > 0:  # the draws' spread is all inner noise at this size
        return {**seconds, "noise_share": None, "needed": None, "equal": None}
    # patients a simulated draw needs for its noise to be EQUAL_NOISE of the spread, and
    # the simulated PSA's time then (taken as proportional to the patients per draw)
    needed = patients * noise / (EQUAL_NOISE / (1 - EQUAL_NOISE) * between)
    return {**seconds, "noise_share": noise / (between + noise), "needed": needed,
            "equal": (seconds["one"] * max(needed / patients, 1.0) / seconds["exact"]
                      if "exact" in seconds else None)}


EQUAL_NOISE = 0.05  # the simulated draws' inner noise as a share of their spread


def products_ratio(patients: int, repeats: int) -> dict:
    """Medians over interleaved repeats: seconds of the demo's exact per-patient results by
    the numpy products and by the compiled ones."""
    from microsim.cohort.analytic import cycle_result, matrix_products
    from microsim.cohort.compiled_products import compiled_products
    from microsim.cohort.expand import expand
    from microsim.patients.population import patients_for
    from microsim.patients.treatment import patient_multipliers
    scenario = demo_scenario()
    model = bind(scenario, strategy=strategy_of(scenario))
    mult, _ = patient_multipliers(model, patients_for(scenario, patients, 1), 1).unique()
    exp = expand(model)
    cycle_result(exp, mult.take(slice(0, 10)))  # loads the compiled code
    seconds = {"numpy": [], "compiled": []}
    for _ in range(repeats):
        for name, products in (("numpy", matrix_products), ("compiled", compiled_products)):
            started = time.perf_counter()
            cycle_result(exp, mult, products=products)
            seconds[name].append(time.perf_counter() - started)
    return {name: float(np.median(values)) for name, values in seconds.items()}


def rate_psa_timings(draws: int, patients: int, repeats: int) -> dict:
    """Medians over interleaved repeats: seconds of the PSA of MARKER_RATE_MODEL on the
    simulated basis and on the exact one, with the same draws and patients per draw."""
    from microsim.uncertainty.psa import parameter_uncertainty
    scenario = parse_scenario(MARKER_RATE_MODEL)
    seconds = {"simulated": [], "exact": []}
    with tempfile.TemporaryDirectory() as folder:
        for repeat in range(repeats):
            for basis in seconds:
                model = replace(scenario, uncertainty=replace(scenario.uncertainty, basis=basis))
                started = time.perf_counter()
                parameter_uncertainty(model, Path(folder) / f"{basis}{repeat}", draws=draws,
                                      patients=patients, progress=False)
                seconds[basis].append(time.perf_counter() - started)
    return {basis: float(np.median(values)) for basis, values in seconds.items()}


# The peak is the process's own high-water mark (VmHWM, reset by exec), not getrusage's
# ru_maxrss, which Linux carries over from the parent through fork and exec.
MEMORY_SCRIPT = """
import contextlib, io, sys, tempfile
from microsim.benchmark import demo_path
from microsim.cli import main
with demo_path() as path, tempfile.TemporaryDirectory() as out, \\
        contextlib.redirect_stdout(io.StringIO()):
    assert main(["run", str(path), "--patients", sys.argv[1], "--out", out]) == 0
with open("/proc/self/status") as status:
    kb = next(int(line.split()[1]) for line in status if line.startswith("VmHWM:"))
print(kb * 1024)
"""


def demo_path():
    """The installed demo scenario's path (a context manager)."""
    return resources.as_file(resources.files("microsim.examples") / DEMO)


def peak_memory(patients: int) -> int:
    """Peak resident bytes of `microsim run` on the demo in a fresh process. `-P` keeps the
    working folder off its path, so a source checkout there does not stand in for the
    installed package (whose demo lives in microsim.examples)."""
    done = subprocess.run([sys.executable, "-P", "-c", MEMORY_SCRIPT, str(patients)],
                          capture_output=True, text=True)
    if done.returncode:
        last = (done.stderr.strip().splitlines() or ["no message"])[-1]
        raise RuntimeError(f"the memory measurement's process failed: {last}")
    return int(done.stdout.split()[-1])


def verdict(value: float, target: float, larger_is_better: bool = True) -> str:
    met = value >= target if larger_is_better else value <= target
    return "met" if met else "missed"


def main(quick: bool = False) -> int:
    print("microsim benchmark (ratios of timings interleaved in one run)")
    if quick:
        print("--quick: small runs whose ratios swing from run to run; judge the targets on a "
              "run without --quick")
    n = 50_000 if quick else 1_000_000
    for used in sorted({1, threads.count()}):
        threads.use(used)
        c = cycle_against_numpy(n)
        print(f"Compiled cycle engine, demo scenario, {n:,} patients (the main job's path), "
              f"{used} thread{'s' if used > 1 else ''}: {c['rate']:,.0f} patient-cycles/s against "
              f"numpy's {c['uniform']:,.0f} uniforms/s (one thread): ratio {c['ratio']:.3f} "
              f"(target >= 0.03, aim 0.1: {verdict(c['ratio'], 0.03)}; {c['seconds']:.1f} s)")
    threads.use(1)  # every other figure compares engines, or workers, one thread each
    e = engine_ratio(patients=1000 if quick else 4000, repeats=1 if quick else 5)
    print(f"SimPy event engine: {e['engine']:,.0f} transitions/s over {e['transitions']:,} "
          f"transitions")
    print(f"  ratio to bare SimPy, same timeouts, one process per patient: {e['vs_replay']:.2f}"
          f" (target >= 0.30: {verdict(e['vs_replay'], 0.30)})")
    print(f"  ratio to bare SimPy, one process doing only timeouts:       {e['vs_single']:.2f}")
    c = cycle_ratio(patients=500 if quick else 10_000)
    print(f"SimPy cycle engine (demo scenario): {c['simpy']:,.0f} patient-cycles/s, "
          f"{c['vs_single']:.2f} x the rate at which one SimPy process does nothing but "
          "timeouts (a patient-cycle also weighs its risks, draws and records; no target)")
    print(f"Compiled cycle engine (same histories): {c['vectorised']:,.0f} patient-cycles/s;"
          f" {c['speedup']:.1f} x the SimPy cycle engine (target >= 100: "
          f"{verdict(c['speedup'], 100)}; at {500 if quick else 10_000:,} patients)")
    for attained_age, patients in ((False, 1000 if quick else 5000), (True, 100 if quick else 400)):
        v = event_engines_ratio(patients, repeats=1 if quick else 3, attained_age=attained_age)
        what = ("attained age on the Weibull hazards too (a numerical root per draw)"
                if attained_age else "Weibull hazards, covariates and memory")
        print(f"Vectorised event engine (same records), {what}: {v['vectorised']:,.0f} "
              f"transitions/s over {v['records']:,}; {v['ratio']:.1f} x the SimPy event engine "
              f"(target >= 20: {verdict(v['ratio'], 20)})")
    draws, per_draw = (4, 300) if quick else (16, 2000)
    p = psa_timings(draws, per_draw)
    print(f"PSA of the demo, {draws} draws of {per_draw:,} patients: exact basis "
          f"{p['one'] / p['exact']:.2f} x as fast as simulated (exact {p['exact']:.1f} s, "
          f"simulated {p['one']:.1f} s), and free of the simulation's inner noise" + (
              "; these draws are too few to part that noise from the parameters' spread (the "
              "estimated between-draw variance is not above 0)" if p["noise_share"] is None else
              f", which is {100 * p['noise_share']:.1f}% of the simulated draws' spread") + (
              "" if p["needed"] is None else
              f"; for that noise to be {100 * EQUAL_NOISE:.0f}% a simulated draw needs about "
              f"{p['needed']:,.0f} patients, and the exact basis is then {p['equal']:.1f} x as "
              "fast (time taken as proportional to the patients per draw)"))
    per_draw = 500 if quick else 5000
    x = products_ratio(per_draw, repeats=1 if quick else 5)
    print(f"Exact per-patient results of the demo, {per_draw:,} patients: compiled "
          f"{x['numpy'] / x['compiled']:.1f} x as fast as the numpy reference (compiled "
          f"{x['compiled']:.2f} s, numpy {x['numpy']:.2f} s; the same numbers to rounding)")
    draws, per_draw = (2, 1000) if quick else (8, 5000)
    r = rate_psa_timings(draws, per_draw, repeats=1 if quick else 3)
    print(f"PSA of a memoryless rate model whose patients differ by a continuous marker, "
          f"{draws} draws of {per_draw:,} patients: exact basis "
          f"{r['simulated'] / r['exact']:.2f} x as fast as simulated (exact {r['exact']:.1f} s, "
          f"simulated {r['simulated']:.1f} s; a matrix exponential for every patient)")
    # a bigger PSA for the workers: a draw of the compiled engine takes a fraction of a
    # second, and starting two worker processes (about a second each) is then a large share
    # of a small PSA, where a real one of hundreds of draws spreads it thin; at 32 draws
    # the ratio swung from 1.6 to 2.0 between runs
    draws, per_draw = (8, 2000) if quick else (64, 20_000)
    w = psa_timings(draws, per_draw, runs=(("one", "simulated", 1), ("two", "simulated", 2)))
    print(f"PSA with 2 workers, {draws} draws of {per_draw:,} patients: {w['one'] / w['two']:.2f}"
          f" x as fast as with 1 (2 workers {w['two']:.1f} s, 1 worker {w['one']:.1f} s; "
          f"target >= 1.8: "
          f"{verdict(w['one'] / w['two'], 1.8)})")
    small, large = (20_000, 60_000) if quick else (100_000, 400_000)
    low, high = peak_memory(small), peak_memory(large)
    strategies = max(len(demo_scenario().strategies), 1)
    slope = (high - low) / (large - small) / strategies
    print(f"Peak memory of `microsim run` (no histories; tables written): "
          f"{low / 2**20:,.0f} MB at {small:,} "
          f"patients, {high / 2**20:,.0f} MB at {large:,}: " + (
              f"{slope:,.0f} bytes per patient per strategy (target <= 200: "
              f"{verdict(slope, 200, larger_is_better=False)})" if high > low else
              "no growth to measure at these sizes (the fixed part of the process hides it); "
              "run without --quick"))
    for name, ratio in crn_ratio(patients=500 if quick else 2000).items():
        print(f"Common random numbers, {name}: SE of incremental QALYs is {ratio:.2f} x that "
              f"with independent streams (variance x {ratio ** 2:.2f})")
    threads.use(None)
    return 0
