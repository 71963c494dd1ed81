"""Probabilistic sensitivity analysis of a scenario: draws -> strategies on inner patients.

Each outer draw binds the scenario with one set of parameter values and simulates every
strategy on its own inner patients (ids draw * n .. draw * n + n - 1, so draws are
independent and each is reproducible on its own). Per draw we keep the strategies' mean
cost and effect and, for the ANOVA split of O'Hagan, Stevenson & Madan (2007, "Monte Carlo
probabilistic sensitivity analysis for patient level simulation models", Health Economics
16:1009-1023), the within-draw variance of each strategy's paired incremental net benefit.
Inner Monte-Carlo noise inflates the spread of per-draw means, and with it EVPI and the
acceptability curve's extremes; the split tells how many inner patients make that small.
A scenario without strategies gets the per-draw outcomes of the model as written and their
intervals; acceptability, EVPI and the split compare strategies, so it gets a note instead.

With `uncertainty.basis = "exact"` (for models with an exact counterpart) no draw is
simulated: each draw is the mean of the patients' analytic expectations, on one set of
patients (ids 0..n-1) shared by every draw, so the draws differ by their parameters alone
and carry no inner Monte-Carlo noise (their within-draw variances are 0: the split has
nothing to split, and the acceptability curve no noise to take out). The base case is still simulated and validated by `microsim run`.
"""
from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, replace
from functools import partial
from pathlib import Path

import numpy as np
import pandas as pd

from microsim import __version__
from microsim.decision import economics
from microsim.decision.strategies import (AS_WRITTEN, COST, EFFECT, patient_outcomes,
                                         run_strategies, standard_error, strategy_names)
from microsim.patients.population import patients_for, scenario_patients
from microsim.results.comparison import within_roundoff
from microsim.scenario.errors import ScenarioError
from microsim.scenario.read_economics import check_incidence_covers
from microsim.scenario.read_uncertainty import psa_tables
from microsim.scenario.spec import Scenario
from microsim.store import file_hash
from microsim.uncertainty import run_draws, summarise_draws
from microsim.uncertainty.draw_checks import check_draws
from microsim.uncertainty.folder import draw_path, draws_hash
from microsim.uncertainty.draws import ParameterSampler
from microsim.uncertainty.one_way import patient_values
from microsim.uncertainty.summaries import draw_intervals
from microsim.uncertainty.value_of_information import check_evppi_draws, information_values

NEEDS_STRATEGIES = ("acceptability curves, the cost-effectiveness plane, EVPI and the "
                    "inner/outer split compare strategies: they need at least two, and this "
                    "scenario defines none")


def inner_patients(scenario: Scenario, draw: int, n: int) -> pd.DataFrame:
    """Draw d's own patients: ids d * n .. d * n + n - 1."""
    return scenario_patients(scenario, scenario.simulation.seed, np.arange(draw * n, draw * n + n))


def evaluate_draw(scenario: Scenario, n: int, draw: int, values: dict) -> pd.DataFrame:
    """One outer draw: every strategy on the draw's inner patients. Besides the means, the
    within-draw variance of each strategy's paired incremental net benefit against the
    comparator, which the inner/outer split needs."""
    sims = run_strategies(scenario, inner_patients(scenario, draw, n),
                          scenario.simulation.seed, values)
    outcomes = patient_outcomes(sims)
    threshold = scenario.economics.threshold
    nmb = (threshold * outcomes[EFFECT] - outcomes[COST]).groupby(outcomes.strategy, sort=False)
    base = nmb.get_group(next(iter(sims))).to_numpy()  # the comparator runs first
    first = outcomes.groupby("strategy", sort=False).get_group(next(iter(sims)))
    rows = []
    for name, group in outcomes.groupby("strategy", sort=False):
        gain = nmb.get_group(name).to_numpy() - base
        d_cost = group[COST].to_numpy() - first[COST].to_numpy()
        d_effect = group[EFFECT].to_numpy() - first[EFFECT].to_numpy()
        rows.append((name, group[COST].mean(), group[EFFECT].mean(), group["life_years"].mean(),
                     float(gain.var(ddof=1)), *within_moments(d_cost, d_effect), len(group)))
    return pd.DataFrame(rows, columns=DRAW_COLUMNS)


def evaluate_exact_draw(scenario: Scenario, people: pd.DataFrame, draw: int,
                        values: dict) -> pd.DataFrame:
    """One outer draw on the exact basis: every strategy's mean analytic cost, QALYs and
    life years over the shared patients; no inner noise, so the within-draw moments are 0."""
    rows = []
    for name in strategy_names(scenario) or [None]:
        exact = exact_values(scenario, people, draw, values, name)
        rows.append((AS_WRITTEN if name is None else name, exact.costs.mean(),
                     exact.qalys.mean(), exact.life_years.mean(), 0.0, 0.0, 0.0, 0.0,
                     len(people)))
    return pd.DataFrame(rows, columns=DRAW_COLUMNS)


def mean_error(x: np.ndarray) -> float:
    """The standard error of the mean of x, 0 where round-off alone explains it (the
    strategy tables' rule, `comparison.within_roundoff`), nan for a single value."""
    se = standard_error(x)
    return 0.0 if within_roundoff(se, float(np.mean(x))) else se


def exact_values(scenario: Scenario, people: pd.DataFrame, draw: int, values: dict,
                 name: str | None):
    """A strategy's exact per-patient values at `values` (draw < 0: the base case),
    refused where the model has no exact counterpart."""
    exact = patient_values(scenario, people, scenario.simulation.seed, values, name)
    if not exact.exact:
        which = "the base case" if draw < 0 else f"draw {draw}"
        whose = "the model" if name is None else f"strategy {name!r}"
        raise ScenarioError("uncertainty.basis", f"{whose} has no exact counterpart in "
                            f"{which} ({'; '.join(exact.reasons)}); use the simulated "
                            "basis (basis = \"simulated\", or --basis simulated)")
    return exact


DRAW_COLUMNS = ["strategy", "costs_discounted", "qalys_discounted", "life_years", "incremental_nmb_within_variance",
                "incremental_costs_within_variance", "incremental_qalys_within_variance",
                "incremental_within_covariance", "patients"]


def within_moments(d_cost: np.ndarray, d_effect: np.ndarray) -> tuple[float, float, float]:
    """Within-draw variances of the paired incremental cost and effect and their
    covariance, which give the within-draw variance of incremental NMB at any threshold
    (for the acceptability curve without inner noise)."""
    if len(d_cost) < 2:
        return math.nan, math.nan, math.nan
    matrix = np.cov(d_cost, d_effect)
    return float(matrix[0, 0]), float(matrix[1, 1]), float(matrix[0, 1])


@dataclass(frozen=True)
class PsaResult:
    draws: pd.DataFrame  # parameter values per draw
    results: pd.DataFrame  # per draw and strategy
    outcomes: pd.DataFrame  # per strategy and measure: mean over draws and 95% interval
    changed: pd.DataFrame  # values of invalid draws that were redrawn or truncated
    # The comparisons of strategies; None (and `note` says why) without strategies:
    acceptability: pd.DataFrame | None = None
    evpi: pd.DataFrame | None = None
    plane: pd.DataFrame | None = None
    variance: pd.DataFrame | None = None  # between/within split, suggested inner/outer sizes
    note: str | None = None
    evppi: pd.DataFrame | None = None  # per threshold, for the groups of uncertainty.evppi
    basis: str = ""  # how each draw was evaluated, in words (BASES)
    tables: tuple[tuple[str, ...], tuple[str, ...]] = ((), ())  # the tables the model
    # reads: (varied, held fixed) by the draws
    reused: tuple[int, Path | None] = (0, None)  # draws an earlier run had finished, and
    # the folder they are read from (`reused_draws`)
    sampling: pd.DataFrame | None = None  # exact basis: the shared patients' sampling error


def reused_draws(where: Path, draws: pd.DataFrame) -> tuple[int, Path | None]:
    """How many of the draws an earlier run of the same PSA finished in its folder `where`
    (they are read back, not evaluated again), and the folder; (0, None) for none."""
    found = sum(draw_path(where, int(d)).exists() for d in draws.draw)
    return (found, where) if found else (0, None)


def thresholds(scenario: Scenario) -> np.ndarray:
    start, stop, step = scenario.economics.thresholds
    points = start + step * np.arange(int(np.floor((stop - start) / step + 1e-9)) + 1)
    return points[points <= stop]


def variance_split(scenario: Scenario, results: pd.DataFrame) -> pd.DataFrame:
    """Per strategy against the comparator: the between-draw variance of the incremental
    net benefit corrected for inner noise (s_B^2 - tau^2 / n), the within-draw (patient)
    variance tau^2, and the split of the same total number of patients that estimates the
    between-draw variance best (O'Hagan, Stevenson & Madan 2007)."""
    threshold = scenario.economics.threshold
    names = strategy_names(scenario)
    nmb = (threshold * results["qalys_discounted"] - results["costs_discounted"]).to_numpy()
    table = results.assign(nmb=nmb).pivot(index="draw", columns="strategy", values="nmb")
    rows = []
    for name in names[1:]:
        group = results[results.strategy == name]
        n = int(group["patients"].iloc[0])
        within = float(group["incremental_nmb_within_variance"].mean())
        means = table[name] - table[names[0]]
        spread = float(means.var(ddof=1)) if len(group) > 1 else np.nan
        between = max(spread - within / n, 0.0) if np.isfinite(spread) else np.nan
        split = (economics.optimal_sample_split(between, within, n * len(group))
                 if between > 0 else None)
        rows.append((name, len(group), n, float(means.mean()), between, within,
                     None if split is None else split.n_draws,
                     None if split is None else split.patients_per_draw,
                     split_note(spread, within, n, split)))
    return pd.DataFrame(rows, columns=["strategy", "draws", "patients_per_draw",
                                       "mean_incremental_nmb", "between_draw_variance",
                                       "within_draw_variance", "suggested_draws",
                                       "suggested_patients_per_draw", "note"])


def split_note(spread: float, within: float, n: int, split) -> str:
    """Why the split suggests what it does, or nothing, in words."""
    if not np.isfinite(spread):
        return "one draw: no spread between draws to split"
    if not np.isfinite(within):
        return ("one patient per draw: no within-draw variance to split by; give more "
                "patients per draw")
    if spread <= 0 and within <= 0:
        return "the draws do not differ and nor do their patients: nothing to split"
    if split is None:
        return (f"the spread between draws ({spread:.4g}) is no more than the noise variance "
                f"of a draw's mean (the within-draw variance over {n} patients: "
                f"{within / n:.4g}): the draws tell parameter uncertainty apart from "
                "Monte-Carlo noise only with more patients per draw")
    return "the split of the same number of patients that estimates the between-draw variance best"


def parameter_uncertainty(scenario: Scenario, run_dir: Path, *, seed: int | None = None,
                          draws: int | None = None, patients: int | None = None,
                          workers: int = 1, backend: str = "processes",
                          address: str | None = None, progress: bool = True) -> PsaResult:
    """The PSA loop, resumable from `run_dir`, identical for any number of workers. `seed`
    (default: the scenario's) keys the parameter draws and the inner patients alike, and is
    part of the folder's fingerprint, so a run with another seed never resumes this one."""
    if seed is not None:
        scenario = replace(scenario, simulation=replace(scenario.simulation, seed=seed))
    spec = scenario.uncertainty
    if not spec.dirichlets and not spec.normal_groups and not any(
            p.distribution is not None and p.distribution.family != "fixed"
            for p in scenario.parameters.values()):
        raise ScenarioError("parameters", "no parameter has a distribution (nor a Dirichlet "
                            "or multivariate normal group), so every PSA draw would be the "
                            "base case; give the uncertain parameters a distribution")
    n_draws = spec.draws if draws is None else draws
    n = next(v for v in (patients, spec.patients,
                         scenario.population.size if scenario.population else None, 1000)
             if v is not None)
    correlation = (spec.correlation_parameters, spec.correlation) if spec.correlation else None
    sampler = ParameterSampler(scenario.parameters, correlation, spec.dirichlets,
                               spec.normal_groups)
    # every draw checked (refused, redrawn or truncated) before anything is simulated
    check_evppi_draws(scenario, n_draws)
    check_incidence_covers(scenario.economics, "evpi_years")
    checked = check_draws(scenario, sampler, n_draws, scenario.simulation.seed)
    table = checked.table
    fingerprint = {"scenario_sha256": file_hash(scenario.source) if scenario.source else None,
                   "seed": scenario.simulation.seed, "draws": n_draws, "patients_per_draw": n,
                   "microsim": __version__, "draw_columns": DRAW_COLUMNS, "basis": spec.basis}
    where = own_folder(run_dir, fingerprint, table)
    reused = reused_draws(where, table)
    evaluate, sampling = draw_evaluation(scenario, n)
    results = run_draws(evaluate, table, where,
                        workers=workers, backend=backend, address=address, progress=progress,
                        fingerprint=fingerprint)
    outcomes = draw_intervals(results)
    basis, tables = BASES[spec.basis], psa_tables(scenario)
    if not scenario.strategies:
        return PsaResult(table, results, outcomes, checked.changed, note=NEEDS_STRATEGIES,
                         basis=basis, tables=tables, reused=reused, sampling=sampling)
    comparator = strategy_names(scenario)[0]
    summary = summarise_draws(results, thresholds(scenario), comparator,
                              inner_noise=spec.basis == "simulated")
    evpi, evppi = information_values(scenario, table, results, summary["evpi"],
                                     thresholds(scenario), comparator)
    variance = variance_split(scenario, results) if spec.basis == "simulated" else None
    return PsaResult(table, results, outcomes, checked.changed, summary["acceptability"],
                     evpi, summary["plane"], variance, evppi=evppi, basis=basis,
                     tables=tables, reused=reused, sampling=sampling)


def own_folder(root: Path, fingerprint: dict, draws: pd.DataFrame) -> Path:
    """The folder of this PSA under `root`, named by a hash of its settings and its
    parameter draws: the same PSA resumes (or reuses) its own draws, and a PSA with other
    settings (a seed, a basis, more patients) gets a folder of its own beside it."""
    settings = json.dumps({"fingerprint": fingerprint, "draws": draws_hash(draws)},
                          sort_keys=True, default=str)
    return Path(root) / hashlib.sha256(settings.encode()).hexdigest()[:12]


BASES = {"simulated": "simulated: each draw's own inner patients, with common random numbers "
                      "across strategies",
         "exact": "exact: each draw the mean of the patients' analytic expectations, the same "
                  "patients in every draw (no inner Monte-Carlo noise)"}


def draw_evaluation(scenario: Scenario, n: int):
    """The function of (draw, values) that evaluates one draw on the scenario's basis, and
    on the exact basis the shared patients' sampling error (`sampling_error`), worked out
    on the base case first, so a model without an exact counterpart is refused before any
    draw."""
    if scenario.uncertainty.basis == "simulated":
        return partial(evaluate_draw, scenario, n), None
    people = patients_for(scenario, n, scenario.simulation.seed)
    return partial(evaluate_exact_draw, scenario, people), sampling_error(scenario, people)


def sampling_error(scenario: Scenario, people: pd.DataFrame) -> pd.DataFrame:
    """Per strategy, the standard errors of the shared patients' mean discounted QALYs and
    costs in the base case (SD / sqrt(n) over their exact values), and of its increments
    over the comparator, paired by patient (QALYs, costs, net monetary benefit at the
    threshold; nan for the comparator): the exact basis has no inner noise, but its
    patients are a sample of the population, and every draw carries that sample's offset
    alike. The increments, on which decisions rest, carry much less of it than the levels."""
    base = {name: float(p.value) for name, p in scenario.parameters.items()}
    threshold = scenario.economics.threshold
    rows, first = [], None
    for name in strategy_names(scenario) or [None]:
        exact = exact_values(scenario, people, -1, base, name)
        first = exact if first is None else first
        gains = (exact.qalys - first.qalys, exact.costs - first.costs)
        increments = ((math.nan,) * 3 if exact is first else
                      (*map(mean_error, gains), mean_error(threshold * gains[0] - gains[1])))
        rows.append((AS_WRITTEN if name is None else name,
                     *(mean_error(x) for x in (exact.qalys, exact.costs)), *increments))
    return pd.DataFrame(rows, columns=["strategy", "qalys_discounted_se", "costs_discounted_se",
                                       "incremental_qalys_se", "incremental_costs_se",
                                       "incremental_nmb_se"])
