"""The decision problem: every strategy on the same patients, then who gains and at what cost.

All strategies simulate the same patients with the same seed, so every draw serves the
same purpose in each (common random numbers) and paired differences carry little noise.
Results: per-strategy means with Monte-Carlo standard errors, paired increments against the
comparator with confidence intervals, the incremental analysis along the frontier, net
benefit at the threshold, subgroups, and the patients needed for a target precision.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from microsim.decision import economics
from microsim.binding import bind
from microsim.results.comparison import MONTE_CARLO, ROUNDOFF, within_roundoff
from microsim.results.outcomes import outcome_values
from microsim.patients.population import subgroup_attributes
from microsim.scenario.spec import Scenario
from microsim.simulation import Simulation, report_grid, simulate

COST, EFFECT = "costs_discounted", "qalys_discounted"
REPORTED = ("costs_discounted", "qalys_discounted", "life_years", "costs", "qalys")
AS_WRITTEN = "as written"  # the name of the model's results when it defines no strategies


def strategy_names(scenario: Scenario) -> list[str]:
    """Comparator first, then the others in file order."""
    return sorted((s.name for s in scenario.strategies),
                  key=lambda name: not scenario.strategy(name).comparator)


def run_strategies(scenario: Scenario, patients: pd.DataFrame, seed: int,
                   values: dict | None = None, engine: str = "auto") -> dict[str, Simulation]:
    """Simulate every strategy on the same patients with the same seed, comparator first
    (a scenario without strategies: the model as written, named AS_WRITTEN)."""
    sims = {}
    for name in strategy_names(scenario) or [None]:
        model = bind(scenario, values, strategy=name)
        sims[name or AS_WRITTEN] = simulate(model, patients, seed,
                                            batch_size=scenario.simulation.batch_size,
                                            grid=report_grid(model, scenario.simulation.grid),
                                            engine=engine)
    return sims


def outcome_frame(name: str, sim: Simulation) -> pd.DataFrame:
    """One strategy's per-patient outcomes: patient, strategy, then one column per measure."""
    frame = pd.DataFrame({m: sim.values[m] for m in REPORTED})
    frame.insert(0, "strategy", name)
    frame.insert(0, "patient", sim.patients["patient"].to_numpy())
    return frame


class OutcomeRows:
    """Every strategy's per-patient outcomes, the rows of `outcome_frame` with the strategy
    as a category, filled in place batch by batch for a run of `rows` rows in all: joining
    a big run's per-batch frames held two copies of them at its end."""

    def __init__(self, rows: int, names: list[str]):
        self.names, self.used = names, 0
        self.patient, self.code = np.empty(rows, np.int64), np.empty(rows, np.int16)
        self.values = {m: np.empty(rows) for m in REPORTED}

    def add(self, name: str, sim: Simulation) -> None:
        rows = slice(self.used, self.used + len(sim.patients))
        self.patient[rows] = sim.patients["patient"].to_numpy()
        self.code[rows] = self.names.index(name)
        for m in REPORTED:
            self.values[m][rows] = sim.values[m]
        self.used = rows.stop

    def frame(self) -> pd.DataFrame:
        strategy = pd.Categorical.from_codes(self.code[:self.used], self.names)
        return pd.DataFrame({"patient": self.patient[:self.used], "strategy": strategy,
                             **{m: v[:self.used] for m, v in self.values.items()}}, copy=False)


def patient_outcomes(sims: dict[str, Simulation]) -> pd.DataFrame:
    """Tidy per-patient outcomes of every strategy: patient, strategy, measures."""
    return pd.concat([outcome_frame(name, sim) for name, sim in sims.items()], ignore_index=True)


def standard_error(x: np.ndarray) -> float:
    return float(np.std(x, ddof=1) / np.sqrt(len(x))) if len(x) > 1 else float("nan")


ROUNDOFF_SE = (f"none: the patients' values differ by round-off only (an SE within "
               f"{ROUNDOFF:g} of the mean, relative), so the SE is shown as 0")


def without_roundoff(se, mean) -> tuple[np.ndarray, np.ndarray]:
    """Standard errors with those that numerical error alone explains (every patient with
    the same value, summed in another order: 1e-15) set to 0, by the comparison's rule and
    tolerance (`comparison.within_roundoff` relative to the mean they belong to), and each
    one's error: ROUNDOFF_SE or MONTE_CARLO."""
    still = within_roundoff(se, mean)
    return np.where(still, 0.0, se), np.where(still, ROUNDOFF_SE, MONTE_CARLO)


def strategy_table(outcomes: pd.DataFrame) -> pd.DataFrame:
    """Per strategy: mean and Monte-Carlo standard error of every reported measure, round-off
    shown as 0 (`without_roundoff`), and the `error` column says which."""
    rows = []
    for name, mine in strategy_rows(outcomes):
        for measure in REPORTED:
            x = outcomes[measure].to_numpy()[mine]
            rows.append((name, measure, float(x.mean()), standard_error(x)))
    table = pd.DataFrame(rows, columns=["strategy", "measure", "mean", "se"])
    table["se"], table["error"] = without_roundoff(table.se, table["mean"])
    return table


def strategy_rows(outcomes: pd.DataFrame):
    """(strategy, its rows as a mask) in the order strategies first appear (a groupby's with
    sort=False), without a copy of each group's frame: a million patients' groups cost
    more memory at their peak than the run held for them."""
    names = outcomes["strategy"].to_numpy()
    for name in pd.unique(names):
        yield name, names == name


def wide(outcomes: pd.DataFrame, measure: str) -> pd.DataFrame:
    """patients x strategies table of one measure (paired by patient), as
    `outcomes.pivot(index="patient", columns="strategy")` gives it (patients and strategies
    sorted), placed column by column: the pivot's own working copies took some 330 bytes a
    patient at their peak, more than the run held for them."""
    patients, names = outcomes["patient"].to_numpy(), outcomes["strategy"].to_numpy()
    values = outcomes[measure].to_numpy()
    index = np.unique(patients)
    columns = {}
    for name in sorted(pd.unique(names)):
        mine = names == name
        column = np.full(len(index), np.nan)
        column[np.searchsorted(index, patients[mine])] = values[mine]
        columns[name] = column
    return pd.DataFrame(columns, index=pd.Index(index, name="patient")).rename_axis(
        columns="strategy")


def paired_increments(outcomes: pd.DataFrame, comparator: str, threshold: float) -> pd.DataFrame:
    """Each strategy minus the comparator on the same patients: mean, SE, 95% CI; an SE that
    round-off alone explains is 0 (`without_roundoff`, relative to the increment's mean),
    its interval the mean itself, and the `error` column says which."""
    cost, effect = wide(outcomes, COST), wide(outcomes, EFFECT)
    frames = []
    for name in cost.columns:
        if name == comparator:
            continue
        table = economics.paired_difference(cost[comparator], effect[comparator], cost[name],
                                            effect[name], threshold)
        frames.append(table.assign(strategy=name))
    if not frames:
        return pd.DataFrame(columns=["strategy", "measure", "mean", "standard_error", "lower",
                                     "upper", "n", "error"])
    table = pd.concat(frames, ignore_index=True)
    table["standard_error"], table["error"] = without_roundoff(table.standard_error, table["mean"])
    exact = table.standard_error == 0
    table.loc[exact, "lower"] = table.loc[exact, "upper"] = table.loc[exact, "mean"]
    return table[["strategy"] + [c for c in table.columns if c != "strategy"]]


def frontier(outcomes: pd.DataFrame, threshold: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Incremental analysis (dominance, ICERs) and net benefit at the threshold."""
    means = pd.DataFrame({measure: {name: float(outcomes[measure].to_numpy()[mine].mean())
                                    for name, mine in strategy_rows(outcomes)}
                          for measure in (COST, EFFECT)})
    names = list(means.index)
    analysis = economics.incremental_analysis(names, means[COST], means[EFFECT])
    benefit = economics.net_benefit(names, means[COST], means[EFFECT], [threshold])
    return analysis, benefit


def subgroups(outcomes: pd.DataFrame, patients: pd.DataFrame, comparator: str,
              threshold: float) -> pd.DataFrame:
    """Paired incremental NMB of each strategy by subgroup, with SE and a plain verdict."""
    nmb = threshold * wide(outcomes, EFFECT) - wide(outcomes, COST)
    people = patients.set_index("patient").loc[nmb.index]
    rows = []
    for variable in subgroup_attributes(patients):
        for level, members in people.groupby(variable, observed=True).groups.items():
            part = nmb.loc[members]
            for name in nmb.columns:
                if name == comparator:
                    continue
                gain = (part[name] - part[comparator]).to_numpy()
                mean, se = float(gain.mean()), standard_error(gain)
                scale = float(np.abs(part[comparator]).mean()) or 1.0
                rows.append((variable, str(level), name, len(gain), mean, se,
                             verdict(mean, se, scale=scale)))
    return pd.DataFrame(rows, columns=["attribute", "level", "strategy", "patients",
                                       "incremental_nmb", "se", "verdict"])


def verdict(mean: float, se: float, z: float = 1.96, scale: float = 1.0) -> str:
    """Plain words for a paired increment; `scale` is the size of the values compared,
    so that differences at the level of rounding read as none."""
    if not np.isfinite(se):
        return "too few patients to say"
    if abs(mean) <= 1e-9 * scale and se <= 1e-9 * scale:
        return "no difference (the strategy changes nothing here)"
    if mean - z * se > 0:
        return "pays (95% CI above 0)"
    if mean + z * se < 0:
        return "does not pay (95% CI below 0)"
    return "uncertain (95% CI spans 0)"


def precision_needed(outcomes: pd.DataFrame, comparator: str, threshold: float,
                     target: float | None) -> pd.DataFrame:
    """Patients needed for a 95% CI half-width of incremental NMB of `target`, from the
    paired standard deviation. Without a target: the half-width equal to the estimate's own
    size, i.e. the patients needed before the sign of the increment is clear at 95%.
    An increment the same for every patient (SD 0) is given exactly by 1 patient; a zero
    increment that varies has no sign to make clear, so no number (NaN) is needed."""
    nmb = threshold * wide(outcomes, EFFECT) - wide(outcomes, COST)
    rows = []
    for name in nmb.columns:
        if name == comparator:
            continue
        gain = (nmb[name] - nmb[comparator]).to_numpy()
        sd = float(np.std(gain, ddof=1))
        half_width = target if target is not None else abs(float(gain.mean()))
        if sd == 0:
            needed = 1.0
        elif half_width > 0:
            needed = economics.patients_needed(sd, half_width=half_width)
        else:
            needed = math.nan
        rows.append((name, half_width, sd, len(gain), needed))
    return pd.DataFrame(rows, columns=["strategy", "target_half_width", "sd_paired_nmb",
                                       "patients_now", "patients_needed"])



def treated_count(sim: Simulation) -> int:
    """How many of a simulation's patients its strategy puts on treatment at some time:
    those who spent time on it alive (with a window, alive when it opens; where treatment
    starts on entering a state, in a treated copy of a state while eligible)."""
    return 0 if sim.mult.window is None else int(sim.treated.sum())


def treatment_counts(sim: Simulation) -> dict[str, int]:
    """Under a sequence of treatments (`then`), how many patients spent time on each, by
    treatment name (first line first); empty for a single treatment or none."""
    if len(sim.treated_by) < 2:
        return {}
    return {name: int(on.sum()) for name, on in sim.treated_by.items()}


@dataclass(frozen=True)
class Decision:
    comparator: str
    threshold: float
    treated: dict[str, int]  # patients each strategy treats
    outcomes: pd.DataFrame  # per patient and strategy
    strategies: pd.DataFrame
    increments: pd.DataFrame
    analysis: pd.DataFrame
    net_benefit: pd.DataFrame
    subgroups: pd.DataFrame
    precision: pd.DataFrame


def decide(scenario: Scenario, outcomes: pd.DataFrame, patients: pd.DataFrame,
           treated: dict[str, int]) -> Decision:
    """The decision tables from every strategy's per-patient outcomes (`patient_outcomes`),
    the patients' subgroup attributes and how many each strategy treats."""
    comparator = strategy_names(scenario)[0]
    threshold = scenario.economics.threshold
    analysis, benefit = frontier(outcomes, threshold)
    return Decision(comparator, threshold, treated, outcomes, strategy_table(outcomes),
                    paired_increments(outcomes, comparator, threshold), analysis, benefit,
                    subgroups(outcomes, patients, comparator, threshold),
                    precision_needed(outcomes, comparator, threshold,
                                     scenario.economics.precision))


def decision_of(scenario: Scenario, sims: dict[str, Simulation]) -> Decision:
    """The decision of simulations held in memory (`run_strategies` on one set of patients)."""
    patients = next(iter(sims.values())).patients
    return decide(scenario, patient_outcomes(sims), patients,
                  {name: treated_count(sim) for name, sim in sims.items()})
