"""Economic evaluation on numbers: incremental analysis, net benefit, acceptability, EVPI,
paired Monte-Carlo summaries, and the inner/outer sample split for patient-level PSA.

Inputs are numpy arrays or tidy tables; results are tidy pandas tables (long format) or
small frozen dataclasses. Nothing here knows about scenario files or engines. "Effect" is
the health outcome (QALYs); a threshold is the value of one unit of effect in cost units.
A PSA table has one row per (draw, strategy) with columns draw, strategy, cost, effect.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

_ICER_RELATIVE_TOLERANCE = 1e-9


def _strategy_arrays(strategies, costs, effects) -> tuple[list[str], np.ndarray, np.ndarray]:
    names = [str(s) for s in strategies]
    cost, effect = np.asarray(costs, dtype=float), np.asarray(effects, dtype=float)
    if not (cost.shape == effect.shape == (len(names),)) or not names:
        raise ValueError("strategies, costs and effects must be non-empty and of one length")
    if len(set(names)) != len(names):
        raise ValueError("strategy names must be unique")
    if not (np.all(np.isfinite(cost)) and np.all(np.isfinite(effect))):
        raise ValueError("costs and effects must be finite")
    return names, cost, effect


def _thresholds(thresholds) -> np.ndarray:
    values = np.atleast_1d(np.asarray(thresholds, dtype=float))
    if values.ndim != 1 or not np.all(np.isfinite(values) & (values >= 0)):
        raise ValueError("thresholds must be finite and >= 0")
    return values


def incremental_analysis(strategies, costs, effects) -> pd.DataFrame:
    """Rank strategies by cost, remove dominated then extendedly dominated ones, give ICERs.

    Drummond et al. (2015), "Methods for the Economic Evaluation of Health Care
    Programmes", 4th ed.; Cantor (1994), "Cost-effectiveness analysis, extended dominance,
    and ethics: a quantitative assessment".

    Ties, deterministically: strategies are ordered by cost, then by effect (higher first),
    then by input order. A strategy is dominated when an earlier one in that order is at
    least as effective (it costs no less and is no more effective); of two identical
    strategies the later in input order is dominated. Dominated_by names the least costly
    dominating strategy. A frontier strategy is extendedly dominated when its ICER is higher
    than the next frontier strategy's (equal ICERs, within a relative 1e-9, keep both);
    the first such strategy is removed and ICERs recomputed until none is left. Dominated_by
    then names the two final frontier strategies whose mix dominates it ("A and C").
    Rows come in cost order; increments and ICERs are against the previous frontier
    strategy (named in compared_with) and are NaN off the frontier and for the first.
    """
    names, cost, effect = _strategy_arrays(strategies, costs, effects)
    order = list(np.lexsort((np.arange(len(names)), -effect, cost)))
    status = {i: "frontier" for i in order}
    dominated_by: dict[int, str] = {}
    frontier: list[int] = []
    for i in order:
        dominator = next((j for j in frontier if effect[j] >= effect[i]), None)
        if dominator is None:
            frontier.append(i)
        else:
            status[i], dominated_by[i] = "dominated", names[dominator]

    def icer(lower: int, upper: int) -> float:
        return (cost[upper] - cost[lower]) / (effect[upper] - effect[lower])

    removed = []
    while True:
        ratios = [icer(a, b) for a, b in zip(frontier, frontier[1:])]
        position = next((k for k in range(len(ratios) - 1)
                         if ratios[k] > ratios[k + 1] * (1 + _ICER_RELATIVE_TOLERANCE)), None)
        if position is None:
            break
        removed.append(frontier.pop(position + 1))
    for i in removed:
        lower = max((j for j in frontier if effect[j] < effect[i]), key=lambda j: effect[j])
        upper = min((j for j in frontier if effect[j] > effect[i]), key=lambda j: effect[j])
        status[i], dominated_by[i] = "extendedly dominated", f"{names[lower]} and {names[upper]}"

    previous = {b: a for a, b in zip(frontier, frontier[1:])}
    rows = []
    for i in order:
        j = previous.get(i)
        rows.append({
            "strategy": names[i], "costs_discounted": cost[i], "qalys_discounted": effect[i], "status": status[i],
            "dominated_by": dominated_by.get(i), "compared_with": None if j is None else names[j],
            "incremental_costs": np.nan if j is None else cost[i] - cost[j],
            "incremental_qalys": np.nan if j is None else effect[i] - effect[j],
            "icer": np.nan if j is None else icer(j, i),
        })
    table = pd.DataFrame(rows)
    for column in ("strategy", "status", "dominated_by", "compared_with"):
        table[column] = table[column].astype("string")
    return table


def net_benefit(strategies, costs, effects, thresholds) -> pd.DataFrame:
    """Net monetary benefit NMB = threshold*E - C and net health benefit NHB = E - C/threshold.

    Stinnett & Mullahy (1998), "Net health benefits: a new framework for the analysis of
    uncertainty in cost-effectiveness analysis". One row per (threshold, strategy); `best`
    marks the highest NMB at each threshold (ties: first in input order). NHB is NaN at a
    threshold of 0.
    """
    names, cost, effect = _strategy_arrays(strategies, costs, effects)
    lam = _thresholds(thresholds)
    nmb = lam[:, None] * effect - cost
    with np.errstate(divide="ignore", invalid="ignore"):
        nhb = effect - cost / lam[:, None]
    nhb[lam == 0] = np.nan
    best = np.zeros_like(nmb, dtype=bool)
    best[np.arange(len(lam)), nmb.argmax(axis=1)] = True
    return pd.DataFrame({
        "threshold": np.repeat(lam, len(names)),
        "strategy": pd.Series(np.tile(names, len(lam)), dtype="string"),
        "costs_discounted": np.tile(cost, len(lam)), "qalys_discounted": np.tile(effect, len(lam)),
        "nmb": nmb.ravel(), "nhb": nhb.ravel(), "best": best.ravel(),
    })


def best_strategy(strategies, costs, effects, thresholds) -> pd.DataFrame:
    """The strategy with the highest NMB at each threshold: threshold, strategy, nmb."""
    table = net_benefit(strategies, costs, effects, thresholds)
    return table.loc[table["best"], ["threshold", "strategy", "nmb"]].reset_index(drop=True)


def _psa_arrays(psa: pd.DataFrame) -> tuple[list[str], np.ndarray, np.ndarray, np.ndarray]:
    """Strategies (first-appearance order), sorted draw labels, (draws x strategies) cost and effect."""
    missing = {"draw", "strategy", "costs_discounted", "qalys_discounted"} - set(psa.columns)
    if missing:
        raise ValueError(f"PSA table lacks columns {sorted(missing)}")
    strategies = list(pd.unique(psa["strategy"]))
    wide = psa.pivot(index="draw", columns="strategy", values=["costs_discounted", "qalys_discounted"])
    cost = wide["costs_discounted"].reindex(columns=strategies).to_numpy(dtype=float)
    effect = wide["qalys_discounted"].reindex(columns=strategies).to_numpy(dtype=float)
    if not (np.all(np.isfinite(cost)) and np.all(np.isfinite(effect))):
        raise ValueError("every draw needs a finite cost and effect for every strategy")
    return [str(s) for s in strategies], wide.index.to_numpy(), cost, effect


def _psa_nmb(psa: pd.DataFrame, thresholds) -> tuple[list[str], np.ndarray, np.ndarray]:
    """Strategies, thresholds and NMB of shape (thresholds, draws, strategies)."""
    strategies, _, cost, effect = _psa_arrays(psa)
    lam = _thresholds(thresholds)
    return strategies, lam, lam[:, None, None] * effect[None] - cost[None]


def cost_effectiveness_plane(psa: pd.DataFrame, comparator: str) -> pd.DataFrame:
    """Per draw, each strategy's incremental cost and effect against `comparator`."""
    strategies, draws, cost, effect = _psa_arrays(psa)
    if comparator not in strategies:
        raise ValueError(f"comparator {comparator!r} is not among the strategies {strategies}")
    k = strategies.index(comparator)
    others = [i for i in range(len(strategies)) if i != k]
    return pd.DataFrame({
        "draw": np.repeat(draws, len(others)),
        "strategy": pd.Series(np.tile([strategies[i] for i in others], len(draws)), dtype="string"),
        "incremental_costs": (cost[:, others] - cost[:, [k]]).ravel(),
        "incremental_qalys": (effect[:, others] - effect[:, [k]]).ravel(),
    })


def acceptability_curve(psa: pd.DataFrame, thresholds) -> pd.DataFrame:
    """Cost-effectiveness acceptability curves and frontier.

    probability_best is the share of draws in which the strategy has the highest NMB
    (van Hout et al. 1994, "Costs, effects and C/E-ratios alongside a clinical trial");
    ties go to the first strategy in table order, so the shares sum to one. The frontier
    (Fenwick, Claxton & Sculpher 2001, "Representing uncertainty: the role of
    cost-effectiveness acceptability curves") is the strategy with the highest expected NMB,
    marked by `on_acceptability_frontier`.
    """
    strategies, lam, nmb = _psa_nmb(psa, thresholds)
    n_strategies = len(strategies)
    winners = nmb.argmax(axis=2)
    probability = np.stack([(winners == s).mean(axis=1) for s in range(n_strategies)], axis=1)
    expected = nmb.mean(axis=1)
    frontier = np.zeros_like(expected, dtype=bool)
    frontier[np.arange(len(lam)), expected.argmax(axis=1)] = True
    return pd.DataFrame({
        "threshold": np.repeat(lam, n_strategies),
        "strategy": pd.Series(np.tile(strategies, len(lam)), dtype="string"),
        "probability_best": probability.ravel(), "expected_nmb": expected.ravel(),
        "on_acceptability_frontier": frontier.ravel(),
    })


WITHIN = ("incremental_costs_within_variance", "incremental_qalys_within_variance",
          "incremental_within_covariance", "patients")


def acceptability_without_noise(psa: pd.DataFrame, thresholds) -> pd.DataFrame:
    """The acceptability curve with the inner patients' Monte-Carlo noise taken out.

    Each draw's incremental NMB against the comparator (the table's first strategy) is its
    true value plus the noise of its n inner patients, so the spread of the draws is the
    between-draw variance sigma^2 plus tau^2 / n (O'Hagan, Stevenson & Madan 2007, the split
    of `variance_components`), and the curve is pulled towards the middle. tau^2 at each
    threshold lambda is the mean within-draw variance lambda^2 var(dE) - 2 lambda cov(dE, dC)
    + var(dC) of the paired increments, sigma^2 = s^2 - tau^2 / n (0 if negative). Each
    strategy's increments are moved towards their mean by sqrt(sigma^2 / s^2), so that they
    spread as the true values do: the constrained Bayes estimate of an ensemble (Louis 1984,
    "Estimating a population of parameter values using Bayes and empirical Bayes methods",
    JASA 79:393-398; Ghosh 1992, "Constrained Bayes estimation with applications", JASA
    87:533-540). The posterior means (factor sigma^2 / s^2) would spread too little, by that
    factor again. For normal true values and noise the moved increments have exactly the
    true values' distribution; otherwise their mean and variance. Each strategy is moved by
    its own factor, so with three or more strategies the noise's correlation between them is
    not taken out. Means, and so the frontier, do not change.

    `psa` needs, per draw and strategy, the columns of WITHIN besides cost and effect.
    Rows: threshold, strategy, probability_best, noise_scale (the factor; nan for the
    comparator); both nan where the draws had one inner patient each (no within-draw
    variance to take out)."""
    missing = set(WITHIN) - set(psa.columns)
    if missing:
        raise ValueError(f"PSA table lacks columns {sorted(missing)}")
    strategies, _, cost, effect = _psa_arrays(psa)
    lam = _thresholds(thresholds)
    wide = psa.pivot(index="draw", columns="strategy", values=list(WITHIN))
    var_c, var_e, cov = (wide[c].reindex(columns=strategies).to_numpy(float)[:, 1:]
                         for c in WITHIN[:3])
    n = float(psa["patients"].iloc[0])
    gain = lam[:, None, None] * (effect[:, 1:] - effect[:, :1]) - (cost[:, 1:] - cost[:, :1])
    within = (lam[:, None] ** 2 * var_e.mean(axis=0) - 2 * lam[:, None] * cov.mean(axis=0)
              + var_c.mean(axis=0))
    spread = gain.var(axis=1, ddof=1) if gain.shape[1] > 1 else np.zeros(within.shape)
    between = np.maximum(spread - within / n, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(spread > 0, np.sqrt(between / spread), 1.0)
    centre = gain.mean(axis=1, keepdims=True)
    moved = centre + scale[:, None, :] * (gain - centre)
    winners = np.concatenate([np.zeros(moved.shape[:2] + (1,)), moved], axis=2).argmax(axis=2)
    probability = np.stack([(winners == s).mean(axis=1) for s in range(len(strategies))], axis=1)
    scales = np.concatenate([np.full((len(lam), 1), np.nan), scale], axis=1)
    unknown = ~np.isfinite(within).all(axis=1)  # one inner patient: no within-draw variance
    probability[unknown], scales[unknown] = np.nan, np.nan
    return pd.DataFrame({
        "threshold": np.repeat(lam, len(strategies)),
        "strategy": pd.Series(np.tile(strategies, len(lam)), dtype="string"),
        "probability_best": probability.ravel(), "noise_scale": scales.ravel()})


def regret(nmb: np.ndarray) -> np.ndarray:
    """Per threshold and draw, max_s NMB minus the NMB of the strategy best on average:
    what perfect information would have gained in that draw. `nmb` is (thresholds, draws,
    strategies); the mean over draws is EVPI = E[max_s NMB] - max_s E[NMB], written so that
    a draw whose best is the strategy best on average adds exactly 0 (the difference of the
    two means would leave their round-off: 1e-11 where one strategy wins every draw)."""
    best = nmb.mean(axis=1).argmax(axis=1)
    return nmb.max(axis=2) - np.take_along_axis(nmb, best[:, None, None], axis=2)[:, :, 0]


def per_person_evpi(psa: pd.DataFrame, thresholds) -> pd.DataFrame:
    """Per-person expected value of perfect information, EVPI = E[max_s NMB] - max_s E[NMB],
    as the mean `regret` of the draws: never negative, and exactly 0 when the strategy best
    on average is best in every draw.

    Claxton (1999), "The irrelevance of inference: a decision-making approach to the
    stochastic evaluation of health care technologies"; Briggs, Claxton & Sculpher (2006),
    ch. 7. Estimated from the PSA draws.
    """
    _, lam, nmb = _psa_nmb(psa, thresholds)
    return pd.DataFrame({
        "threshold": lam, "nmb_current_information": nmb.mean(axis=1).max(axis=1),
        "nmb_perfect_information": nmb.max(axis=2).mean(axis=1),
        "evpi": regret(nmb).mean(axis=1),
    })


def discounted_population(population_per_year, discount_rate: float) -> float:
    """Sum over years t = 1..T of I_t / (1 + r)^t: the people a decision will affect.

    As in Briggs, Claxton & Sculpher (2006), ch. 7 (from memory: year 1 discounted once)."""
    people = np.atleast_1d(np.asarray(population_per_year, dtype=float))
    if not (np.all(np.isfinite(people) & (people >= 0)) and math.isfinite(discount_rate) and discount_rate > -1):
        raise ValueError("population must be finite and >= 0, discount rate finite and > -1")
    years = np.arange(1, len(people) + 1)
    return float(np.sum(people / (1.0 + discount_rate) ** years))


def population_evpi(evpi: pd.DataFrame, population_per_year, discount_rate: float) -> pd.DataFrame:
    """The per-person EVPI table with a population_evpi column (EVPI x discounted population)."""
    return evpi.assign(population_evpi=evpi["evpi"] * discounted_population(population_per_year, discount_rate))


def _normal_quantile(confidence: float) -> float:
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be in (0, 1), got {confidence!r}")
    return float(stats.norm.ppf(0.5 + confidence / 2))


def paired_difference(comparator_costs, comparator_effects, costs, effects,
                      threshold: float, confidence: float = 0.95) -> pd.DataFrame:
    """Mean incremental cost, effect and NMB (strategy minus comparator) on the same patients.

    The standard error is the sd of the paired differences over sqrt(n) (common practice);
    intervals are normal. Rows: measure, mean, standard_error, lower, upper, n.
    """
    arrays = [np.asarray(a, dtype=float) for a in (comparator_costs, comparator_effects, costs, effects)]
    if len({a.shape for a in arrays}) != 1 or arrays[0].ndim != 1 or arrays[0].size < 2:
        raise ValueError("per-patient arrays must be one-dimensional, of one length, with >= 2 patients")
    if np.ndim(threshold) != 0:
        raise ValueError("paired_difference takes one threshold")
    lam = float(_thresholds(threshold)[0])
    delta_cost, delta_effect = arrays[2] - arrays[0], arrays[3] - arrays[1]
    z = _normal_quantile(confidence)
    rows = []
    for measure, values in (("incremental_costs", delta_cost), ("incremental_qalys", delta_effect),
                            ("incremental_nmb", lam * delta_effect - delta_cost)):
        mean, se = values.mean(), values.std(ddof=1) / math.sqrt(values.size)
        rows.append({"measure": measure, "mean": mean, "standard_error": se,
                     "lower": mean - z * se, "upper": mean + z * se, "n": values.size})
    table = pd.DataFrame(rows)
    table["measure"] = table["measure"].astype("string")
    return table


def patients_needed(sd: float, *, standard_error: float | None = None,
                    half_width: float | None = None, confidence: float = 0.95) -> int:
    """Patients for a target standard error, n = (sd/se)^2, or CI half-width, n = (z sd/h)^2.

    `sd` is the per-patient sd of the paired difference (e.g. of incremental NMB), from a
    pilot. Common practice; see O'Hagan, Stevenson & Madan (2007) for sample sizing in
    patient-level simulation."""
    if (standard_error is None) == (half_width is None):
        raise ValueError("give exactly one of standard_error and half_width")
    target = standard_error if standard_error is not None else half_width / _normal_quantile(confidence)
    if not (math.isfinite(sd) and sd >= 0 and math.isfinite(target) and target > 0):
        raise ValueError("sd must be >= 0 and the target > 0")
    exact = (sd / target) ** 2
    return max(1, math.ceil(exact * (1 - 1e-12)))  # (3/0.1)^2 must give 900, not 901


@dataclass(frozen=True)
class VarianceComponents:
    """One-way ANOVA of a pilot PSA: N outer draws x n inner patients of one output."""
    n_draws: int
    patients_per_draw: int
    mean: float
    standard_error_of_mean: float
    variance_of_draw_means: float  # s_B^2, expectation sigma^2 + tau^2/n
    within_draw_variance: float  # tau^2 estimate: pooled patient variance within draws
    between_draw_variance: float  # sigma^2 estimate: s_B^2 - tau^2/n (unbiased; may be < 0)
    variance_of_between_estimate: float  # unbiased normal-theory estimate of its variance


def between_estimate_variance(between: float, within: float, n_draws: float, patients_per_draw: float) -> float:
    """Var of the ANOVA estimate of sigma^2 when draw means and patients are normal.

    2(sigma^2 + tau^2/n)^2/(N-1) + 2 tau^4 / (n^2 N (n-1)): s_B^2 and the pooled within
    variance are independent scaled chi-squares on N-1 and N(n-1) degrees of freedom."""
    N, n = n_draws, patients_per_draw
    return 2 * (between + within / n) ** 2 / (N - 1) + 2 * within**2 / (n * n * N * (n - 1))


def variance_components(values) -> VarianceComponents:
    """Between-draw (PSA) and within-draw (patient) variance from a (draws x patients) pilot.

    O'Hagan, Stevenson & Madan (2007), "Monte Carlo probabilistic sensitivity analysis for
    patient level simulation models: efficient estimation of mean and variance using
    ANOVA", Health Economics 16:1009-1023. The sample variance of draw means overstates the
    PSA variance by tau^2/n (patient noise); subtracting it gives an unbiased estimate.
    Its variance estimate replaces s^4 by s^4 * df/(df+2), which is unbiased for the
    chi-square case (derived here, common practice in variance-component estimation).
    """
    y = np.asarray(values, dtype=float)
    if y.ndim != 2 or y.shape[0] < 2 or y.shape[1] < 2 or not np.all(np.isfinite(y)):
        raise ValueError("pilot values must be a finite (draws x patients) array, at least 2 x 2")
    N, n = y.shape
    draw_means = y.mean(axis=1)
    s_b2 = float(draw_means.var(ddof=1))
    s_w2 = float(((y - draw_means[:, None]) ** 2).sum() / (N * (n - 1)))
    variance_of_estimate = 2 * s_b2**2 / (N + 1) + 2 * s_w2**2 / (n * n * (N * (n - 1) + 2))
    return VarianceComponents(
        n_draws=N, patients_per_draw=n, mean=float(draw_means.mean()),
        standard_error_of_mean=math.sqrt(s_b2 / N), variance_of_draw_means=s_b2,
        within_draw_variance=s_w2, between_draw_variance=s_b2 - s_w2 / n,
        variance_of_between_estimate=variance_of_estimate,
    )


@dataclass(frozen=True)
class SampleSplit:
    n_draws: int
    patients_per_draw: int
    variance_of_between_estimate: float


def optimal_sample_split(between: float, within: float, total_patients: int) -> SampleSplit:
    """The outer draws N and inner patients n, N*n <= total, that best estimate sigma^2.

    Minimises `between_estimate_variance` exactly over whole n >= 2 and N >= 2. With many
    draws the optimum is n = 1 + tau^2/sigma^2 (O'Hagan, Stevenson & Madan 2007, from
    memory; it follows from the formula with N-1 taken as N). For the mean alone n = 1 is
    best; this split is for the PSA variance. A negative sigma^2 estimate is taken as 0.

    The variance falls as either n or N grows, so only pairs that use the budget as fully
    as possible compete: n = total // N for N <= sqrt(total), and N = total // n for
    n <= sqrt(total), about 2 sqrt(total) candidates in all. Ties go to the smaller n.
    """
    if not (math.isfinite(within) and within > 0 and math.isfinite(between)):
        raise ValueError("within must be > 0 and between finite")
    if total_patients < 4:
        raise ValueError("total_patients must be >= 4 (2 draws x 2 patients)")
    small = np.arange(2, math.isqrt(total_patients) + 1)
    patients = np.concatenate([small, total_patients // small])
    draws = np.concatenate([total_patients // small, small])
    keep = (patients >= 2) & (draws >= 2)
    patients, draws = patients[keep], draws[keep]
    order = np.argsort(patients, kind="stable")
    patients, draws = patients[order], draws[order]
    variances = between_estimate_variance(max(between, 0.0), within, draws.astype(float), patients.astype(float))
    best = int(np.argmin(variances))
    return SampleSplit(int(draws[best]), int(patients[best]), float(variances[best]))
