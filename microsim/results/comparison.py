"""Simulated versus analytic: shares, standard errors, tail probabilities and a verdict in
plain words.

Under the model, patient b is in state s at time t with probability p_b(t, s) (the analytic
trace of that patient), independently of the others. So the simulated count in a state is
a sum of independent Bernoulli trials (Poisson-binomial) with standard error
sqrt(sum_b p_b (1 - p_b)) exactly. Its tail probability is taken from the binomial with the
same mean, which has the heavier tails (Hoeffding 1956, "On the distribution of the number
of successes in independent trials", Ann. Math. Statist. 27:713-721), so the test stays
valid for rare states where a normal approximation would raise false alarms. Outcome means
use the central limit theorem with the standard error of the patients' deviations from
their own expected values.

A comparison with no Monte-Carlo error at all (every patient certain to be in a state, or
an outcome equal for every patient) is not a statistical question: it agrees when the two
numbers are equal within floating-point round-off (ROUNDOFF, relative), and the table says
so in its `test` column.

The verdict tests every comparison at once with a Bonferroni bound (Bonferroni 1936; Dunn
1961, "Multiple comparisons among means"): with K comparisons the simulation agrees when
every two-sided p-value is at least alpha / K, so a correct engine is flagged in fewer than
one run in 1/alpha.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import binom, norm

from microsim.cohort.analytic import CohortResult, analytic
from microsim.patients.multipliers import average_patient
from microsim.patients.population import subgroup_attributes
from microsim.results.outcomes import outcome_values
from microsim.simulation import Simulation, simulate

FAMILY_ALPHA = 0.001
ROUNDOFF = 1e-7  # relative difference that numerical error alone can explain (floating
# point in the engines, and the forward equations' rtol of 1e-10 over long horizons)
MONTE_CARLO = "Monte-Carlo"
EXACT = f"no Monte-Carlo error: equal within {ROUNDOFF:g} (relative)"


def critical_z(n_tests: int, alpha: float = FAMILY_ALPHA) -> float:
    """The Bonferroni bound for n_tests two-sided z tests at family-wise level alpha."""
    return float(norm.isf(alpha / (2 * max(n_tests, 1))))


def z_scores(difference: np.ndarray, se: np.ndarray) -> np.ndarray:
    """difference / se, with 0 where both vanish and +-inf where only se does."""
    with np.errstate(divide="ignore", invalid="ignore"):
        z = difference / se
        jump = np.where(np.abs(difference) < 1e-12, 0.0, np.copysign(np.inf, difference))
    return np.where(se > 0, z, jump)


def without_error(difference, se, scale) -> tuple[np.ndarray, np.ndarray]:
    """Which comparisons have no Monte-Carlo error to speak of (a standard error below what
    round-off explains), and whether each of those agrees within round-off."""
    tolerance = ROUNDOFF * np.maximum(np.abs(scale), 1.0)
    certain = np.asarray(se) <= tolerance
    return certain, np.abs(difference) <= tolerance


def share_p_values(simulated: np.ndarray, analytic_share: np.ndarray, n: int) -> np.ndarray:
    """Two-sided tail probabilities of the simulated counts under the binomial with the
    analytic mean share (conservative for the Poisson-binomial: Hoeffding 1956)."""
    count = np.rint(np.asarray(simulated) * n)
    p = np.clip(analytic_share, 0.0, 1.0)
    tails = np.minimum(binom.cdf(count, n, p), binom.sf(count - 1, n, p))
    return np.minimum(1.0, 2.0 * tails)


def mean_p_values(difference, se, scale) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided normal tail probabilities of differences of means, and which rows had no
    Monte-Carlo error (p = 1 within round-off, else 0)."""
    certain, equal = without_error(difference, se, scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = 2.0 * norm.sf(np.abs(np.asarray(difference) / se))
    return np.where(certain, equal.astype(float), p), certain


@dataclass(frozen=True)
class Comparison:
    counterpart: str  # which analytic counterpart was used, in plain words
    exact: bool
    shares: pd.DataFrame  # time, state, simulated, analytic, se, z, p_value, test
    subgroups: pd.DataFrame  # the same by attribute level or band
    outcomes: pd.DataFrame  # measure, simulated, analytic, se, z, p_value, test
    average_patient: pd.DataFrame  # measure, population, average_patient, difference, ...
    critical: float  # the |z| a single normal comparison would need to disagree
    level: float  # the p-value below which a comparison disagrees (alpha / K)
    agrees: bool | None  # None when there is no exact counterpart
    verdict: str
    average_verdict: str


def analytic_counterpart(sim: Simulation) -> CohortResult:
    """The analytic result for the simulation's own patients on its grid."""
    return analytic(sim.model, mult=sim.mult.distinct(), times=sim.grid)


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
    certain = se == 0.0
    return pd.DataFrame({
        "time": times.ravel(), "state": np.array(sim.model.states)[index.ravel()],
        "simulated": simulated.ravel(), "analytic": analytic_share.ravel(), "se": se.ravel(),
        "z": z_scores(simulated - analytic_share, se).ravel(),
        "p_value": share_p_values(simulated, analytic_share, n).ravel(),
        "test": np.where(certain, EXACT, MONTE_CARLO).ravel()})


def subgroup_table(sim: Simulation, result: CohortResult) -> pd.DataFrame:
    """State shares on the grid by subgroup (attribute levels and bands), simulated and
    analytic, with standard errors, z-scores and tail probabilities."""
    frames = []
    for attribute in subgroup_attributes(sim.patients):
        for level, members in sim.patients.groupby(attribute, observed=True).indices.items():
            frames.append(trace_table(sim, result, np.asarray(members))
                          .assign(attribute=attribute, level=str(level)))
    if not frames:
        return pd.DataFrame(columns=["attribute", "level", "time", "state", "simulated",
                                     "analytic", "se", "z", "p_value", "test"])
    table = pd.concat(frames, ignore_index=True)
    return table[["attribute", "level"] + [c for c in table.columns if c not in ("attribute", "level")]]


def outcome_rows(sim: Simulation, result: CohortResult) -> pd.DataFrame:
    """Mean outcomes per patient, simulated against analytic; the standard error is that of
    the patients' deviations from their own expected values (paired by patient, so the
    spread of expected values between patients adds no noise)."""
    simulated = outcome_values(sim.model, sim.exposure)
    expected = outcome_values(sim.model, result.exposure)
    rows = []
    for measure, values in simulated.items():
        deviation = values - expected[measure]
        se = float(deviation.std(ddof=1) / np.sqrt(len(values))) if len(values) > 1 else np.inf
        mean, target = float(values.mean()), float(expected[measure].mean())
        rows.append((measure, mean, target, se, mean - target))
    table = pd.DataFrame(rows, columns=["measure", "simulated", "analytic", "se", "difference"])
    p, certain = mean_p_values(table.difference, table.se, table.analytic)
    z = np.where(certain, 0.0, z_scores(table.difference.to_numpy(), table.se.to_numpy()))
    return table.drop(columns="difference").assign(
        z=z, p_value=p, test=np.where(certain, EXACT, MONTE_CARLO))


def compare(sim: Simulation, result: CohortResult | None = None) -> Comparison:
    """Compare a simulation with the analytic counterpart of its model and patients
    (`result`, when the caller has computed it already: `analytic_counterpart(sim)`)."""
    model = sim.model
    mult = sim.mult.distinct()
    result = analytic_counterpart(sim) if result is None else result
    shares = trace_table(sim, result)
    outcomes = outcome_rows(sim, result)
    average = average_rows(sim, mult, result)
    tests = len(shares) + len(outcomes)
    level = FAMILY_ALPHA / max(tests, 1)
    critical = critical_z(tests)
    counterpart = counterpart_name(sim, result)
    if result.exact:
        agrees, verdict = share_verdict(shares, outcomes, counterpart, level, critical)
    else:
        agrees = None
        verdict = (f"There is no exact counterpart for this model ({'; '.join(result.reasons)}); "
                   "the analytic figures beside the simulation are a Markov approximation that "
                   "ignores this memory, shown for orientation only.")
    return Comparison(counterpart, result.exact, shares, subgroup_table(sim, result), outcomes,
                      average, critical, level, agrees, verdict, average_verdict(average))


def share_verdict(shares: pd.DataFrame, outcomes: pd.DataFrame, counterpart: str,
                  level: float, critical: float) -> tuple[bool, str]:
    """Whether every comparison is within chance, and the sentence that says so."""
    rows = pd.concat([shares.assign(what=shares.state + " at " + shares.time.map("{:g}".format)),
                      outcomes.assign(what=outcomes.measure)], ignore_index=True)
    worst = rows.loc[rows.p_value.idxmin()]
    exact = int((rows.test == EXACT).sum())
    noise = rows[rows.test == MONTE_CARLO]
    largest = float(noise.z.abs().max()) if len(noise) else 0.0
    basis = (f"Bonferroni over {len(rows)} comparisons at family-wise level {FAMILY_ALPHA}: "
             f"each p-value must be at least {level:.2g}, about |z| below {critical:.2f}")
    certain = (f"; {exact} comparison{'s' if exact != 1 else ''} without Monte-Carlo error "
               f"agree within numerical error ({ROUNDOFF:g} relative)" if exact else "")
    if worst.p_value >= level:
        return True, (f"The simulation agrees with {counterpart}: the largest |z| is "
                      f"{largest:.2f} and the smallest p-value {worst.p_value:.2g} "
                      f"({basis}){certain}.")
    gap = (f"differs by {worst.simulated - worst.analytic:.3g} where there is no Monte-Carlo "
           "error" if worst.test == EXACT else f"has z = {worst.z:.2f}, p = {worst.p_value:.2g}")
    return False, (f"The simulation DISAGREES with {counterpart}: {worst.what} {gap} "
                   f"({basis}). Check the engine or the model.")


def average_rows(sim: Simulation, mult, population: CohortResult) -> pd.DataFrame:
    """The 'average patient' cohort against the population, measure by measure.

    The average patient has the population's mean attributes and each patient's own
    treatment window (`microsim.patients.multipliers.average_patient`). Where the model has
    an exact counterpart both sides are exact, so their gap is a number, reported with its
    relative size and no test. Otherwise both are simulated on the same patient ids and
    draws (common random numbers) and the paired gap is tested against its standard error."""
    average = average_patient(mult)
    if population.exact:
        people = outcome_values(sim.model, population.exposure)
        cohort = outcome_values(sim.model, analytic(sim.model, mult=average,
                                                    times=sim.grid).exposure)
    else:
        people = outcome_values(sim.model, sim.exposure)
        twin = simulate(sim.model, sim.patients, sim.seed, mult=average, grid=sim.grid)
        cohort = outcome_values(sim.model, twin.exposure)
    rows = []
    for measure, values in people.items():
        pop, avg = float(np.mean(values)), float(np.mean(cohort[measure]))
        paired = np.broadcast_to(cohort[measure], values.shape) - values
        se = np.nan if population.exact else float(np.std(paired, ddof=1) / np.sqrt(len(paired)))
        rows.append((measure, pop, avg, avg - pop, (avg - pop) / pop if pop else np.nan, se))
    table = pd.DataFrame(rows, columns=["measure", "population", "average_patient", "difference",
                                        "relative_difference", "se"])
    basis = ("exact: both analytic" if population.exact
             else "simulated on the same patients and draws")
    z = (np.full(len(table), np.nan) if population.exact
         else z_scores(table.difference.to_numpy(), table.se.to_numpy()))
    return table.assign(z=z, basis=basis)


AVERAGE = "The 'average patient' cohort (everyone given the mean attributes)"


def average_verdict(rows: pd.DataFrame) -> str:
    """The average patient's gap in words: its size where it is exact, else its test."""
    exact = rows.basis.iloc[0].startswith("exact")
    relative = rows.relative_difference.abs().fillna(0.0)
    worst = rows.loc[relative.idxmax()]
    if exact:
        if np.all(np.abs(rows.difference) <= ROUNDOFF * np.maximum(rows.population.abs(), 1.0)):
            return (f"{AVERAGE} gives the population's results exactly: here the mean "
                    "attributes stand for the patients.")
        return (f"{AVERAGE} gives {worst.measure} {worst.average_patient:.4g} against the "
                f"population's {worst.population:.4g} ({worst.relative_difference:+.1%}, a "
                f"difference of {worst.difference:.4g}). Both are exact analytic results, so "
                "this gap is a property of the model, not Monte-Carlo noise: it is what "
                "treating the patients as one average patient would change.")
    critical = critical_z(len(rows))
    worst = rows.loc[rows.z.abs().fillna(0.0).idxmax()]
    if not abs(worst.z) >= critical:
        return (f"{AVERAGE} is within Monte-Carlo error of the simulated population "
                f"(largest |z| {abs(worst.z):.2f}, below {critical:.2f}).")
    return (f"{AVERAGE} misrepresents the population: {worst.measure} {worst.average_patient:.4g} "
            f"against {worst.population:.4g} simulated ({worst.relative_difference:+.1%}, "
            f"z = {worst.z:.1f}). Heterogeneity matters here; use the population results.")
