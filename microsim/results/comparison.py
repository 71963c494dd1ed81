"""Simulated versus analytic: shares, standard errors, z-scores and a verdict in plain words.

Under the model, patient b is in state s at time t with probability p_b(t, s) (the
analytic trace of that patient), independently of the others, so the simulated share has
standard error sqrt(sum_b p_b (1 - p_b)) / N exactly. The verdict tests every state and
time point at once with a Bonferroni bound (Bonferroni 1936; Dunn 1961, "Multiple
comparisons among means"): with K comparisons the simulation agrees when every |z| is
below the normal quantile of 1 - alpha / (2K), so a correct engine is flagged in fewer
than one run in 1/alpha.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import norm

from microsim.cohort.analytic import CohortResult, analytic
from microsim.patients.multipliers import average_patient
from microsim.results.outcomes import outcome_values
from microsim.patients.population import subgroup_attributes
from microsim.patients.population import cohort_patients
from microsim.simulation import Simulation, simulate

FAMILY_ALPHA = 0.001


def critical_z(n_tests: int, alpha: float = FAMILY_ALPHA) -> float:
    """The Bonferroni bound for n_tests two-sided z tests at family-wise level alpha."""
    return float(norm.isf(alpha / (2 * max(n_tests, 1))))


def z_scores(difference: np.ndarray, se: np.ndarray) -> np.ndarray:
    """difference / se, with 0 where both vanish and +-inf where only se does."""
    with np.errstate(divide="ignore", invalid="ignore"):
        z = difference / se
        jump = np.where(np.abs(difference) < 1e-12, 0.0, np.copysign(np.inf, difference))
    return np.where(se > 0, z, jump)


@dataclass(frozen=True)
class Comparison:
    counterpart: str  # which analytic counterpart was used, in plain words
    exact: bool
    shares: pd.DataFrame  # time, state, simulated, analytic, se, z
    subgroups: pd.DataFrame  # the same by attribute level or band
    outcomes: pd.DataFrame  # measure, simulated, analytic, se, z
    average_patient: pd.DataFrame  # measure, population, average_patient, difference, se, z
    critical: float
    agrees: bool | None  # None when there is no exact counterpart
    verdict: str
    average_verdict: str


def counterpart_name(sim: Simulation, result: CohortResult) -> str:
    heterogeneous = result.trace.shape[0] > 1
    if not result.exact:
        return "no exact counterpart: " + "; ".join(result.reasons)
    kind = "the average of per-patient analytic traces" if heterogeneous else "the cohort trace"
    if "expanded" in result.method:
        kind = "the expanded chain (tunnel/count/window states), " + (
            "averaged over patients" if heterogeneous else "for the cohort")
    return f"{kind} ({result.method})"


def trace_table(sim: Simulation, result: CohortResult, rows: np.ndarray | None = None) -> pd.DataFrame:
    """Simulated and analytic state shares on the grid (of the patients in `rows`)."""
    p = result.trace  # (B, T, S); one row for a uniform cohort
    states = sim.states
    if rows is not None:
        states = states[rows]
        p = p[rows] if p.shape[0] > 1 else p
    n = len(states)
    analytic_share = p.mean(axis=0)
    se = np.sqrt((p * (1 - p)).sum(axis=0)) / n if p.shape[0] > 1 else np.sqrt(p[0] * (1 - p[0]) / n)
    simulated = np.stack([(states == s).mean(axis=0) for s in range(sim.model.n_states)], axis=1)
    times, index = np.meshgrid(sim.grid, np.arange(sim.model.n_states), indexing="ij")
    return pd.DataFrame({
        "time": times.ravel(), "state": np.array(sim.model.states)[index.ravel()],
        "simulated": simulated.ravel(), "analytic": analytic_share.ravel(), "se": se.ravel(),
        "z": z_scores(simulated - analytic_share, se).ravel()})


def subgroup_table(sim: Simulation, result: CohortResult) -> pd.DataFrame:
    """State shares on the grid by subgroup (attribute levels and bands), simulated and
    analytic, with standard errors and z-scores."""
    frames = []
    for attribute in subgroup_attributes(sim.patients):
        for level, members in sim.patients.groupby(attribute, observed=True).indices.items():
            frames.append(trace_table(sim, result, np.asarray(members))
                          .assign(attribute=attribute, level=str(level)))
    if not frames:
        return pd.DataFrame(columns=["attribute", "level", "time", "state", "simulated",
                                     "analytic", "se", "z"])
    table = pd.concat(frames, ignore_index=True)
    return table[["attribute", "level"] + [c for c in table.columns if c not in ("attribute", "level")]]


def outcome_rows(sim: Simulation, result: CohortResult) -> pd.DataFrame:
    simulated = outcome_values(sim.model, sim.exposure)
    expected = outcome_values(sim.model, result.exposure)
    rows = []
    for measure, values in simulated.items():
        se = values.std(ddof=1) / np.sqrt(len(values))
        diff = values.mean() - expected[measure].mean()
        rows.append((measure, values.mean(), expected[measure].mean(), se,
                     float(z_scores(np.array(diff), np.array(se)))))
    return pd.DataFrame(rows, columns=["measure", "simulated", "analytic", "se", "z"])


def compare(sim: Simulation) -> Comparison:
    """Compare a simulation with the analytic counterpart of its model and patients."""
    model = sim.model
    mult = sim.mult.distinct()
    result = analytic(model, mult=mult, times=sim.grid)
    shares = trace_table(sim, result)
    outcomes = outcome_rows(sim, result)
    average = average_rows(sim, mult, result)
    critical = critical_z(len(shares) + len(outcomes))
    if result.exact:
        worst = float(np.nanmax(np.abs(np.concatenate([shares.z, outcomes.z]))))
        agrees = worst < critical
        verdict = (f"The simulation agrees with {counterpart_name(sim, result)}: the largest |z| "
                   f"is {worst:.2f}, below {critical:.2f} (Bonferroni over {len(shares) + len(outcomes)} "
                   f"comparisons at family-wise level {FAMILY_ALPHA})." if agrees else
                   f"The simulation DISAGREES with {counterpart_name(sim, result)}: the largest |z| "
                   f"is {worst:.2f}, above {critical:.2f}. Check the engine or the model.")
    else:
        agrees = None
        verdict = (f"There is no exact counterpart for this model ({'; '.join(result.reasons)}); "
                   "the analytic figures beside the simulation are a Markov approximation that "
                   "ignores this memory, shown for orientation only.")
    return Comparison(counterpart_name(sim, result), result.exact, shares,
                      subgroup_table(sim, result), outcomes, average,
                      critical, agrees, verdict, average_verdict(average, critical))


def average_rows(sim: Simulation, mult, population: CohortResult) -> pd.DataFrame:
    """The 'average patient' cohort against the simulated population, measure by measure.

    Where the model has an exact counterpart, the average patient's result is exact and
    the gap is tested against the simulation's standard error (the exact population mean
    is shown beside it). Otherwise the average patient is simulated too, on other patient
    ids, and the gap is tested against both standard errors."""
    average = average_patient(mult)
    simulated = outcome_values(sim.model, sim.exposure)
    if population.exact:
        expected = outcome_values(sim.model, analytic(sim.model, mult=average,
                                                      times=sim.grid).exposure)
        noise = {m: 0.0 for m in simulated}
    else:
        copies = cohort_patients(sim.size)
        copies["patient"] += int(sim.patients["patient"].max()) + 1
        twin = simulate(sim.model, copies, sim.seed, mult=average, grid=sim.grid)
        expected = outcome_values(sim.model, twin.exposure)
        noise = {m: float(v.var(ddof=1) / len(v)) for m, v in expected.items()}
    exact_population = outcome_values(sim.model, population.exposure)
    rows = []
    for measure, values in simulated.items():
        se = float(np.sqrt(values.var(ddof=1) / len(values) + noise[measure]))
        avg = float(np.mean(expected[measure]))
        diff = avg - float(values.mean())
        rows.append((measure, float(values.mean()), float(np.mean(exact_population[measure]))
                     if population.exact else np.nan, avg, diff, se,
                     float(z_scores(np.array(diff), np.array(se)))))
    return pd.DataFrame(rows, columns=["measure", "population", "population_exact",
                                       "average_patient", "difference", "se", "z"])


def average_verdict(rows: pd.DataFrame, critical: float) -> str:
    worst = rows.loc[rows.z.abs().idxmax()]
    relative = worst.difference / worst.population if worst.population else np.nan
    if abs(worst.z) < critical:
        return ("The 'average patient' cohort (everyone given the mean attributes) is within "
                f"Monte-Carlo error of the simulated population (largest |z| {abs(worst.z):.2f}).")
    return ("The 'average patient' cohort (everyone given the mean attributes) misrepresents the "
            f"population: {worst.measure} {worst.average_patient:.4g} against {worst.population:.4g} "
            f"simulated ({relative:+.1%}, z = {worst.z:.1f}). Heterogeneity matters here; use the "
            "population results.")
