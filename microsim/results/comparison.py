"""Simulated versus analytic: shares, standard errors, tail probabilities and a verdict in
plain words, accumulated batch by batch.

Under the model, patient b is in state s at time t with probability p_b(t, s) (the analytic
trace of that patient), independently of the others. So the simulated count in a state is
a sum of independent Bernoulli trials (Poisson-binomial) with standard error
sqrt(sum_b p_b (1 - p_b)) exactly. Its tail probability is taken from the binomial with the
same mean, which has the heavier tails (Hoeffding 1956, "On the distribution of the number
of successes in independent trials", Ann. Math. Statist. 27:713-721), so the test stays
valid for rare states where a normal approximation would raise false alarms. An outcome
mean is tested by the patients' deviations from their own expected values: its standard
error is estimated from those n deviations, so its p-value is Student's t with n - 1 degrees
of freedom (Student 1908, "The probable error of a mean", Biometrika 6:1-25), not the
normal, whose tails are far too thin for an estimated SE from a few patients. Skewed,
bounded outcomes (life years, costs) need the central limit theorem on top, and its error
shrinks only as 1 / sqrt(n) (Berry 1941; Esseen 1942), so with fewer than FEWEST_FOR_MEANS
patients (the common-practice n >= 30) an outcome is "not tested" rather than tested on
a collapsed standard error. The average patient's paired test (where it is simulated)
follows the same rule.

The patients' own SE cannot show a way the model expects only a few times among them (a
costly state that 0.3 of 300 patients are expected to reach, `rare_ways`): the sample
usually lacks it, and with it its part of the variance, so the mean is off by the way's
expected value on an SE that knows nothing of it. So a mean's standard error is never taken
below the one the rare ways' compound-Poisson variance gives, which the model knows (the
variance under the hypothesis tested, as a score test takes it: Rao 1948, "Large sample
tests of statistical hypotheses", Proc. Camb. Phil. Soc. 44:50-57). A way expected m times
that the sample lacks then moves t by at most about sqrt(m), and the rest of the outcome is
still tested (an error in a common state's cost is still found); the test column says when
the largest such way is expected fewer than SEEN times, since its own value is then hardly
checked. The floor only ever widens an SE, so it cannot raise an alarm.

A comparison with no Monte-Carlo error at all (every patient certain to be in a state, or
an outcome equal for every patient) is not a statistical question: it agrees when the two
numbers are equal within numerical error (ROUNDOFF, relative), and the table says so in its
`test` column.

The verdict tests every comparison at once with a Bonferroni bound (Bonferroni 1936; Dunn
1961, "Multiple comparisons among means"): with K comparisons the simulation agrees when
every two-sided p-value is at least alpha / K, so a correct engine is flagged in fewer than
one run in 1/alpha. Shares are compared on the report grid, which for a horizon of more than
MAX_COMPARED_STEPS cycles is thinned to that many evenly spaced steps and the end
(`comparison_grid`): 20,000 cycles would otherwise be 20,001 comparisons per state, each at
a level that many times stricter, for little a coarser grid does not show.

Everything a comparison needs is a sum over patients (`ComparisonSums`), so a population is
compared batch by batch and nothing per patient is kept; `compare` is one batch.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.stats import binom, norm
from scipy.stats import t as student

from microsim.binding import BoundModel
from microsim.cohort.analytic import CohortResult, analytic
from microsim.patients.multipliers import Multipliers, average_patient, cohort_multipliers
from microsim.patients.population import subgroup_attributes
from microsim.results.outcomes import outcome_values, unvalued
from microsim.results.rare_ways import WaySums
from microsim.simulation import Simulation, report_grid, simulate

FAMILY_ALPHA = 0.001
MAX_COMPARED_STEPS = 500  # steps of the comparison grid of a long horizon (and the end)
ROUNDOFF = 1e-7  # relative difference that numerical error alone can explain (floating
# point in the engines, and the forward equations' rtol of 1e-10 over long horizons)
MONTE_CARLO = "Monte-Carlo"
SHARE_TEST = (f"{MONTE_CARLO}: the p-value is the exact binomial tail of the count; z "
              "(difference over SE) is for reading only")
EXACT = f"no Monte-Carlo error: equal within {ROUNDOFF:g} (relative)"
FEWEST_FOR_MEANS = 30  # patients below which a mean is not tested (common practice: n >= 30)
UNSEEN = ("not tested: the patients did not vary, though the model does, so their Monte-Carlo "
          "error is unknown")
FEW = (f"not tested: fewer than {FEWEST_FOR_MEANS} patients, too few for the central limit "
       "theorem")
SEEN = 5  # expected occurrences among the patients below which a way is often missing
# (a Poisson count with mean 5 is 0 in 0.7% of samples)
FLOORED = (f"{MONTE_CARLO}, on a standard error no less than the model's own variance of its "
           "rare ways")
NOT_TESTED = (UNSEEN, FEW)
APPROXIMATE = ("not tested: no exact counterpart, so the p-value measures the distance from "
               "an approximation")
SHARE_COLUMNS = ["time", "state", "simulated", "analytic", "se", "z", "p_value", "test"]


def comparison_grid(model: BoundModel, step: float | None = None) -> np.ndarray:
    """The times at which shares are compared: the report grid (`simulation.grid` of a rate
    model, else the cycle points), the cycle points of a horizon of more than
    MAX_COMPARED_STEPS cycles thinned to every k-th (k the fewest that leaves at most
    MAX_COMPARED_STEPS steps) and the end. A grid the scenario gives is kept as it is."""
    grid = report_grid(model, step)
    every = -(-model.n_cycles // MAX_COMPARED_STEPS)  # ceil
    if every == 1 or not np.array_equal(grid, model.times):
        return grid
    return np.union1d(grid[::every], grid[-1:])


def on_grid(result: CohortResult, grid: np.ndarray) -> np.ndarray:
    """The analytic trace at the grid's times (a cycle model's has every cycle point)."""
    if len(result.times) == len(grid):
        return result.trace
    return result.trace[:, np.searchsorted(result.times, grid)]


def critical_z(n_tests: int, alpha: float = FAMILY_ALPHA) -> float:
    """The Bonferroni bound for n_tests two-sided z tests at family-wise level alpha."""
    return float(norm.isf(alpha / (2 * max(n_tests, 1))))


def z_scores(difference: np.ndarray, se: np.ndarray) -> np.ndarray:
    """difference / se, with 0 where both vanish and +-inf where only se does."""
    with np.errstate(divide="ignore", invalid="ignore"):
        z = difference / se
        jump = np.where(np.abs(difference) < 1e-12, 0.0, np.copysign(np.inf, difference))
    return np.where(se > 0, z, jump)


def between(shares) -> np.ndarray:
    """Which shares are strictly between 0 and 1 (beyond numerical error)."""
    return (shares > ROUNDOFF) & (shares < 1.0 - ROUNDOFF)


def within_roundoff(x, scale) -> np.ndarray:
    """Which of `x` (standard errors, differences) numerical error alone explains: at most
    ROUNDOFF relative to `scale` (the value they belong to), or absolute below 1."""
    return np.abs(np.asarray(x, float)) <= ROUNDOFF * np.maximum(np.abs(scale), 1.0)


def without_error(difference, se, scale) -> tuple[np.ndarray, np.ndarray]:
    """Which comparisons have no Monte-Carlo error to speak of (a standard error below what
    numerical error explains), and whether each of those agrees within it."""
    return within_roundoff(se, scale), within_roundoff(difference, scale)


def share_p_values(simulated: np.ndarray, analytic_share: np.ndarray, n: int) -> np.ndarray:
    """Two-sided tail probabilities of the simulated counts under the binomial with the
    analytic mean share (conservative for the Poisson-binomial: Hoeffding 1956)."""
    count = np.rint(np.asarray(simulated) * n)
    p = np.clip(analytic_share, 0.0, 1.0)
    tails = np.minimum(binom.cdf(count, n, p), binom.sf(count - 1, n, p))
    return np.minimum(1.0, 2.0 * tails)


def mean_p_values(difference, se, scale, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided tail probabilities of differences of means whose SE is estimated from n
    patients (Student's t, n - 1 degrees of freedom: Student 1908), and which rows had no
    Monte-Carlo error (p = 1 within numerical error, else 0)."""
    certain, equal = without_error(difference, se, scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = 2.0 * student.sf(np.abs(np.asarray(difference) / se), max(n - 1, 1))
    return np.where(certain, equal.astype(float), p), certain


def critical_t(n_tests: int, n: int, alpha: float = FAMILY_ALPHA) -> float:
    """The Bonferroni bound for n_tests two-sided t tests of means estimated from n
    patients, at family-wise level alpha."""
    return float(student.isf(alpha / (2 * max(n_tests, 1)), max(n - 1, 1)))


# --------------------------------------------------------------------------- the sums

@dataclass
class Moments:
    """Count, mean and sum of squared deviations of a stream of numbers, combined batch by
    batch (Chan, Golub & LeVeque 1979, "Updating formulae and a pairwise algorithm for
    computing sample variances"), so the variance needs no second pass."""
    n: int = 0
    mean: float = 0.0
    m2: float = 0.0

    def add(self, values: np.ndarray) -> None:
        values = np.asarray(values, float)
        k = values.size
        if k == 0:
            return
        mean = float(values.mean())
        m2 = float(((values - mean) ** 2).sum())
        total = self.n + k
        delta = mean - self.mean
        self.m2 += m2 + delta * delta * self.n * k / total
        self.mean += delta * k / total
        self.n = total

    @property
    def se(self) -> float:
        """Standard error of the mean."""
        return float(np.sqrt(self.m2 / (self.n - 1) / self.n)) if self.n > 1 else np.inf


@dataclass
class Shares:
    """One group's sums on the grid: patients, simulated counts, and the sums of each
    patient's analytic probability p and of p (1 - p)."""
    n: int = 0
    count: np.ndarray | float = 0.0
    p: np.ndarray | float = 0.0
    variance: np.ndarray | float = 0.0

    def add(self, inside: np.ndarray, p: np.ndarray) -> None:
        """inside (N, T, ...) 0/1; p the patients' probabilities, (N, T, ...) or one row
        for all of them."""
        n = inside.shape[0]
        self.n += n
        self.count = self.count + inside.sum(axis=0)
        scale = n if p.shape[0] == 1 else 1
        self.p = self.p + scale * p.sum(axis=0)
        self.variance = self.variance + scale * (p * (1 - p)).sum(axis=0)

    def columns(self) -> dict[str, np.ndarray]:
        simulated = self.count / self.n
        analytic_share = self.p / self.n
        se = np.sqrt(self.variance) / self.n
        return {"simulated": simulated, "analytic": analytic_share, "se": se,
                "z": z_scores(simulated - analytic_share, se),
                "p_value": share_p_values(simulated, analytic_share, self.n),
                "test": np.where(se == 0.0, EXACT, SHARE_TEST)}


def share_table(shares: Shares, grid: np.ndarray, states) -> pd.DataFrame:
    """Tidy time, state, simulated, analytic, se, z, p_value, test."""
    times, index = np.meshgrid(grid, np.arange(len(states)), indexing="ij")
    data = {"time": times.ravel(), "state": np.array(states)[index.ravel()]}
    data.update({k: np.broadcast_to(v, times.shape).ravel() for k, v in shares.columns().items()})
    return pd.DataFrame(data, columns=SHARE_COLUMNS)


@dataclass(frozen=True)
class Comparison:
    counterpart: str  # which analytic counterpart was used, in plain words
    exact: bool
    shares: pd.DataFrame  # time, state, simulated, analytic, se, z, p_value, test
    subgroups: pd.DataFrame  # the same by attribute level or band
    outcomes: pd.DataFrame  # measure, simulated, analytic, se, z, p_value, test
    average_patient: pd.DataFrame  # measure, population, average_patient, difference, ...
    survival: pd.DataFrame  # time, simulated, analytic, se, z: the share not yet absorbed
    critical: float  # the |z| a single normal comparison would need to disagree
    level: float  # the p-value below which a comparison disagrees (alpha / K)
    agrees: bool | None  # None when there is no exact counterpart
    verdict: str
    average_verdict: str


PIECE = 5000  # patients whose analytic counterparts are held at once: a batch's expanded
# per-patient chains would otherwise set a run's peak memory


@dataclass
class ComparisonSums:
    """A comparison of one model's simulation with its analytic counterpart, accumulated
    batch by batch (`add`), then read (`finish`). The average patient is the population
    section's (`cohort_multipliers`), each batch with its own patients' windows."""
    model: BoundModel
    grid: np.ndarray
    limit: int | None = None  # compare only the first `limit` patients (None: all)
    cohort: Multipliers | None = None
    shares: Shares = field(default_factory=Shares)
    survival: Shares = field(default_factory=Shares)
    subgroups: dict = field(default_factory=dict)  # (attribute, level) -> Shares
    deviations: dict = field(default_factory=dict)  # measure -> Moments of simulated - expected
    totals: dict = field(default_factory=dict)  # measure -> [simulated, expected] sums
    average: dict = field(default_factory=dict)  # measure -> [population, average] sums
    paired: dict = field(default_factory=dict)  # measure -> Moments of average - simulated
    result: CohortResult | None = None  # the first batch's, for the counterpart's name
    ways: WaySums | None = None  # each way's expected number and value, for the rare ways
    # whether the model's outcomes can vary for these patients (else every patient's outcome
    # is certain, and equal outcomes are no evidence about the Monte-Carlo error): life years
    # where the share alive is strictly between 0 and 1, the others where any share is or an
    # expected count is not a whole number
    varies: dict = field(default_factory=lambda: {"alive": False, "any": False})

    def __post_init__(self):
        if self.cohort is None:
            self.cohort = cohort_multipliers(self.model)
        self.ways = WaySums(self.model)

    def add(self, sim: Simulation, result: CohortResult | None = None) -> None:
        """One batch: its simulation and (when the caller has it) its analytic result;
        patients past the `limit` are not compared."""
        if self.limit is not None:
            if self.shares.n >= self.limit:
                return
            if sim.size > self.limit - self.shares.n:
                sim, result = sim.head(self.limit - self.shares.n), None
        if result is None and sim.size > PIECE:  # their counterparts a piece at a time
            for lo in range(0, sim.size, PIECE):
                self.add(sim.rows(slice(lo, lo + PIECE)))
            return
        model = sim.model
        if result is None:
            result = analytic(model, mult=sim.mult.distinct(), times=sim.grid)
        self.result = self.result or result
        states, trace = sim.states, on_grid(result, sim.grid)
        counts = result.exposure.occurrences[..., 0]
        # a sum of shares may round above 1 (1 + 2e-16 where no one can yet be absorbed)
        alive_share = np.minimum(trace[..., ~np.asarray(model.absorbing, bool)].sum(axis=-1), 1.0)
        self.varies["alive"] |= bool(np.any(between(alive_share)))
        self.varies["any"] |= bool(np.any(between(trace)) or np.any(
            np.abs(counts - np.rint(counts)) > ROUNDOFF * np.maximum(counts, 1.0)))
        inside = states[:, :, None] == np.arange(model.n_states)  # (N, T, S)
        self.shares.add(inside, trace)
        alive = ~np.asarray(model.absorbing, bool)
        if not alive.all():
            self.survival.add(alive[states], alive_share)
        for attribute in subgroup_attributes(sim.patients):
            for level, members in sim.patients.groupby(attribute, observed=True).indices.items():
                rows = np.asarray(members)
                p = trace[rows] if trace.shape[0] > 1 else trace
                self.subgroups.setdefault((attribute, str(level)), Shares()).add(inside[rows], p)
        simulated = sim.values
        expected = outcome_values(model, result.exposure)
        self.ways.add(result.exposure, result.trace[:, 0], sim.size)
        for measure, values in simulated.items():
            self.deviations.setdefault(measure, Moments()).add(values - expected[measure])
            sums = self.totals.setdefault(measure, [0.0, 0.0])
            sums[0] += float(values.sum())
            sums[1] += float(np.broadcast_to(expected[measure], values.shape).sum())
        self.add_average(sim, result, simulated, expected)

    def add_average(self, sim: Simulation, result: CohortResult, simulated, expected) -> None:
        """The average patient on this batch's windows: exactly where the model has an
        exact counterpart, else simulated on the same patients and draws."""
        average = average_patient(self.cohort, sim.mult)
        if result.exact:
            people = {m: np.broadcast_to(v, (sim.size,)) for m, v in expected.items()}
            cohort = outcome_values(sim.model, analytic(sim.model, mult=average,
                                                        times=sim.grid).exposure)
        else:
            people = simulated
            twin = simulate(sim.model, sim.patients, sim.seed, mult=average, grid=sim.grid)
            cohort = twin.values
        for measure, values in people.items():
            mine = np.broadcast_to(cohort[measure], values.shape)
            sums = self.average.setdefault(measure, [0.0, 0.0])
            sums[0] += float(values.sum())
            sums[1] += float(mine.sum())
            self.paired.setdefault(measure, Moments()).add(mine - values)

    def finish(self) -> Comparison:
        model, result = self.model, self.result
        shares = share_table(self.shares, self.grid, model.states)
        outcomes = self.outcome_table()
        average = self.average_table()
        tests = len(shares) + len(outcomes)
        level = FAMILY_ALPHA / max(tests, 1)
        critical = critical_z(tests)
        counterpart = counterpart_name(result)
        subgroups = self.subgroup_table()
        if result.exact:
            agrees, verdict = share_verdict(shares, outcomes, counterpart, level, self.shares.n)
        else:
            agrees = None
            shares, outcomes, subgroups = (t.assign(test=APPROXIMATE) if "test" in t.columns
                                           else t for t in (shares, outcomes, subgroups))
            verdict = (f"There is no exact counterpart for this model ({'; '.join(result.reasons)}); "
                       "the analytic figures beside the simulation are the Markov approximation "
                       "these reasons describe, shown for orientation only: nothing is "
                       "tested, and the p-values beside them measure the distance from the "
                       "approximation, not an error.")
        return Comparison(counterpart, result.exact, shares, subgroups, outcomes,
                          average, self.survival_table(), critical, level, agrees, verdict,
                          average_verdict(average, self.shares.n))

    def outcome_table(self) -> pd.DataFrame:
        rows = []
        for measure, moments in self.deviations.items():
            simulated, expected = (s / moments.n for s in self.totals[measure])
            rows.append((measure, simulated, expected, moments.se, simulated - expected))
        table = pd.DataFrame(rows, columns=["measure", "simulated", "analytic", "se", "difference"])
        n = self.shares.n
        still, _ = without_error(table.difference, table.se, table.analytic)
        # no variation among the patients is no Monte-Carlo error only where the model
        # cannot vary; where it can (a few patients, a rare event) the SE is unknown
        nothing = unvalued(self.model)  # a measure valued nowhere is 0 for everyone
        varies = np.array([self.varies["alive" if m == "life_years" else "any"]
                           and m.removesuffix("_discounted") not in nothing
                           for m in table.measure], bool)
        certain = still & ~varies
        rare = [self.rare_ways(m, n) for m in table.measure]
        floor = np.array([f for f, _ in rare])
        se = np.where(still, table.se, np.maximum(table.se, np.sqrt(floor / max(n, 1))))
        p, _ = mean_p_values(table.difference, se, table.analytic, n)
        untested = np.where(certain, "", np.where(n < FEWEST_FOR_MEANS, FEW,
                                                  np.where(still, UNSEEN, "")))
        tested = untested == ""
        # an untested row has no z or p-value (left empty), not 0 and 1, which read as a pass
        z = np.where(~tested, np.nan, np.where(still, 0.0,
                                               z_scores(table.difference.to_numpy(), se)))
        monte_carlo = np.where(se > table.se, [FLOORED + note for _, note in rare], MONTE_CARLO)
        # an SE within ROUNDOFF is round-off of a deterministic outcome (1e-14, say): 0, as
        # the test column says, so that no table shows noise as if it were an error
        return table.drop(columns="difference").assign(
            se=np.where(certain, 0.0, np.where(tested, se, np.nan)), z=z,
            p_value=np.where(tested, p, np.nan),
            test=np.where(certain, EXACT, np.where(tested, monte_carlo, untested)))

    def rare_ways(self, measure: str, n: int) -> tuple[float, str]:
        """The variance per patient a mean's rare ways give at least (the sum of their
        compound-Poisson variances), and what the test column adds when it sets the SE:
        the largest of them, if it is expected fewer than SEEN times among the patients."""
        ways = self.ways.variances(measure)
        largest = int(np.argmax(ways))
        count = self.ways.count[largest]
        note = (f" (mostly {self.ways.names[largest]}, expected {count:.2g} times among these "
                f"{n} patients: its own value is hardly checked; simulate more patients)"
                if count < SEEN else "")
        return float(ways.sum()), note

    def subgroup_table(self) -> pd.DataFrame:
        frames = [share_table(s, self.grid, self.model.states).assign(attribute=a, level=lv)
                  for (a, lv), s in self.subgroups.items()]
        columns = ["attribute", "level", *SHARE_COLUMNS]
        return pd.concat(frames, ignore_index=True)[columns] if frames else pd.DataFrame(columns=columns)

    def survival_table(self) -> pd.DataFrame:
        if not self.survival.n:
            return pd.DataFrame(columns=["time", "simulated", "analytic", "se", "z"], dtype=float)
        columns = self.survival.columns()
        return pd.DataFrame({"time": self.grid, **{k: columns[k] for k in
                                                   ("simulated", "analytic", "se", "z")}})

    def average_table(self) -> pd.DataFrame:
        exact = self.result.exact
        rows = []
        for measure, (population, cohort) in self.average.items():
            n = self.paired[measure].n
            pop, avg = population / n, cohort / n
            se = self.paired[measure].se
            # a difference round-off alone explains (the same value summed in another
            # order) is shown as the 0 it is
            gap = 0.0 if within_roundoff(avg - pop, pop) else avg - pop
            rows.append((measure, pop, avg, gap, gap / pop if pop else np.nan, se))
        table = pd.DataFrame(rows, columns=["measure", "population", "average_patient",
                                            "difference", "relative_difference", "se"])
        basis = ("exact: both analytic, se from sampling the patients" if exact
                 else "simulated on the same patients and draws")
        return table.assign(z=z_scores(table.difference.to_numpy(), table.se.to_numpy()),
                            basis=basis)


def compare(sim: Simulation, result: CohortResult | None = None) -> Comparison:
    """Compare a simulation with the analytic counterpart of its model and patients
    (`result`, when the caller has computed it already)."""
    sums = ComparisonSums(sim.model, sim.grid)
    sums.add(sim, result)
    return sums.finish()


def trace_table(sim: Simulation, result: CohortResult) -> pd.DataFrame:
    """Simulated and analytic state shares on the grid, against a given analytic result."""
    shares = Shares()
    shares.add(sim.states[:, :, None] == np.arange(sim.model.n_states), on_grid(result, sim.grid))
    return share_table(shares, sim.grid, sim.model.states)


def counterpart_name(result: CohortResult) -> str:
    heterogeneous = result.trace.shape[0] > 1
    if not result.exact:
        return "no exact counterpart: " + "; ".join(result.reasons)
    kind = "the average of per-patient analytic traces" if heterogeneous else "the cohort trace"
    if "expanded" in result.method:
        kind = "the expanded chain (tunnel/count/window states), " + (
            "averaged over patients" if heterogeneous else "for the cohort")
    return f"{kind} ({result.method})"


def readable(x: float, digits: int = 4) -> str:
    """A figure of a verdict with `digits` significant digits, in plain notation up to the
    thousands (54,440 rather than 5.444e+04), where counts and money live."""
    x = float(x)
    if 10 ** (digits - 1) <= abs(x) < 1e15:
        return f"{x:,.0f}"
    return f"{x:.{digits}g}"


def share_verdict(shares: pd.DataFrame, outcomes: pd.DataFrame, counterpart: str,
                  level: float, n: int) -> tuple[bool, str]:
    """Whether every comparison is within chance, and the sentence that says so (naming the
    test that gave the smallest p-value, with what it read)."""
    rows = pd.concat([shares.assign(what=shares.state + " at " + shares.time.map("{:g}".format),
                                    kind="share"),
                      outcomes.assign(what=outcomes.measure, kind="mean")], ignore_index=True)
    judged = rows[~rows.test.isin(NOT_TESTED)]  # every share is
    worst = judged.loc[judged.p_value.idxmin()]
    exact = int((rows.test == EXACT).sum())
    basis = (f"Bonferroni over {len(rows)} comparisons at family-wise level {FAMILY_ALPHA}: "
             f"each p-value must be at least {level:.2g}")
    certain = (f"; {exact} comparison{'s' if exact != 1 else ''} without Monte-Carlo error "
               f"agree within numerical error ({ROUNDOFF:g} relative)" if exact else "")
    for label in NOT_TESTED:
        unseen = int((rows.test == label).sum())
        if unseen:
            certain += (f"; {unseen} outcome{'s' if unseen != 1 else ''} {label} "
                        "(simulate more patients)")
    floored = rows[rows.test.str.startswith(FLOORED)]
    if len(floored):
        note = max((test[len(FLOORED):] for test in floored.test), key=len)
        certain += (f"; {', '.join(floored.measure)} tested on a standard error no less than "
                    f"the model's own variance of its rare ways{note}")
    if worst.p_value >= level and (rows.test == EXACT).all():  # nothing is random
        which = ("its one comparison is" if len(rows) == 1 else
                 f"every one of the {len(rows)} comparisons is")
        return True, (f"The simulation agrees with {counterpart}: {which} without Monte-Carlo "
                      "error (the model's outcome is certain for these patients) and agrees "
                      f"within numerical error ({ROUNDOFF:g} relative).")
    if worst.p_value >= level:
        return True, (f"The simulation agrees with {counterpart}: the smallest p-value is for "
                      f"{worst.what} ({evidence(worst, n)}; {basis}){certain}.")
    gap = (f"differs by {worst.simulated - worst.analytic:.3g} where there is no Monte-Carlo "
           "error" if worst.test == EXACT else f"has {evidence(worst, n)}")
    return False, (f"The simulation DISAGREES with {counterpart}: {worst.what} {gap} "
                   f"({basis}). Check the engine or the model.")


def evidence(row, n: int) -> str:
    """A comparison's p-value and the test that gave it: the exact binomial tail of a share's
    count, Student's t of a mean, or none where there is no Monte-Carlo error."""
    if row.test == EXACT:
        return f"p = {row.p_value:.2g}, {EXACT}"
    if row.kind == "share":
        return (f"exact binomial tail p = {row.p_value:.2g}; {row.simulated * n:.0f} of {n} "
                f"patients seen against {readable(row.analytic * n, 3)} expected")
    floored = (", on a standard error no less than the model's own variance of its rare "
               "ways" if row.test.startswith(FLOORED) else "")
    return (f"Student's t p = {row.p_value:.2g}; t = {row.z:.2f} with {n - 1} degrees of "
            f"freedom{floored}")


AVERAGE = "The 'average patient' cohort (everyone given the mean attributes)"
MEASURE_WORDS = {"life_years": "life years (undiscounted)", "qalys": "QALYs (undiscounted)",
                 "costs": "costs (undiscounted)", "qalys_discounted": "QALYs (discounted)",
                 "costs_discounted": "costs (discounted)"}


def average_verdict(rows: pd.DataFrame, n: int) -> str:
    """The average patient's gap in words, naming the measure and its discounting, with its
    paired test (Student's t over the n patients, as for the outcomes). Where both sides are
    exact the only noise left is which patients were sampled, and the test says whether
    the gap is more than that: a property of the model, or possibly chance in the sample."""
    exact = rows.basis.iloc[0].startswith("exact")
    if exact and np.all(np.abs(rows.difference)
                        <= ROUNDOFF * np.maximum(rows.population.abs(), 1.0)):
        return (f"{AVERAGE} gives the population's results exactly: here the mean "
                "attributes stand for the patients.")
    if exact:
        return exact_average_verdict(rows, n)
    if n < FEWEST_FOR_MEANS:
        return (f"{AVERAGE} is {FEW} (simulate more patients).")
    critical = critical_t(len(rows), n)
    worst = rows.loc[rows.z.abs().fillna(0.0).idxmax()]
    if not abs(worst.z) >= critical:
        return (f"{AVERAGE} is within Monte-Carlo error of the simulated population "
                f"(largest |t| {abs(worst.z):.2f}, below {critical:.2f}: Bonferroni over "
                f"{len(rows)} paired t tests with {n - 1} degrees of freedom).")
    return (f"{AVERAGE} misrepresents the population: {MEASURE_WORDS[worst.measure]} "
            f"{readable(worst.average_patient)} against {readable(worst.population)} simulated "
            f"({worst.relative_difference:+.1%}, t = {worst.z:.1f} with {n - 1} degrees of "
            "freedom). Heterogeneity matters here; use the population results.")


def exact_average_verdict(rows: pd.DataFrame, n: int) -> str:
    """Both sides exact: the gap of the measure with the largest relative gap, and whether
    the largest t is beyond what sampling n patients' attributes gives (Bonferroni over
    the measures)."""
    worst = rows.loc[rows.relative_difference.abs().fillna(0.0).idxmax()]
    gap = (f"{AVERAGE} gives {MEASURE_WORDS[worst.measure]} {readable(worst.average_patient)} "
           f"against the population's {readable(worst.population)} "
           f"({worst.relative_difference:+.1%}, a difference of {readable(worst.difference)}). "
           "Both are exact analytic results, so the gap is not Monte-Carlo noise; ")
    if n < FEWEST_FOR_MEANS:
        return gap + f"whether it is more than chance in which patients were sampled is {FEW}."
    critical = critical_t(len(rows), n)
    largest = float(rows.z.abs().max())
    test = (f"largest |t| {largest:.2f} against {critical:.2f}, Bonferroni over {len(rows)} "
            f"paired t tests with {n - 1} degrees of freedom")
    if largest >= critical:
        return (gap + f"it is also beyond what sampling {n} patients gives ({test}), so it is "
                "a property of the model: what treating the patients as one average patient "
                "would change.")
    return (gap + f"but it is within what sampling {n} patients gives ({test}), so it may be "
            "chance in which patients were sampled (sample more patients to tell).")

