"""The acceptability curve with the inner patients' noise taken out, against a simulated PSA
whose true between-draw spread is known.

The case (invented): each draw's true incremental effect and cost (dE, dC) are bivariate
normal, so the true acceptability of the new strategy at threshold lambda is
Phi(m / s), m = lambda E(dE) - E(dC), s^2 = Var(lambda dE - dC) (normal, common practice).
Each draw is observed through n patients whose paired increments scatter around the
draw's true values, which spreads the draws' means by tau^2 / n more (O'Hagan, Stevenson
& Madan 2007) and flattens the curve. The tolerance: the binomial SE of a share of draws,
plus the effect on Phi(m / s) of the error in the estimated between-draw variance (its
normal-theory variance, `economics.between_estimate_variance`), by the delta method.
"""
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from microsim.decision import economics
from microsim.uncertainty import psa as psa_module
from microsim.uncertainty.summaries import summarise_draws
from support import Z

DRAWS, PATIENTS = 4000, 20
MEAN = np.array([0.05, 800.0])  # true incremental effect and cost: means
SPREAD = np.array([[0.03**2, 0.5 * 0.03 * 600.0], [0.5 * 0.03 * 600.0, 600.0**2]])
NOISE = np.array([[0.2**2, -0.3 * 0.2 * 4000.0], [-0.3 * 0.2 * 4000.0, 4000.0**2]])  # a patient's
THRESHOLDS = [10000.0, 16000.0, 20000.0, 30000.0]


def simulated_psa(seed: int, strategies=("usual", "new")) -> pd.DataFrame:
    """Per draw: the comparator at 0, the new strategy's mean increments over its
    patients and their within-draw variances (the columns `evaluate_draw` writes)."""
    rng = np.random.default_rng(seed)
    truth = rng.multivariate_normal(MEAN, SPREAD, size=DRAWS)
    patients = truth[:, None, :] + rng.multivariate_normal([0, 0], NOISE, size=(DRAWS, PATIENTS))
    means = patients.mean(axis=1)
    centred = patients - means[:, None, :]
    covariance = np.einsum("dpi,dpj->dij", centred, centred) / (PATIENTS - 1)
    rows = {"draw": np.repeat(np.arange(DRAWS), 2),
            "strategy": np.tile(strategies, DRAWS),
            "cost": np.column_stack([np.zeros(DRAWS), means[:, 1]]).ravel(),
            "effect": np.column_stack([np.zeros(DRAWS), means[:, 0]]).ravel(),
            "incremental_cost_within_variance": np.column_stack(
                [np.zeros(DRAWS), covariance[:, 1, 1]]).ravel(),
            "incremental_effect_within_variance": np.column_stack(
                [np.zeros(DRAWS), covariance[:, 0, 0]]).ravel(),
            "incremental_within_covariance": np.column_stack(
                [np.zeros(DRAWS), covariance[:, 0, 1]]).ravel(),
            "patients": PATIENTS}
    return pd.DataFrame(rows)


def true_acceptability(threshold: float) -> tuple[float, float, float]:
    """P(new is best), and the between and within variances of incremental NMB."""
    weights = np.array([threshold, -1.0])
    m, between = weights @ MEAN, weights @ SPREAD @ weights
    return stats.norm.cdf(m / np.sqrt(between)), between, weights @ NOISE @ weights


@pytest.mark.parametrize("seed", [1, 2])
def test_the_noise_removed_curve_follows_the_true_spread(seed):
    table = economics.acceptability_without_noise(simulated_psa(seed), THRESHOLDS)
    raw = economics.acceptability_curve(simulated_psa(seed), THRESHOLDS)
    new = table[table.strategy == "new"].set_index("threshold")
    raw_new = raw[raw.strategy == "new"].set_index("threshold")
    flattened = 0
    for threshold in THRESHOLDS:
        p, between, within = true_acceptability(threshold)
        ratio = stats.norm.ppf(p)
        factor_error = economics.between_estimate_variance(between, within, DRAWS, PATIENTS)
        se = np.sqrt(p * (1 - p) / DRAWS + (stats.norm.pdf(ratio) * ratio / 2) ** 2
                     * factor_error / between**2)
        found = new.loc[threshold, "probability_best"]
        assert abs(found - p) < Z * se, (threshold, found, p, se)
        flattened += abs(raw_new.loc[threshold, "probability_best"] - p) > Z * se
        scale, expected = new.loc[threshold, "noise_scale"], np.sqrt(between / (between + within / PATIENTS))
        # sqrt(B / S): the error of the between-draw estimate B dominates, halved
        assert abs(scale - expected) < Z * expected * np.sqrt(factor_error) / (2 * between)
    assert flattened >= 2  # the noise matters here: the raw curve is visibly wrong
    # the comparator's share is the rest, and both shares sum to 1
    shares = table.groupby("threshold").probability_best.sum()
    np.testing.assert_allclose(shares, 1.0)


def test_the_factor_at_the_threshold_is_the_variance_split():
    from microsim.scenario import parse_scenario
    from support import horizon, rate, scenario_text, section, start, state, strategy
    scenario = parse_scenario(scenario_text(
        horizon(5), start(well=1.0), state("well"), state("dead", absorbing=True),
        rate("well", "dead", 0.1), strategy("usual", comparator=True),
        strategy("new", changes=[{"cost": 1.0}]), section("economics", threshold=16000)))
    draws = simulated_psa(3)
    draws["incremental_nmb_within_variance"] = (
        16000**2 * draws.incremental_effect_within_variance
        - 2 * 16000 * draws.incremental_within_covariance + draws.incremental_cost_within_variance)
    split = psa_module.variance_split(scenario, draws).set_index("strategy")
    table = economics.acceptability_without_noise(draws, [16000.0]).set_index("strategy")
    gain = (16000 * draws.effect - draws.cost)[draws.strategy == "new"]
    assert table.loc["new", "noise_scale"] ** 2 * gain.var(ddof=1) == pytest.approx(
        split.loc["new", "between_draw_variance"], rel=1e-9)


def test_three_strategies_share_out_the_draws_and_the_summary_carries_the_column():
    two = simulated_psa(4)
    third = simulated_psa(5)
    third = third[third.strategy == "new"].assign(strategy="other")
    draws = pd.concat([two, third]).sort_values(["draw", "strategy"], key=lambda s: s.map(
        {"usual": 0, "new": 1, "other": 2}) if s.name == "strategy" else s, kind="stable")
    summary = summarise_draws(draws, THRESHOLDS, "usual")["acceptability"]
    assert {"probability_best", "probability_best_noise_removed", "noise_scale"} <= set(summary)
    np.testing.assert_allclose(summary.groupby("threshold").probability_best_noise_removed.sum(), 1.0)
    assert summary[summary.strategy == "usual"].noise_scale.isna().all()


def test_one_patient_a_draw_leaves_nothing_to_take_out():
    draws = simulated_psa(6).assign(patients=1, incremental_cost_within_variance=np.nan,
                                    incremental_effect_within_variance=np.nan,
                                    incremental_within_covariance=np.nan)
    table = economics.acceptability_without_noise(draws, THRESHOLDS)
    assert table.probability_best.isna().all() and table.noise_scale.isna().all()
